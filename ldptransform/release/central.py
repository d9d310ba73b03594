"""The central guarantee a shuffled release may state (amplification by shuffling), and the
check behind its one-row-per-person condition.

A release states the central (eps, delta) of ``amplification.shuffle_guarantee`` only when all of
its conditions hold, each decided here from the policy and the options (never from the data):

- the rows are shuffled (policy ``output.row_order: shuffled``, the default);
- every person has one row: declared with ``output.one_row_per_person: true``; with a
  ``subject_key`` the release also checks it and refuses a table where a subject repeats (so the
  statement never depends on what the data happened to hold);
- no public column (a column in the clear ties a report to a person);
- no memoized column (a memoized report links the row to the person's rows in other releases);
- no placeholder rows may occur (``--allow-partial``: the number of real rows behind n is not
  published, and the bound needs it).

Otherwise the manifest says which condition fails.  delta is DELTA_RULE (common practice, no
source: delta well below 1/n, so that the guarantee cannot be met by releasing one person outright).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from ..amplification import shuffle_guarantee
from ..errors import DataError
from ..policy import LoadedPolicy
from .columns import ColumnPlan
from .options import ReleaseOptions

DELTA_RULE = "delta = min(1e-6, 0.1 / n)"


def central_delta(n: int) -> float:
    return min(1e-6, 0.1 / max(n, 1))


def central_entry(policy: LoadedPolicy, plans: list[ColumnPlan], opts: ReleaseOptions | None, rows: int,
                  row_epsilon: float) -> dict[str, Any]:
    """The manifest's ``privacy.central``: the guarantee and its conditions, or why it does not apply."""
    out = policy.policy.output
    failed = []
    if out.row_order != "shuffled":
        failed.append("the rows keep the input's order (output.row_order: as-input)")
    if not out.one_row_per_person:
        failed.append("the policy does not declare one row per person (output.one_row_per_person)")
    public = [p.rc.name for p in plans if p.rc.type == "public"]
    if public:
        failed.append(f"column(s) released in the clear ({', '.join(public)}) tie reports to people")
    memo = [p.rc.name for p in plans if p.rc.memoize]
    if memo:
        failed.append(f"memoized column(s) ({', '.join(memo)}) link rows to the same people's rows in other "
                      "releases")
    if opts is not None and opts.allow_partial:
        failed.append("placeholder rows may occur (--allow-partial): how many real rows n holds is not published")
    checked = ("checked: every subject_key value occurs once" if policy.policy.subject_key is not None
               else "declared by the data steward, not checked (no subject_key)")
    base: dict[str, Any] = {"conditions": "rows shuffled; one row per person; no column in the clear; no memoized "
                                          "column; no placeholder rows", "rows": rows, "row_epsilon": row_epsilon}
    if failed:
        return {**base, "applies": False, "reason": "does not apply: " + "; ".join(failed) + ". Only the local "
                "guarantee (each row's eps) holds."}
    g = shuffle_guarantee(row_epsilon, rows, delta=central_delta(rows))
    if not g.applies:
        return {**base, "applies": False, "reason": "does not apply: " + g.reason + ". Only the local guarantee "
                "(each row's eps) holds.", "source": g.source}
    text = (f"shuffled, one row per person ({checked}): the released rows, as a whole, are ({g.epsilon:.4g}, "
            f"{g.delta:.3g})-differentially private in the central sense, for the {rows} rows each "
            f"{row_epsilon:g}-LDP ({DELTA_RULE}; {g.source})")
    if not g.improves:
        text += "; this is not below the rows' own eps, which remains the better statement"
    return {**base, **g.to_dict(), "statement": text}


def check_one_row_per_person(src: Any, policy: LoadedPolicy, batch_rows: int, location: str, *,
                             check: Callable[[], None] | None = None) -> None:
    """With ``output.one_row_per_person`` and a ``subject_key``: refuse a table where a subject
    occurs more than once (steward-only message: how many, never which).  ``check`` is called
    after every batch (a stop signal ends the pass there)."""
    subject = policy.policy.subject_key
    if not policy.policy.output.one_row_per_person or subject is None:
        return
    import pyarrow.compute as pc

    from .encode import _as_string_array

    digests = []
    row0 = 0
    for batch in src.batches([subject], batch_rows):
        text = _as_string_array(batch.column(subject), subject, row0)  # not UTF-8: a DataError naming the row
        row0 += batch.num_rows
        # pandas' vectorized 64-bit hash of each value (8 bytes a row in memory): a false repeat has
        # probability about n^2 / 2^65
        digests.append(pd.util.hash_array(np.asarray(pc.fill_null(text, "\x00<missing>").to_numpy(
            zero_copy_only=False), dtype=object)))
        if check is not None:
            check()
    if not digests:
        return
    values = np.concatenate(digests)
    check_repeats(len(values) - len(np.unique(values)), policy, location)


def check_repeats(repeats: int, policy: LoadedPolicy, location: str) -> None:
    """Refuse ``repeats`` rows whose subject another row has, when the policy declares one row per
    person (the ledger's pre-pass counts them from its distinct subjects, without a pass of its own)."""
    subject = policy.policy.subject_key
    if repeats and policy.policy.output.one_row_per_person:
        raise DataError(f"policy {policy.source} declares output.one_row_per_person: true, but in input {location} "
                        f"{repeats} row(s) repeat a subject_key ({subject!r}) value that another row has (steward-"
                        "only figure). Give each person one row (aggregate or pick one row per person), or set "
                        "output.one_row_per_person: false (the manifest then states no central guarantee).")
