"""The release's side of the privacy ledger: the pre-pass that works out what this release
charges each subject (before anything is written), the refusal of a release over the
lifetime budget, and the record of the staged release in the ledger."""

from __future__ import annotations

import weakref
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import DataError
from ..keys import SecretKey
from ..ledger import (
    DIGEST,
    BudgetExhaustedError,
    Ledger,
    LedgerCharges,
    MemoColumn,
    ReleaseMeta,
    charges_of,
    memo_value_hashes,
    subject_digests,
)
from ..manifest import Manifest
from ..policy import LoadedPolicy
from .columns import ColumnDiagnostics, ColumnPlan
from .encode import encode
from .kernel import ColumnSampler, Held
from .memo import memo_context, memo_round, subject_bytes
from .options import ReleaseOptions


@dataclass
class _PrePass:
    """The state of the pre-pass over the subject column and the memoized columns."""

    subject: str
    memo_plans: list[ColumnPlan]
    contexts: dict[str, bytes]
    key: SecretKey
    sampler: ColumnSampler | None

    def batch(self, batch: Any, row0: int) -> tuple[np.ndarray, dict[str, np.ndarray], dict[str, np.ndarray]]:
        """(subject digests, memoized column -> digest of (subject, value) per row, memoized column ->
        rows that set the subject's state (under sample: the rows that report the column))."""
        n = batch.num_rows
        data, offs = subject_bytes(batch.column(self.subject), self.subject, row0)  # checked, trimmed
        sh = subject_digests(self.key, data, offs)
        reported = self.sampler.reported(row0, n) if self.sampler is not None and self.memo_plans else None
        tags, sets = {}, {}
        for p in self.memo_plans:
            tags[p.rc.name] = memo_value_hashes(self.key, p.rc.name, self.contexts[p.rc.name], sh,
                                                self._codes(p, batch.column(p.rc.name), row0, (data, offs)))
            if reported is not None:
                sets[p.rc.name] = reported[:, p.sample_index]
        return sh, tags, sets

    @staticmethod
    def _codes(p: ColumnPlan, values: Any, row0: int, subjects: Any) -> np.ndarray:
        if p.rc.type == "numeric":
            return memo_round(p, encode(values, p, row0), subjects)[1]
        return encode(values, p, row0)


def _eps(p: ColumnPlan) -> float:
    """What a new value of the column costs over a lifetime: with a second layer, the permanent layer's eps."""
    assert p.rc.mechanism is not None
    return p.rc.permanent_epsilon


class ChargeTap:
    """What the ledger needs of every row (subject digests, memoized (subject, value) digests),
    gathered batch by batch: by the pre-pass (``ledger_prepass``), or from the writing pass's own
    batches (``TappedSource``) when nothing has to be known before writing (no ``--allow-partial``),
    so that the input is read once."""

    def __init__(self, plans: list[ColumnPlan], policy: LoadedPolicy, key: SecretKey,
                 sampler: ColumnSampler | None) -> None:
        subject = policy.policy.subject_key
        assert subject is not None
        # copies of the plans: no double counts of the steward-only diagnostics
        self.memo_plans = [replace(p, diag=ColumnDiagnostics()) for p in plans if p.memo is not None]
        priv = [p for p in plans if p.rc.mechanism is not None]
        self.sampler = sampler
        self.base = policy.epsilon_total if sampler is not None else sum(_eps(p) for p in priv if p.memo is None)
        self.pre = _PrePass(subject, self.memo_plans, {p.rc.name: memo_context(p.rc) for p in self.memo_plans}, key,
                            sampler)
        self.columns = [subject] + [p.rc.name for p in self.memo_plans]
        self.rows = 0
        self._hashes: list[np.ndarray] = []
        self._tags: dict[str, list[np.ndarray]] = {p.rc.name: [] for p in self.memo_plans}
        self._sets: dict[str, list[np.ndarray]] = {p.rc.name: [] for p in self.memo_plans}

    def add(self, batch: Any) -> None:
        """The next batch of input rows (it holds at least ``columns``)."""
        sh, t, st = self.pre.batch(batch, self.rows)
        self._hashes.append(sh)
        for name, v in t.items():
            self._tags[name].append(v)
        for name, v in st.items():
            self._sets[name].append(v)
        self.rows += batch.num_rows

    def charges(self, ledger: Any | None, cap: float | None) -> LedgerCharges:
        """Every subject's charge for the rows added (``ledger`` None: no ledger yet)."""
        sampled = self.sampler is not None
        memo = {p.rc.name: MemoColumn(_concat(self._tags[p.rc.name], DIGEST), 0.0 if sampled else _eps(p),
                                      _concat(self._sets[p.rc.name], bool) if sampled else None,
                                      free_if_same=not sampled)
                for p in self.memo_plans}
        return charges_of(_concat(self._hashes, DIGEST), self.base, memo, ledger, cap)


