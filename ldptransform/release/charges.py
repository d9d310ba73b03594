"""The release's side of the spend ledger: what this release charges each subject, worked out
from the writing pass's own batches in a worker thread beside the release (``ChargeTap``), or by a
pre-pass before anything is written (``ledger_prepass``, with ``--allow-partial``); the refusal of a
release over the lifetime budget; and the record of the staged release in the ledger."""

from __future__ import annotations

import weakref
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field, replace
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
from ..ledger.hashes import equal_digests
from ..manifest import Manifest
from ..policy import LoadedPolicy
from .columns import ColumnDiagnostics, ColumnPlan
from .encode import encode
from .kernel import ColumnSampler, Held
from .memo import memo_context, memo_round, subject_bytes
from .options import ReleaseOptions


@dataclass
class _Batch:
    """One batch's input to the ledger's digests, made in the release's thread: the subject
    column's bytes, each memoized column's value codes and (under sample) the rows that set it."""

    data: np.ndarray
    offs: np.ndarray
    codes: dict[str, np.ndarray]
    sets: dict[str, np.ndarray]


@dataclass
class _Digested:
    """What the worker made of one batch: subject digests, memoized (subject, value) digests, and
    with a ledger each row's registry position and per memoized column whether the value is the
    one last recorded (None, {}: no ledger, or its state was refused)."""

    sh: np.ndarray
    tags: dict[str, np.ndarray]
    pos: np.ndarray | None = None
    same: dict[str, np.ndarray] = field(default_factory=dict)


