"""The charges of a release: one charge per distinct subject (the sum of its rows' eps),
checked against the lifetime budget with what each subject has spent so far."""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import LedgerError
from .hashes import distinct, equal_digests

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
    uniq, inv = distinct(h)
    if len(inv) == len(uniq):  # one entry per subject already
        out = np.empty(len(uniq))
        out[inv] = eps
        return uniq, out
    return uniq, np.bincount(inv, weights=eps, minlength=len(uniq))


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
class MemoColumn:
    """A memoized column in a release's charges: per input row, the keyed digest of (subject,
    value) (``hashes.memo_value_hashes``)."""

    tags: np.ndarray                 # S16 per input row
    eps: float = 0.0                 # what a changed value costs (added to the row's eps)
    sets: np.ndarray | None = None   # per input row: the row sets its subject's state (None: every row)
    free_if_same: bool = True        # a value the ledger last recorded costs nothing (False: always ``eps``)
    # per input row: its value is the one the ledger last recorded (worked out already, from the
    # rows' registry positions; only with ``charges_of``'s ``row_pos``); None: looked up here
    same: np.ndarray | None = None


@dataclass
class LedgerCharges:
    """What a release charges, from its pre-pass (all steward-only, data-dependent)."""

    subjects: np.ndarray          # distinct subject digests (S16), in byte order
    eps: np.ndarray               # eps each distinct subject is charged
    within: np.ndarray            # per distinct subject: stays within lifetime_epsilon
    row_within: np.ndarray        # per input row: its subject stays within (rows to release)
    # memoized column -> (place among ``subjects`` of each subject whose state the release sets,
    # the digest of its value: that of its last row that sets it)
    memo: dict[str, tuple[np.ndarray, np.ndarray]]
    over_count: int = 0
    max_overshoot: float = 0.0
    # per memoized column and input row: the value is the one last recorded (its report is the one
    # already released); set by the release's pre-pass, used for the rows of held-back people
    memo_same: dict[str, np.ndarray] = field(default_factory=dict)
    # the ledger (read-only) the charges were worked out from, kept open so that its record can
    # use the state it read when nobody has written the ledger since (``Ledger.record_release``)
    checked: Any | None = field(default=None, repr=False)
    # the record worked out ahead on that state (a future of ``Ledger.prepare_record``), if any
    prepared: Any | None = field(default=None, repr=False)
    _inputs: tuple[np.ndarray, np.ndarray, dict[str, tuple[np.ndarray, np.ndarray]]] | None = field(
        default=None, repr=False)

    def record_inputs(self) -> tuple[np.ndarray, np.ndarray, dict[str, tuple[np.ndarray, np.ndarray]]]:
        """(subjects, eps, memo updates) of the subjects released, as the record takes them (made
        once: the record prepared ahead is matched to its inputs by identity)."""
        if self._inputs is None:
            within = self.within.all()
            self._inputs = (self.subjects if within else self.subjects[self.within],
                            self.eps if within else self.eps[self.within], self.memo_updates())
        return self._inputs

    def memo_updates(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Memo state of the released subjects only (held-back subjects keep their old state)."""
        out = {}
        everyone = self.within.all()
        for col, (pos, tags) in self.memo.items():
            if everyone and len(pos) == len(self.subjects):  # pos is every subject, in order: no copy
                out[col] = (self.subjects, tags)
                continue
            keep = self.within[pos]
            out[col] = (self.subjects[pos], tags) if keep.all() else (self.subjects[pos[keep]], tags[keep])
        return out


def _last_rows(inv: np.ndarray, sets: np.ndarray | None, n_subjects: int) -> tuple[np.ndarray, np.ndarray]:
    """(subjects that have a row that sets their state, the last such row of each)."""
    rows = np.arange(len(inv), dtype=np.int64)
    if sets is not None:
        rows = rows[sets]
    last = np.full(n_subjects, -1, dtype=np.int64)
    np.maximum.at(last, inv[rows], rows)
    who = np.flatnonzero(last >= 0)
    return who, last[who]


def charges_of(subject_rows: np.ndarray, eps_rows: Any, memo: Mapping[str, MemoColumn],
               ledger: Any | None, cap: float | None, row_pos: np.ndarray | None = None) -> LedgerCharges:
    """A release's charges from its rows' subject digests and eps (input order): one charge per
    distinct subject (the sum of its rows), checked against ``cap`` with what the ``ledger``
    (None: none yet) says each subject has spent.  A memoized column adds its ``eps`` to each row
    whose value differs from the ledger's last recorded one (``free_if_same``; a first release is
    charged in full).  The ledger is searched once, for the distinct subjects in byte order; or,
    with ``row_pos`` (each row's registry position from ``ledger.row_positions``, searched batch
    by batch as the rows were read), not at all."""
    h = np.asarray(subject_rows)
    if ledger is not None and row_pos is not None:
        uniq, inv, pos = ledger.distinct_rows(h, row_pos)
    else:
        uniq, inv = distinct(h)
        pos = ledger.positions(uniq) if ledger is not None and len(uniq) else np.full(len(uniq), -1, dtype=np.int64)
        row_pos = None
    n = len(inv)
    eps_rows = np.array(np.broadcast_to(np.asarray(eps_rows, dtype=np.float64), (n,)))
    memo_out: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    same_out: dict[str, np.ndarray] = {}
    for col, m in memo.items():
        if m.free_if_same and ledger is not None and m.same is not None and row_pos is not None:
            same = m.same
        elif m.free_if_same and ledger is not None:
            last = ledger.last_values(col, h, row_pos) if row_pos is not None else \
                ledger.last_values(col, uniq, pos)[inv]
            same = equal_digests(m.tags, last)
        else:
            same = np.zeros(n, dtype=bool)
        eps_rows += np.where(same, 0.0, m.eps)
        same_out[col] = same
        if m.sets is None and len(uniq) == n:  # one row per subject: no search for last rows
            tags_u = np.empty(n, dtype=m.tags.dtype)
            tags_u[inv] = m.tags
            memo_out[col] = (np.arange(n, dtype=np.int64), tags_u)
        else:
            who, rows = _last_rows(inv, m.sets, len(uniq))
            memo_out[col] = (who, m.tags[rows])
    eps_u = np.bincount(inv, weights=eps_rows, minlength=len(uniq)) if n else np.zeros(0)
    if cap is not None:
        known = pos >= 0
        if ledger is not None and len(pos) and known.all():  # everyone registered: no masks
            spent = ledger.spend_totals()[pos]
        else:
            spent = np.zeros(len(uniq))
            if ledger is not None and known.any():
                spent[known] = ledger.spend_totals()[pos[known]]
        over, overshoot, within = cap_plan(spent, eps_u, cap)
    else:
        within, over, overshoot = np.ones(len(uniq), dtype=bool), 0, 0.0
    return LedgerCharges(uniq, eps_u, within, within[inv], memo_out, over, max(overshoot, 0.0), same_out)