class TappedSource:
    """A source whose batches also go to a ``ChargeTap`` as the writing pass reads them (the
    columns the tap needs are read with the pass's own and left out of what it is given)."""

    def __init__(self, src: Any, tap: ChargeTap) -> None:
        self._src = src
        self._tap = tap

    def __getattr__(self, name: str) -> Any:
        return getattr(self._src, name)

    def batches(self, columns: list[str], batch_rows: int, *args: Any, **kwargs: Any) -> Any:
        extra = [c for c in self._tap.columns if c not in columns]
        for batch in self._src.batches(list(columns) + extra, batch_rows, *args, **kwargs):
            self._tap.add(batch)
            yield batch.select(list(columns)) if extra else batch


def ledger_prepass(src: Any, plans: list[ColumnPlan], policy: LoadedPolicy, key: SecretKey,
                   batch_rows: int, sampler: ColumnSampler | None, ledger: Any | None,
                   cap: float | None, *, check: Callable[[], None] | None = None) -> LedgerCharges:
    """Read only the subject column and the memoized columns, in batches, and work out each
    subject's charge for this release.  Under split a row costs the eps of its non-memoized
    privatized columns, plus each memoized column's eps when the (subject, value) digest differs
    from the ledger's last recorded one for that column (first release: charged).  Under sample a
    row costs epsilon_per_row_used, memoized or not (simple and conservative).  Rows of one subject
    add up.  ``ledger`` None: no ledger yet (nothing spent, no last values).  Nothing is written.
    The batches give digests only; the ledger is searched once, after the last batch, for the
    distinct subjects.  ``check`` is called after every batch (a stop signal ends the pass there)."""
    tap = ChargeTap(plans, policy, key, sampler)
    for batch in src.batches(tap.columns, batch_rows):
        tap.add(batch)
        if check is not None:
            check()
    return tap.charges(ledger, cap)


def _concat(parts: list[np.ndarray], dtype: Any) -> np.ndarray:
    return np.concatenate(parts) if parts else np.zeros(0, dtype=dtype)


def precharge(src: Any, plans: list[ColumnPlan], policy: LoadedPolicy, key: SecretKey, sampler: ColumnSampler | None,
              opts: ReleaseOptions, *, check: Callable[[], None] | None = None) -> LedgerCharges | None:
    """With a ledger: the charges of this release, refused over the lifetime budget (unless
    ``allow_partial``); None without a ledger.  The ledger is only read (nothing is created)."""
    if opts.ledger_path is None:
        return None
    led = open_checked(opts, key)
    try:
        charges = ledger_prepass(src, plans, policy, key, opts.batch_rows, sampler, led, opts.lifetime_epsilon,
                                 check=check)
    except BaseException:
        if led is not None:
            led.close()
        raise
    return settle(charges, led, opts)


def open_checked(opts: ReleaseOptions, key: SecretKey) -> Any | None:
    """The release's ledger opened read-only (creates and changes nothing; None: no ledger yet),
    its key and state checked: a ledger of another key, or a state deleted or edited after the
    last release, is refused before the input is read."""
    assert opts.ledger_path is not None
    if not opts.ledger_path.exists():
        return None
    led = Ledger.open(opts.ledger_path, create=False, readonly=True)
    try:
        led.check_key(key.fingerprint())
        led.check_state()
    except BaseException:
        led.close()
        raise
    return led