@dataclass
class _PrePass:
    """The state of the pre-pass over the subject column and the memoized columns."""

    subject: str
    memo_plans: list[ColumnPlan]
    contexts: dict[str, bytes]
    key: SecretKey
    sampler: ColumnSampler | None

    def prepare(self, batch: Any, row0: int) -> _Batch:
        """What the digests of a batch need, checked (a bad subject or value is a ``DataError`` here)."""
        n = batch.num_rows
        data, offs = subject_bytes(batch.column(self.subject), self.subject, row0)  # checked, trimmed
        reported = self.sampler.reported(row0, n) if self.sampler is not None and self.memo_plans else None
        codes, sets = {}, {}
        for p in self.memo_plans:
            codes[p.rc.name] = self._codes(p, batch.column(p.rc.name), row0, (data, offs))
            if reported is not None:
                sets[p.rc.name] = reported[:, p.sample_index]
        return _Batch(data, offs, codes, sets)

    def digests(self, b: _Batch) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """(subject digests, memoized column -> digest of (subject, value) per row): AES over whole
        arrays, which runs beside the release's own work (it does not hold Python's lock)."""
        sh = subject_digests(self.key, b.data, b.offs)
        return sh, {name: memo_value_hashes(self.key, name, self.contexts[name], sh, codes)
                    for name, codes in b.codes.items()}

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
    """What the ledger needs of every row (subject digests, memoized (subject, value) digests,
    each row's place in the ledger's registry), gathered batch by batch: by the pre-pass
    (``ledger_prepass``), or from the writing pass's own batches (``TappedSource``) when nothing
    has to be known before writing (no ``--allow-partial``), so that the input is read once.

    The ledger's work runs in one worker thread beside the release's (the second core): first
    the check of the ``ledger``'s stored state (``Ledger.check_state``: a damaged ledger is
    refused as soon as it is known, at the next batch), then per batch the keyed digests and the
    search of the registry.  The release's thread only checks and encodes the rows (``_PrePass.
    prepare``).  The results do not depend on the thread: each batch's are kept in input order.
    ``close`` (or ``charges``) waits for the worker; the ledger is used by one thread at a time."""

    def __init__(self, plans: list[ColumnPlan], policy: LoadedPolicy, key: SecretKey,
                 sampler: ColumnSampler | None, ledger: Any | None = None, cap: float | None = None) -> None:
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
        self.ledger = ledger
        self.cap = cap  # the lifetime budget the charges are checked against (pass_done)
        self._early: Future[LedgerCharges] | None = None  # the charges worked out when the pass was done
        self._sets: dict[str, list[np.ndarray]] = {p.rc.name: [] for p in self.memo_plans}
        self._pool: ThreadPoolExecutor | None = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ldpt-ledger")
        self._state: Future[None] | None = self._pool.submit(ledger.check_state) if ledger is not None else None
        self._parts: list[Future[_Digested]] = []

    @property
    def kernel_fed(self) -> bool:
        """The release's kernel gives the tap what it needs (``observe``): with memoized columns it
        reads the subject column and encodes their values anyway.  Else the rows come by ``add``."""
        return bool(self.memo_plans)

    def add(self, batch: Any) -> None:
        """The next batch of input rows (it holds at least ``columns``)."""
        self._raise_early()
        b = self.pre.prepare(batch, self.rows)
        self._submit(self.rows, batch.num_rows, b)

    def observe(self, row0: int, subjects: Any, codes: dict[str, np.ndarray], reported: np.ndarray | None) -> None:
        """What the kernel made of input rows [row0, row0 + n) (``privatize_batch``'s ``observe``):
        the subject column's bytes and offsets, the memoized columns' value codes, the rows reported."""
        self._raise_early()
        sets = {}
        if self.sampler is not None:
            assert reported is not None
            sets = {p.rc.name: reported[:, p.sample_index] for p in self.memo_plans}
        data, offs = subjects
        self._submit(row0, len(offs) - 1, _Batch(data, offs, {p.rc.name: codes[p.rc.name] for p in self.memo_plans},
                                                 sets))

    def _raise_early(self) -> None:
        if self._state is not None and self._state.done() and self._state.exception() is not None:
            self._state.result()  # the ledger is damaged: refused now, not after the pass
        assert self._pool is not None, "rows given to a closed ChargeTap"

    def _submit(self, row0: int, n: int, b: _Batch) -> None:
        assert self._pool is not None
        for name, v in b.sets.items():
            self._sets[name].append(v)
        if row0 != self.rows:
            raise AssertionError(f"the ledger's tap was given rows from {row0}, expected {self.rows} (input order)")
        self._parts.append(self._pool.submit(self._work, b))
        self.rows += n

    def _work(self, b: _Batch) -> _Digested:
        """In the worker: a batch's digests and (with a ledger whose state is sound) the registry
        position of each row and, for the memoized columns charged by value, whether each row's
        value is the one last recorded.  The state check ran first (one worker: tasks run in order)."""
        sh, tags = self.pre.digests(b)
        led = self.ledger
        if led is None or self._state is None or not self._state.done() or self._state.exception() is not None:
            return _Digested(sh, tags)
        pos = led.row_positions(sh)
        same = {} if self.sampler is not None else {
            name: equal_digests(t, led.last_values(name, sh, pos)) for name, t in tags.items()}
        return _Digested(sh, tags, pos, same)

    def close(self) -> None:
        """Stop the worker (batches not started are dropped; the one it is on is waited for)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None

    def pass_done(self) -> None:
        """Every row has been given (the privatizing pass is over, the shuffle's second pass is
        next): the worker works out the charges now, and when everyone is within the budget the
        ledger's new state for the record (``Ledger.prepare_record``), while the release writes."""
        if self._pool is not None and self._early is None:
            self._early = self._pool.submit(self._charges_now)

    def _charges_now(self) -> LedgerCharges:
        if self._state is not None:
            self._state.result()  # a damaged ledger: its refusal, not charges
        charges = self._charges_of([f.result() for f in self._parts], self.ledger, self.cap)
        if self._pool is not None and charges.within.all():
            subjects, eps, memo = charges.record_inputs()
            prepare = self.ledger.prepare_record if self.ledger is not None else Ledger.prepare_first_record
            charges.prepared = self._pool.submit(prepare, subjects, eps, memo)
        return charges

    def charges(self, ledger: Any | None, cap: float | None) -> LedgerCharges:
        """Every subject's charge for the rows added (``ledger`` None: no ledger yet); the ledger
        given must be the one the tap was made with, if any (its state was checked and searched).
        The worker is let go: it ends once the record's preparation, if any, is done."""
        try:
            if self._state is not None:
                self._state.result()
            if self._early is not None and ledger is self.ledger and cap == self.cap:
                return self._early.result()
            parts = [f.result() for f in self._parts]
        finally:
            if self._pool is not None:
                self._pool.shutdown(wait=self._early is None)
                self._pool = None
        return self._charges_of(parts, ledger, cap)

    def _charges_of(self, parts: list[_Digested], ledger: Any | None, cap: float | None) -> LedgerCharges:
        sampled = self.sampler is not None
        searched = ledger is not None and ledger is self.ledger and all(d.pos is not None for d in parts)
        pos = _concat([d.pos for d in parts if d.pos is not None], np.int64) if searched else None
        memo = {p.rc.name: MemoColumn(_concat([d.tags[p.rc.name] for d in parts], DIGEST),
                                      0.0 if sampled else _eps(p),
                                      _concat(self._sets[p.rc.name], bool) if sampled else None,
                                      free_if_same=not sampled,
                                      same=_concat([d.same[p.rc.name] for d in parts], bool)
                                      if searched and not sampled else None)
                for p in self.memo_plans}
        return charges_of(_concat([d.sh for d in parts], DIGEST), self.base, memo, ledger, cap, pos)


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
        self._tap.pass_done()


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
    tap = ChargeTap(plans, policy, key, sampler, ledger, cap)
    try:
        for batch in src.batches(tap.columns, batch_rows):
            tap.add(batch)
            if check is not None:
                check()
        return tap.charges(ledger, cap)
    finally:
        tap.close()


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


