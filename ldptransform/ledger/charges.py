"""The charges of a release: one charge per distinct subject (the sum of its rows' eps),
checked against the lifetime budget with what each subject has spent so far."""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import LedgerError

CAP_TOLERANCE = 1e-9  # relative slack on the cap for floating-point sums (0.1 + 0.2 > 0.3)


@dataclass
class ChargePlan:
    over_count: int
    max_overshoot: float
    within_mask: np.ndarray = field(repr=False)

    def __iter__(self) -> Iterator[Any]:  # unpacks as (over_count, max_overshoot, within_mask)
        return iter((self.over_count, self.max_overshoot, self.within_mask))


def aggregate(h: np.ndarray, per_subject_eps: Any) -> tuple[np.ndarray, np.ndarray]:
    """One entry per distinct subject; a subject with several rows is charged their sum."""
    eps = np.broadcast_to(np.asarray(per_subject_eps, dtype=np.float64), h.shape)
    if not np.all(np.isfinite(eps)) or np.any(eps < 0):
        raise LedgerError("per-subject eps must be finite and >= 0 (the eps each subject's rows use in this "
                          "release).")
    uniq, inv = np.unique(h, return_inverse=True)
    return uniq, np.bincount(inv.reshape(-1), weights=eps, minlength=len(uniq))


def cap_plan(spent: np.ndarray, add: np.ndarray, cap: float) -> ChargePlan:
    total = spent + add
    within = total <= cap * (1 + CAP_TOLERANCE)
    over = int((~within).sum())
    overshoot = float((total - cap).max()) if over else 0.0
    return ChargePlan(over, max(overshoot, 0.0), within)


def check_cap(cap: float | None) -> None:
    if cap is not None and (isinstance(cap, bool) or not math.isfinite(cap) or cap <= 0):
        raise LedgerError("lifetime_epsilon must be a finite number > 0 (the eps a subject may spend over all "
                          "releases).")


@dataclass
class LedgerCharges:
    """What a release charges, from its pre-pass (all steward-only, data-dependent)."""

    subjects: np.ndarray          # distinct subject hashes (S32), sorted
    eps: np.ndarray               # eps each distinct subject is charged
    within: np.ndarray            # per distinct subject: stays within lifetime_epsilon
    row_within: np.ndarray        # per input row: its subject stays within (rows to release)
    memo: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]  # column -> (row index, subject hash, value hash)
    over_count: int = 0
    max_overshoot: float = 0.0
    # per memoized column and input row: the value is the one last recorded (its report is the one
    # already released); set by the release's pre-pass, used for the rows of held-back people
    memo_same: dict[str, np.ndarray] = field(default_factory=dict)

    def memo_updates(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Memo state of the released rows only (held-back subjects keep their old state)."""
        out = {}
        for col, (rows, sh, vh) in self.memo.items():
            keep = self.row_within[rows]
            out[col] = (sh[keep], vh[keep])
        return out


def _concat_memo(parts: list[tuple[np.ndarray, np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return tuple(np.concatenate([pt[i] for pt in parts]) if parts else np.zeros(0, dtype=dt)  # type: ignore[return-value]
                 for i, dt in enumerate((np.int64, "S32", "S32")))


def charges_of(hashes: list[np.ndarray], eps: list[np.ndarray],
               memo: Mapping[str, list[tuple[np.ndarray, np.ndarray, np.ndarray]]], ledger: Any | None,
               cap: float | None) -> LedgerCharges:
    """A release's charges from its rows' subject hashes and eps (in batches, input order): one
    charge per distinct subject (the sum of its rows), checked against ``cap`` with what the
    ``ledger`` (None: none yet) says each subject has spent; ``memo``: per memoized column, the
    (row index, subject hash, value hash) batches of the rows whose state the release sets."""
    all_h = np.concatenate(hashes) if hashes else np.zeros(0, dtype="S32")
    all_e = np.concatenate(eps) if eps else np.zeros(0)
    uniq, inv = np.unique(all_h, return_inverse=True)
    inv = inv.reshape(-1)
    eps_u = np.bincount(inv, weights=all_e, minlength=len(uniq))
    if cap is not None:
        spent = ledger.spent(uniq) if ledger is not None else np.zeros(len(uniq))
        over, overshoot, within = cap_plan(spent, eps_u, cap)
    else:
        within, over, overshoot = np.ones(len(uniq), dtype=bool), 0, 0.0
    return LedgerCharges(uniq, eps_u, within, within[inv], {c: _concat_memo(parts) for c, parts in memo.items()},
                         over, max(overshoot, 0.0))
