"""The central (eps, delta) that shuffling gives to n reports that are each eps0-LDP.

When n people each send one report through an eps0-LDP randomizer and the reports are released
in a uniformly random order, unlinked to who sent them, the released multiset is (eps, delta)-DP
in the central sense (one person's change moves the whole output's distribution by at most a
factor e^eps, except with probability delta), with eps much below eps0 for large n:
amplification by shuffling.  The bound used here is the closed form of

    V. Feldman, A. McMillan, K. Talwar, "Hiding Among the Clones: A Simple and Nearly Optimal
    Analysis of Privacy Amplification by Shuffling", FOCS 2021 (arXiv 2012.12803), Theorem 3.1:

    for delta in (0, 1) and eps0 <= log(n / (16 log(2/delta))), shuffling n reports of eps0-DP
    local randomizers is (eps, delta)-DP with

        eps = log(1 + (e^eps0 - 1)/(e^eps0 + 1) * (8 sqrt(e^eps0 log(4/delta)) / sqrt(n) + 8 e^eps0 / n)).

What was checked against the paper, and what was not: the paper's abstract (read from the
paper's own page) states the result as an (O((1 - e^-eps0) sqrt(e^eps0 log(1/delta) / n)), delta)
guarantee for n records input to eps0-DP local randomizers; the closed form above has exactly
that order ((e^eps0 - 1)/(e^eps0 + 1) lies between (1 - e^-eps0)/2 and 1 - e^-eps0, and
log(1 + x) <= x).  The constants (8 and 8, log(4/delta)) and the condition eps0 <= log(n / (16
log(2/delta))) are the statement of Theorem 3.1 as recalled, not read from the theorem itself in
this work; they are restated in docs/formulas.md section 16 and the tests compute them
independently from that statement.  The paper's tighter numerical bound is not implemented: a
faithful implementation needs the paper's algorithm in full, which was not at hand.

The guarantee holds only when its assumptions hold, and this module cannot see them: the rows are
really shuffled (the extract's order is independent of the data and of who sent what), every
person contributes exactly one row (the n are people, not rows), each row's report is eps0-LDP as
a whole (eps0 is the row's total over its columns), no column is released in the clear (a public
column links a report to a person), and no memoized report links the row to another release.
Deciding whether a release meets them is the manifest's business (the caller's).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from .errors import UsageError

__all__ = ["ShuffleGuarantee", "shuffle_guarantee", "closed_form_epsilon", "largest_epsilon0", "SOURCE"]

SOURCE = ("V. Feldman, A. McMillan, K. Talwar, \"Hiding Among the Clones: A Simple and Nearly Optimal Analysis of "
          "Privacy Amplification by Shuffling\", FOCS 2021, Theorem 3.1 (closed form)")


@dataclass(frozen=True)
class ShuffleGuarantee:
    """The central guarantee shuffling gives, or why it does not apply.

    ``applies``: the theorem's condition holds for (n, eps0, delta), and ``epsilon`` is its bound
    (None otherwise, with ``reason`` saying why).  ``improves``: the bound is below eps0 (otherwise
    the reports' own eps0, with delta 0, is the better statement)."""

    applies: bool
    epsilon: float | None
    delta: float
    n: int
    epsilon0: float
    largest_epsilon0: float | None
    reason: str = ""
    source: str = SOURCE

    @property
    def improves(self) -> bool:
        return self.applies and self.epsilon is not None and self.epsilon < self.epsilon0

    def to_dict(self) -> dict[str, Any]:
        return {"applies": self.applies, "epsilon": self.epsilon, "delta": self.delta, "rows": self.n,
                "row_epsilon": self.epsilon0, "largest_row_epsilon": self.largest_epsilon0,
                "improves": self.improves, "reason": self.reason, "source": self.source}

    def to_frame(self) -> Any:
        """``to_dict()`` as a one-row pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame([self.to_dict()])


def closed_form_epsilon(epsilon0: float, n: int, delta: float) -> float:
    """The bound of Theorem 3.1 (module docstring), without checking its condition."""
    e0 = math.exp(epsilon0)
    return math.log1p((e0 - 1.0) / (e0 + 1.0)
                      * (8.0 * math.sqrt(e0 * math.log(4.0 / delta)) / math.sqrt(n) + 8.0 * e0 / n))


def largest_epsilon0(n: int, delta: float) -> float | None:
    """The largest eps0 the theorem's condition allows, log(n / (16 log(2/delta))); None when n is
    too small for any eps0 > 0 (n <= 16 log(2/delta))."""
    bound = n / (16.0 * math.log(2.0 / delta))
    return math.log(bound) if bound > 1.0 else None


def _check(epsilon0: Any, n: Any, delta: Any) -> tuple[float, int, float]:
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise UsageError(f"shuffle guarantee: the number of rows n must be a whole number of at least 1, got {n!r}.")
    if (isinstance(epsilon0, bool) or not isinstance(epsilon0, (int, float)) or not math.isfinite(epsilon0)
            or epsilon0 <= 0):
        raise UsageError(f"shuffle guarantee: the row eps (eps0) must be a positive finite number, got {epsilon0!r}.")
    if isinstance(delta, bool) or not isinstance(delta, (int, float)) or not 0 < delta < 1:
        raise UsageError(f"shuffle guarantee: delta must be a number strictly between 0 and 1 (for example 1e-6, "
                         f"well below 1/n), got {delta!r}.")
    return float(epsilon0), n, float(delta)


def shuffle_guarantee(epsilon0: float, n: int, *, delta: float) -> ShuffleGuarantee:
    """The central (eps, delta) that shuffling ``n`` one-per-person rows, each ``epsilon0``-LDP, gives
    (Theorem 3.1's closed form), or a result with ``applies`` False and the reason: n too small for
    the condition at any eps0, or eps0 above the largest the condition allows at this n.  The
    caller must also know that the rows are shuffled, one per person, with no public column and
    no memoized linkage (module docstring); this function checks the arithmetic only."""
    e0, n, d = _check(epsilon0, n, delta)
    top = largest_epsilon0(n, d)
    if top is None:
        need = math.ceil(16.0 * math.log(2.0 / d) * math.exp(e0))
        return ShuffleGuarantee(False, None, d, n, e0, None,
                                f"too few rows: the bound needs eps0 <= log(n / (16 log(2/delta))), which no eps0 > 0 "
                                f"meets at n = {n} and delta = {d:g} (at eps0 {e0:g} it needs n >= {need})")
    if e0 > top:
        need = math.ceil(16.0 * math.log(2.0 / d) * math.exp(e0))
        return ShuffleGuarantee(False, None, d, n, e0, top,
                                f"row eps too large: eps0 = {e0:g} is above log(n / (16 log(2/delta))) = {top:.4g} at "
                                f"n = {n} and delta = {d:g} (eps0 {e0:g} needs n >= {need})")
    return ShuffleGuarantee(True, closed_form_epsilon(e0, n, d), d, n, e0, top)