def open_checked(opts: ReleaseOptions, key: SecretKey, *, state: bool = True) -> Any | None:
    """The release's ledger opened read-only (creates and changes nothing; None: no ledger yet),
    its key and (``state``) its state checked: a ledger of another key, or a state deleted or
    edited after the last release, is refused before the input is read.  ``state`` False: the
    state is checked by the ``ChargeTap``'s worker beside the writing pass (refused at its
    first batch after the check; nothing is written to a destination either way)."""
    assert opts.ledger_path is not None
    if not opts.ledger_path.exists():
        return None
    led = Ledger.open(opts.ledger_path, create=False, readonly=True)
    try:
        led.check_key(key.fingerprint())
        if state:
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


def _prepared(charges: LedgerCharges) -> Any | None:
    """The record the tap's worker prepared for ``charges`` (waited for; None if there is none, or
    if preparing it failed: the record then works it out itself)."""
    fut, charges.prepared = charges.prepared, None
    if fut is None:
        return None
    try:
        return fut.result()
    except Exception:  # noqa: BLE001 - an optimisation only: the record does the same work itself
        return None


def record_release(ledger_path: Path, charges: LedgerCharges, plans: list[ColumnPlan], manifest: Manifest,
                   cap: float | None) -> int:
    """Record the staged release in the ledger (one transaction; the cap re-checked under its lock)."""
    meta = ReleaseMeta(policy_sha256=manifest.policy_sha256, extract_sha256=manifest.extract.sha256,
                       nonce=manifest.nonce,
                       columns={p.rc.name: {"eps": float(p.rc.mechanism.epsilon), "memoized": bool(p.rc.memoize)}
                                for p in plans if p.rc.mechanism is not None})
    prepared = _prepared(charges)
    subjects, eps, memo = prepared.inputs if prepared is not None else charges.record_inputs()
    try:
        with Ledger.open(ledger_path, create=True) as led:
            return led.record_release(meta, subjects, eps, memo, lifetime_epsilon=cap,
                                      key_fingerprint=manifest.key_fingerprint, checked=charges.checked,
                                      prepared=prepared)
    finally:
        if charges.checked is not None:
            charges.checked.close()
            charges.checked = None