def folded_charges(tap: ChargeTap, led: Any | None, opts: ReleaseOptions) -> LedgerCharges:
    """The charges of a release whose writing pass fed ``tap``: refused over the lifetime budget
    (the staged files are then removed: nothing reaches a destination)."""
    try:
        charges = tap.charges(led, opts.lifetime_epsilon)
    except BaseException:
        if led is not None:
            led.close()
        raise
    return settle(charges, led, opts)


def settle(charges: LedgerCharges, led: Any | None, opts: ReleaseOptions) -> LedgerCharges:
    """Refuse ``charges`` over the lifetime budget (unless ``allow_partial``); keep ``led`` with them."""
    try:
        _refuse_over_budget(charges, opts)
    except BaseException:
        if led is not None:
            led.close()
        raise
    # kept open (it holds no lock between reads): the record uses the state it read if nobody
    # has written the ledger since (closed by record_release, or when the charges are dropped)
    if led is not None:
        weakref.finalize(charges, led.close)
    charges.checked = led
    return charges


def _refuse_over_budget(charges: LedgerCharges, opts: ReleaseOptions) -> None:
    cap = opts.lifetime_epsilon
    if charges.over_count and not opts.allow_partial:
        raise BudgetExhaustedError(
            f"this release would take {charges.over_count} subject(s) past the lifetime budget "
            f"(budget.lifetime_epsilon = {cap:g} in ledger {opts.ledger_path}), by up to "
            f"{charges.max_overshoot:.6g}; nothing was written. Run with --allow-partial to release only the "
            "subjects still within the budget, lower the release's eps, or (after review) raise the lifetime "
            "budget.")
    if not charges.within.any():
        raise BudgetExhaustedError(
            f"every subject of this release is past the lifetime budget (budget.lifetime_epsilon = {cap:g} in "
            f"ledger {opts.ledger_path}); nothing was written, as there is nothing left to release.")


def check_same_rows(charges: LedgerCharges | None, rows: int, location: str) -> None:
    """The release read as many rows as the ledger's pre-pass did (the input is read twice with a
    ledger: each pass checks that the file did not change since it was opened, and a CSV's two
    passes must read bytes of one digest; this also covers inputs that have no file state)."""
    if charges is not None and len(charges.row_within) != rows:
        raise DataError(f"input {location} changed while the release was reading it (the ledger's pre-pass read "
                        f"{len(charges.row_within)} rows, the release {rows}). Nothing was written. Let whatever "
                        "writes the file finish (or release a copy that nothing writes to) and run the release again.")


def rows_held(charges: LedgerCharges | None, plans: list[ColumnPlan]) -> Held | None:
    """--allow-partial: per privatized column, the input rows of people held back whose cell must
    not use their data (None: nobody held back).  They stay in the extract, at their place, as
    rows whose reports are of placeholder values: the row count and the rows' positions are those
    of the full table, so the extract does not show who was held back, nor how many.  A memoized
    cell whose value is the one the ledger last recorded for the person keeps its report (the very
    report released before, which costs nothing and tells nothing new), so that aligning nights
    by memoized reports does not single out the people held back."""
    if charges is None or charges.within.all():
        return None
    held = ~charges.row_within
    return {p.rc.name: held & ~charges.memo_same[p.rc.name] if p.rc.name in charges.memo_same else held
            for p in plans if p.rc.mechanism is not None}


def record_release(ledger_path: Path, charges: LedgerCharges, plans: list[ColumnPlan], manifest: Manifest,
                   cap: float | None) -> int:
    """Record the staged release in the ledger (one transaction; the cap re-checked under its lock)."""
    meta = ReleaseMeta(policy_sha256=manifest.policy_sha256, extract_sha256=manifest.extract.sha256,
                       nonce=manifest.nonce,
                       columns={p.rc.name: {"eps": float(p.rc.mechanism.epsilon), "memoized": bool(p.rc.memoize)}
                                for p in plans if p.rc.mechanism is not None})
    within = charges.within.all()
    try:
        with Ledger.open(ledger_path, create=True) as led:
            return led.record_release(meta, charges.subjects if within else charges.subjects[charges.within],
                                      charges.eps if within else charges.eps[charges.within],
                                      charges.memo_updates(), lifetime_epsilon=cap,
                                      key_fingerprint=manifest.key_fingerprint, checked=charges.checked)
    finally:
        if charges.checked is not None:
            charges.checked.close()
            charges.checked = None
