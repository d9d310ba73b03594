"""The spend ledger: how much eps each subject has spent over all releases.

A ledger is one SQLite file, private to the steward (mode 0600, kept with the key).  It
holds, per release, a row in ``releases`` (time, policy and extract hashes, nonce, the eps
of each column and whether it is memoized, how many subjects were charged, a digest of the
state after it) and the eps each subject was charged in ``release_spend``; and the current
state in ``arrays``: the subject registry (every subject ever charged, in order of first
charge), each subject's running total, and for memoized columns each subject's last value.

Storage is columnar, so a release of a million people is a few numpy operations and a few
large writes, not a million SQL rows: the registry, totals and memo state are arrays stored
as blobs (split into parts of at most 32 MiB), aligned by registry index; a release's spend
is its subjects' registry indices (sorted, delta-coded) and their eps, both zlib-compressed.
The registry only grows (a release appends its new subjects); totals and the memo state of
the columns a release updates are rewritten in place of the old ones, whose pages SQLite
reuses, so the file grows per release by its spend and its new subjects only: in proportion to
the people it charges, not to everyone registered.  A new ledger has 64 KiB pages (SQLite's
largest), for these few large blobs.

Nothing raw goes in: a subject is stored only as a 16-byte keyed digest and a last value only
as a 16-byte keyed digest of (subject digest, value code), under keys derived from the release
key with labels of their own (``hashes.py``: AES-based PRFs evaluated for a whole batch at
once; schema 3).  Without the key the digests cannot be linked to identifiers; with it, anyone
can test a guess, so the ledger is as sensitive as the key.  Per-subject spend depends on the data (who appears in
which release), so the summaries ``show`` gives are for the steward only.

Integrity: releases form a hash chain.  ``row_hash`` = SHA-256 of a label, the canonical
JSON of the release row (which includes ``state_sha256``, the digest of the registry, totals
and memo state after the release), the previous ``row_hash`` and a digest of the release's
spend (registry indices and eps).  The head hash and the release count are
also kept in ``meta``, so deleting the last release is caught too.  ``verify`` recomputes
the chain and names the first broken release.  The chain catches edits that do not
recompute it (mistakes, naive edits); the current registry, totals and memo state are
checked against the last release's ``state_sha256`` and the totals against the sum of all
spend.  Every read of the current state (the release's pre-pass, its record, ``show``) checks
it against the last release's ``state_sha256`` (one digest of the arrays it reads anyway), so a
state deleted, shortened or edited after the last release is refused as damage rather than
starting people from the wrong spend.  A release's record uses the state its pre-pass read and
checked (on a read-only connection kept open for it) when nothing has been committed to the
file since: SQLite's data version of that connection, read under the write lock, tells, as
does the head hash; otherwise it reads and checks the state again under the lock.  A release may
also hand the record the new state worked out ahead on that checked state (``prepare_record``, in
the release's worker thread); it is used only on that very state, else worked out again.  Someone who
can write the file can rebuild the whole chain, so keep a copy of the head hash (``show``
prints it) somewhere else to anchor it.

Concurrency and crashes: ``record_release`` runs in one ``BEGIN IMMEDIATE`` transaction
(busy timeout 30 s) and re-checks the lifetime cap inside it (against the state as of the
lock), so two jobs cannot both pass a check and overspend, and a failure mid-record leaves
nothing (rollback).  The journal mode stays SQLite's rollback journal (write-ahead logging is
refused: ``schema.py``).

Damage: every file is checked before use (``schema.py``); one that is empty, not a ledger or
damaged is a ``LedgerDamagedError`` and is never re-created or changed.  A new ledger is built in
a hidden file beside its path and linked into place whole, only where no file exists.  Checks
and summaries (``readonly``) open the file read-only, so they write nothing.
"""

from __future__ import annotations

import contextlib
import errno
import functools
import hashlib
import json
import math
import os
import secrets
import sqlite3
import stat
import zlib
from collections.abc import Iterator, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from ..io import private_dir
from ..keys import check_nonce, shared_access
from .charges import CAP_TOLERANCE, ChargePlan, aggregate, cap_plan, check_cap
from .errors import BudgetExhaustedError, LedgerError
from .hashes import DIGEST, DIGEST_BYTES, as_digests, distinct, equal_digests, prefix64, radix_order
from .schema import (APPLICATION_ID, NOT_UTF8, READONLY_ROLLBACK, SCHEMA, SCHEMA_VERSION, check_header, check_schema,
                     damaged, sqlite_failure)

DEFAULT_NAME = "ledger.sqlite3"
BUSY_TIMEOUT_S = 30.0
GENESIS = "0" * 64
_ROW_LABEL = b"ldptransform/ledger/release-row/v2\n"
_SPEND_LABEL = b"ldptransform/ledger/subject-spend/v3\n"
SPEND_NOTE = ("data-dependent (who appears in which release): steward-only, never publish or send to "
              "partners")


PART_BYTES = 1 << 25  # largest blob part stored (32 MiB): far below SQLite's default 1e9-byte limit
PAGE_SIZE = 1 << 16  # a new ledger's page size (SQLite's largest): the state is a few large blobs
_STATE_LABEL = b"ldptransform/ledger/state/v2\n"
_REGISTRY, _TOTALS, _STATE_PREFIX = "subjects", "totals", "state:"
_ORDER = "order"  # u32 LE: the registry's sorting permutation (saves sorting it on every read)


def _spend_digest(ids: np.ndarray, eps: np.ndarray) -> bytes:
    """SHA-256 of a release's spend: its length (big-endian u64), the registry indices in index
    order (big-endian u64), then their eps (big-endian f64)."""
    h = hashlib.sha256(_SPEND_LABEL + len(ids).to_bytes(8, "big"))
    h.update(_bytes_view(np.asarray(ids).astype(">u8")))
    h.update(_bytes_view(np.asarray(eps).astype(">f8")))
    return h.digest()


def _spend_of(ids: np.ndarray, eps: np.ndarray) -> tuple[bytes, bytes, bytes]:
    """A release's spend (each charged subject's registry index and eps, in any order) as stored:
    (its digest, the indices' blob, the eps' blob), in registry order."""
    ids_sorted, eps_sorted = _by_index(ids, eps)
    return (_spend_digest(ids_sorted, eps_sorted), *_encode_spend(ids_sorted, eps_sorted))


def _encode_spend(ids: np.ndarray, eps: np.ndarray) -> tuple[bytes, bytes]:
    """(sorted registry indices, eps) -> two zlib blobs: the indices delta-coded (mostly 1s in
    a dense release, so they compress to a few bits each), the eps as they are."""
    deltas = np.diff(np.asarray(ids, dtype=np.int64), prepend=0).astype("<u8")
    return zlib.compress(deltas.tobytes(), 1), zlib.compress(np.asarray(eps, dtype="<f8").tobytes(), 1)


def _decode_spend(ids_blob: bytes, eps_blob: bytes) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of ``_encode_spend``; ValueError (or zlib.error) on damaged blobs."""
    d = zlib.decompress(ids_blob)
    e = zlib.decompress(eps_blob)
    if len(d) % 8 or len(e) % 8:
        raise ValueError("a spend blob's length is not a whole number of 8-byte values")
    ids = np.cumsum(np.frombuffer(d, dtype="<u8"), dtype=np.uint64).astype(np.int64)
    return ids, np.frombuffer(e, dtype="<f8").astype(np.float64)


_prefix64 = prefix64


class _Index:
    """Finds digests in an array of distinct digests (vectorized).  Sorting and binary search use
    the 64-bit prefix (numpy compares S16 strings several times slower), then the whole digest is
    compared; should two stored digests share a prefix (about n^2 / 2^65: one in 10^7 at 10^6
    subjects), the index falls back to sorting whole digests."""

    def __init__(self, digests: np.ndarray, order: np.ndarray | None = None) -> None:
        """``order``: the permutation that sorts the digests' prefixes, if known (the stored
        one): used when it does sort them (checked: strictly increasing), else sorted anew."""
        self.digests = digests
        self.exact = False
        self.order = np.zeros(0, dtype=np.int64)
        if len(digests) == 0:
            return
        keys = _prefix64(digests)
        if order is not None and len(order) == len(digests) and (len(order) == 0 or int(order.max()) < len(keys)):
            self.order = order.astype(np.int64)
            self.keys = keys[self.order]
            if len(self.keys) < 2 or np.all(self.keys[1:] > self.keys[:-1]):
                return
        self.order = radix_order(keys)
        self.keys = keys[self.order]
        if len(self.keys) > 1 and not np.all(self.keys[1:] > self.keys[:-1]):
            self.exact = True
            self.order = np.argsort(digests, kind="stable")
            self.keys = digests[self.order]

    def merged(self, added: np.ndarray, first: int) -> np.ndarray | None:
        """The sorting order of the registry after ``added`` (sorted, distinct and new: a
        release's new subjects) is appended at index ``first``; None if unknown (exact index)."""
        if self.exact:
            return None
        ak = _prefix64(added)
        if len(ak) > 1 and not np.all(ak[1:] > ak[:-1]):
            return None
        base = self.order if len(self.digests) else np.zeros(0, dtype=np.int64)
        at = np.searchsorted(self.keys, ak) if len(self.digests) else np.zeros(len(ak), dtype=np.int64)
        return np.insert(base, at, np.arange(first, first + len(ak), dtype=np.int64))

    def find(self, q: np.ndarray) -> np.ndarray:
        """Position in ``digests`` of each query digest, -1 where absent."""
        out = np.full(len(q), -1, dtype=np.int64)
        n = len(self.digests)
        if n == 0 or len(q) == 0:
            return out
        qk = q if self.exact else _prefix64(q)
        if self.exact or len(qk) < 2 or np.all(qk[1:] >= qk[:-1]):  # already in order (a release's subjects)
            pos = np.searchsorted(self.keys, qk)
        else:
            # queries in order of their top 16 bits (one counting sort, linear time): the binary
            # searches then walk the table nearly in order (uniform digests: about n / 65536 stored
            # digests per bucket), as fast as for fully sorted queries; the answers do not depend on it
            qo = np.argsort((qk >> np.uint64(48)).astype(np.uint16), kind="stable")
            pos = np.empty(len(q), dtype=np.int64)
            pos[qo] = np.searchsorted(self.keys, qk[qo])
        pos = np.minimum(pos, n - 1)
        cand = self.order[pos]
        hit = self.keys[pos] == qk
        if hit.all():  # every query's prefix is stored (a night of people already registered): no masks
            same = equal_digests(self.digests[cand], q)
            return cand if same.all() else np.where(same, cand, -1)
        hit[hit] = equal_digests(self.digests[cand[hit]], q[hit])
        out[hit] = cand[hit]
        return out


def _prepare(snap: _Snapshot, first: bool, subject_hashes: Any, per_subject_eps: Any,
             memo_updates: Mapping[str, tuple[Any, Any]] | None) -> PreparedRecord:
    uniq, eps = aggregate(as_digests(subject_hashes), per_subject_eps)
    marked = {col: {"memoized": True} for col in (memo_updates or {})}  # the record checks them against its meta
    memo_pos = _memo_positions(marked, memo_updates, uniq)
    return _prepared_on(snap, first, (subject_hashes, per_subject_eps, memo_updates), uniq, eps, memo_pos)


def _prepared_on(snap: _Snapshot, first: bool, inputs: tuple[Any, Any, Any], uniq: np.ndarray, eps: np.ndarray,
                 memo_pos: list[tuple[str, np.ndarray, np.ndarray]]) -> PreparedRecord:
    """The record of the distinct subjects ``uniq`` (charged ``eps``) with memo positions ``memo_pos``
    on the state ``snap``: the one way both ``prepare_record`` and ``record_release`` work it out."""
    idx = snap.find(uniq)
    ids = _registry_ids(idx, len(snap.digests))
    # the spend's encoding (zlib and hashlib leave Python's lock) beside the new state and its digest
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="ldpt-ledger-spend") as pool:
        spend = pool.submit(_spend_of, ids, eps)
        new, _, added = _next_state(snap, idx, uniq, eps, memo_pos)
        arrays = new.arrays()
        state_sha = _state_digest(arrays)
        return PreparedRecord(snap, first, inputs, uniq, eps, idx, [col for col, _, _ in memo_pos], new, ids, added,
                              arrays, state_sha, spend.result())


def _registry_ids(idx: np.ndarray, n_old: int) -> np.ndarray:
    """Each charged subject's registry index after the release: its place (``idx``), or for a new
    subject (-1) the next free index, in the order given (``_next_state`` appends them so)."""
    known = idx >= 0
    if known.all():
        return idx
    ids = idx.copy()
    ids[~known] = n_old + np.arange(int((~known).sum()))
    return ids


@dataclass
class PreparedRecord:
    """A record worked out ahead by ``Ledger.prepare_record`` on one checked state."""

    snap: _Snapshot
    first: bool                   # prepared on the empty state of a ledger not made yet
    inputs: tuple[Any, Any, Any]  # (subject hashes, eps, memo updates) it was made of: matched by identity
    uniq: np.ndarray
    eps: np.ndarray
    idx: np.ndarray
    memo_cols: list[str]
    new: _Snapshot
    ids: np.ndarray
    added: np.ndarray
    arrays: dict[str, memoryview]
    state_sha256: str
    spend: tuple[bytes, bytes, bytes]

    def made_of(self, subject_hashes: Any, per_subject_eps: Any, memo_updates: Any) -> bool:
        a, b, c = self.inputs
        return a is subject_hashes and b is per_subject_eps and c is memo_updates

    def fits(self, snap: _Snapshot, memo_cols: list[str]) -> bool:
        """Prepared on ``snap`` (the state under the record's lock), for these memoized columns."""
        if memo_cols != self.memo_cols:
            return False
        if self.first:
            return snap.head == GENESIS and len(snap.digests) == 0 and len(snap.totals) == 0 and not snap.states
        return self.snap is snap


def _distinct_known(index: _Index, h: np.ndarray, row_pos: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``Ledger.distinct_rows`` on the registry ``index``: the subjects found (``row_pos`` >= 0)
    in byte order by marking them in the registry's sorting order (linear time, no sort); the new
    ones sorted among themselves and merged in.  Two different digests that share a 64-bit prefix
    (about n^2 / 2^65) fall back to ``distinct`` of every row."""
    n_reg = len(index.digests)
    known = row_pos >= 0
    mark = np.zeros(n_reg, dtype=bool)
    mark[row_pos[known]] = True
    sel = index.order[mark[index.order]]  # registry positions of the subjects found, in byte order
    rank = np.empty(n_reg, dtype=np.int64)
    if known.all():
        rank[sel] = np.arange(len(sel), dtype=np.int64)
        return index.digests[sel], rank[row_pos], sel
    if index.exact:
        return _distinct_fallback(index, h)
    new_u, new_inv = distinct(h[~known])
    kk, kn = _prefix64(index.digests[sel]), _prefix64(new_u)
    at = np.searchsorted(kk, kn)
    if len(kk) and (kk[np.minimum(at, len(kk) - 1)] == kn).any():  # a new digest shares a stored prefix
        return _distinct_fallback(index, h)
    # merged like np.insert(known, at, new): known i lands at i + #(at <= i), new j at at[j] + j
    fk = np.arange(len(sel), dtype=np.int64) + np.searchsorted(at, np.arange(len(sel)), side="right")
    fn = at + np.arange(len(new_u), dtype=np.int64)
    total = len(sel) + len(new_u)
    uniq = np.empty(total, dtype=DIGEST)
    uniq[fk] = index.digests[sel]
    uniq[fn] = new_u
    pos = np.full(total, -1, dtype=np.int64)
    pos[fk] = sel
    rank[sel] = fk
    inv = np.empty(len(h), dtype=np.int64)
    inv[known] = rank[row_pos[known]]
    inv[~known] = fn[new_inv]
    return uniq, inv, pos


def _distinct_fallback(index: _Index, h: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    uniq, inv = distinct(h)
    return uniq, inv, index.find(uniq)


@dataclass
class _Snapshot:
    """The registry, totals and memo state as of release ``head`` (arrays never changed in place)."""

    head: str
    digests: np.ndarray
    totals: np.ndarray
    states: dict[str, np.ndarray]
    order: np.ndarray | None = None  # the permutation that sorts the registry's 64-bit prefixes
    found: tuple[np.ndarray, np.ndarray] | None = field(init=False, repr=False, default=None)
    _padded: dict[str, np.ndarray] = field(init=False, repr=False, default_factory=dict)

    @functools.cached_property
    def index(self) -> _Index:
        """The registry's search index, built when first needed (a state read to be checked builds
        it at once, ``Ledger._load``; the state a record leaves may never be searched)."""
        return _Index(self.digests, self.order)

    def find(self, q: np.ndarray) -> np.ndarray:
        """``index.find``, or the answer already found for the very same array of digests."""
        if self.found is not None:
            h, pos = self.found
            if h is q or (len(h) == len(q) and h.dtype == q.dtype and q.ctypes.data == h.ctypes.data):
                return pos
        return self.index.find(q)

    def state(self, column: str) -> np.ndarray:
        """A column's last-value digests padded with zero digests to the registry's length
        (padded once per snapshot: the pre-pass asks for it in every batch)."""
        st = self._padded.get(column)
        if st is None:
            st = self.states.get(column, np.zeros(0, dtype=DIGEST))
            if len(st) < len(self.digests):
                st = np.concatenate([st, np.zeros(len(self.digests) - len(st), dtype=DIGEST)])
            self._padded[column] = st
        return st

    def arrays(self) -> dict[str, memoryview]:
        """The stored form of each array, as views of the arrays' memory (no copies)."""
        out = {_REGISTRY: _bytes_view(self.digests), _TOTALS: _bytes_view(np.asarray(self.totals, dtype="<f8"))}
        if self.order is not None:
            out[_ORDER] = _bytes_view(np.asarray(self.order, dtype="<u4"))
        out.update({_STATE_PREFIX + c: _bytes_view(v) for c, v in self.states.items()})
        return out


def _bytes_view(a: np.ndarray) -> memoryview:
    return np.ascontiguousarray(a).view(np.uint8).reshape(-1).data


def _state_digest(arrays: Mapping[str, bytes | memoryview]) -> str:
    """SHA-256 over the stored arrays (name, length, bytes), names in sorted order."""
    h = hashlib.sha256(_STATE_LABEL)
    for name in sorted(arrays):
        data = arrays[name]
        h.update(name.encode("utf-8") + b"\0" + len(data).to_bytes(8, "big"))
        h.update(data)
    return h.hexdigest()


def _state_fits(stored: Mapping[str, bytes | memoryview], expected: str) -> bool:
    """The stored arrays are the state of digest ``expected`` (a release that charged nobody
    stores its empty registry and totals as no parts at all: either form fits; the second
    digest is only taken when the first does not fit)."""
    return _state_digest(stored) == expected or (
        not (_REGISTRY in stored and _TOTALS in stored)
        and _state_digest({_REGISTRY: b"", _TOTALS: b"", **stored}) == expected)


def _row_hash(row: Mapping[str, Any], prev_hash: str, spend_digest: bytes) -> str:
    try:
        cols = json.loads(row["columns"])
    except (TypeError, ValueError):
        cols = {"<unparseable>": str(row["columns"])}
    body = {"id": row["id"], "time": row["time"], "policy_sha256": row["policy_sha256"],
            "extract_sha256": row["extract_sha256"], "nonce": row["nonce"], "columns": cols,
            "subjects_charged": row["subjects_charged"], "lifetime_epsilon": row["lifetime_epsilon"],
            "state_sha256": row["state_sha256"]}
    canon = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)
    try:
        prev = bytes.fromhex(prev_hash)
    except (TypeError, ValueError):
        prev = str(prev_hash).encode("utf-8", "replace")
    return hashlib.sha256(_ROW_LABEL + canon.encode("ascii") + b"\n" + prev + spend_digest).hexdigest()


# -- the release's public facts ------------------------------------------------------------

@dataclass
class ReleaseMeta:
    """What the ledger keeps about a release (all of it already public in the manifest but
    the per-column memoized flag).  ``columns``: name -> eps, or name -> {"eps", "memoized"}."""

    policy_sha256: str
    extract_sha256: str
    nonce: str
    columns: Mapping[str, Any]
    time: str | None = None

    def normalized_columns(self) -> dict[str, dict[str, Any]]:
        if not isinstance(self.columns, Mapping) or not self.columns:
            raise LedgerError("release meta: 'columns' must name at least one privatized column with its eps.")
        out: dict[str, dict[str, Any]] = {}
        for name, v in self.columns.items():
            eps, memo = (v.get("eps"), v.get("memoized", False)) if isinstance(v, Mapping) else (v, False)
            if isinstance(eps, bool) or not isinstance(eps, (int, float)) or not math.isfinite(eps) or eps <= 0:
                raise LedgerError(f"release meta: column {name!r} needs a finite eps > 0.")
            if not isinstance(memo, bool):
                raise LedgerError(f"release meta: column {name!r}: 'memoized' must be true or false.")
            out[str(name)] = {"eps": float(eps), "memoized": memo}
        return out


_ROW_TYPES: dict[str, tuple[type, ...]] = {
    "id": (int,), "time": (str,), "policy_sha256": (str,), "extract_sha256": (str,), "nonce": (str,),
    "columns": (str,), "subjects_charged": (int,), "lifetime_epsilon": (float, int, type(None)),
    "state_sha256": (str,), "prev_hash": (str,), "row_hash": (str,)}


def _row_types_ok(row: Mapping[str, Any]) -> bool:
    """The values of a release row (those given) have the types a ledger writes (SQLite keeps
    whatever type a hand edit stores, whatever the column's declared type)."""
    return all(isinstance(v, _ROW_TYPES[k]) and not isinstance(v, bool) for k, v in row.items())


def _check_sha(v: str, what: str) -> str:
    if not isinstance(v, str) or len(v) != 64 or any(c not in "0123456789abcdef" for c in v.lower()):
        raise LedgerError(f"release meta: {what} must be 64 hex characters (the SHA-256 in the manifest).")
    return v.lower()


def _utc_now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


@dataclass
class VerifyResult:
    ok: bool
    releases: int
    first_broken: int | None = None
    detail: str = "chain intact"
    head: str = GENESIS

    def as_dict(self) -> dict[str, Any]:
        return {"ok": self.ok, "releases": self.releases, "first_broken": self.first_broken,
                "detail": self.detail, "head": self.head}


def _release_row(meta: ReleaseMeta | Mapping[str, Any], lifetime_epsilon: float | None
                 ) -> tuple[dict[str, Any], dict[str, dict[str, Any]]]:
    """A release's row (all but id, subjects_charged and state digest), checked; and its columns."""
    if not isinstance(meta, ReleaseMeta):
        given = {str(k): v for k, v in dict(meta).items()}
        needed = ("policy_sha256", "extract_sha256", "nonce", "columns")
        unknown = sorted(set(given) - {*needed, "time"})
        missing = [n for n in needed if n not in given]
        if unknown or missing:
            wrong = ([f"unknown field(s) {', '.join(unknown)}"] if unknown else []) + (
                [f"missing field(s) {', '.join(missing)}"] if missing else [])
            raise LedgerError(f"release meta: {'; '.join(wrong)}. Give policy_sha256, extract_sha256, nonce, "
                              "columns (and optionally time).")
        meta = ReleaseMeta(**given)
    cols = meta.normalized_columns()
    row = {"policy_sha256": _check_sha(meta.policy_sha256, "policy_sha256"),
           "extract_sha256": _check_sha(meta.extract_sha256, "extract_sha256"),
           "nonce": check_nonce(meta.nonce, "release meta: nonce"),
           "columns": json.dumps(cols, sort_keys=True, separators=(",", ":")),
           "lifetime_epsilon": None if lifetime_epsilon is None else float(lifetime_epsilon), "time": meta.time}
    return row, cols


def _memo_positions(cols: dict[str, dict[str, Any]], memo_updates: Mapping[str, tuple[Any, Any]] | None,
                    uniq: np.ndarray) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """Memo updates checked, as (column, position among the charged subjects, value hash);
    a subject given twice: its last value wins."""
    memo: list[tuple[str, np.ndarray, np.ndarray]] = []
    for col, (sh, vh) in (memo_updates or {}).items():
        if col not in cols or not cols[col]["memoized"]:
            raise LedgerError(f"memo update for column {col!r}, which the release meta does not mark as "
                              "memoized. Mark it {'memoized': true} in columns, or drop the update.")
        sh, vh = as_digests(sh), as_digests(vh, f"value hashes of column {col!r}")
        if len(sh) != len(vh):
            raise LedgerError(f"memo update for column {col!r}: {len(sh)} subject hashes but {len(vh)} value "
                              "hashes; give one value hash per subject.")
        memo.append((col, sh, vh))
    uniq_index: _Index | None = None
    out = []
    for col, sh, vh in memo:
        if _same_digests(sh, uniq):  # one value per charged subject, in order
            out.append((col, np.arange(len(uniq), dtype=np.int64), vh))
            continue
        uniq_index = uniq_index or _Index(uniq)
        pos = uniq_index.find(sh)
        if (pos < 0).any():
            raise LedgerError(f"memo update for column {col!r}: {int((pos < 0).sum())} subject(s) are not among "
                              "the release's charged subjects; a memoized value is only recorded for a subject "
                              "this release charges.")
        if len(pos) and np.bincount(pos, minlength=len(uniq)).max() <= 1:  # no subject given twice
            out.append((col, pos, vh))
            continue
        rev = np.unique(pos[::-1], return_index=True)[1]  # a repeated subject: its last value wins
        keep = len(pos) - 1 - rev
        out.append((col, pos[keep], vh[keep]))
    return out


def _by_index(ids: np.ndarray, eps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A release's spend in registry order: its distinct registry indices sorted, with their eps
    (by marking the indices when they are dense in the registry: no sort)."""
    if len(ids) == 0:
        return ids.astype(np.int64), np.asarray(eps, dtype=np.float64)
    size = int(ids.max()) + 1
    if size > 8 * len(ids):
        order = np.argsort(ids, kind="stable")
        return ids[order], eps[order]
    at = np.full(size, -1, dtype=np.int64)
    at[ids] = np.arange(len(ids), dtype=np.int64)
    ids_sorted = np.flatnonzero(at >= 0)
    return ids_sorted, np.asarray(eps, dtype=np.float64)[at[ids_sorted]]


def _same_digests(a: np.ndarray, b: np.ndarray) -> bool:
    """Two S16 arrays hold the same digests in the same order (no copies)."""
    if len(a) != len(b):
        return False
    return a.ctypes.data == b.ctypes.data or bool(equal_digests(a, b).all())


def _next_state(snap: _Snapshot, idx: np.ndarray, uniq: np.ndarray, eps: np.ndarray,
                memo_pos: list[tuple[str, np.ndarray, np.ndarray]]) -> tuple[_Snapshot, np.ndarray, np.ndarray]:
    """The state after a release: new subjects appended to the registry in digest order, totals
    and memo state updated.  Returns (new state, registry index of each charged subject, added digests)."""
    known = idx >= 0
    n_old, n_new = len(snap.digests), int((~known).sum())
    ids = _registry_ids(idx, n_old)
    added = uniq[~known]
    totals = np.concatenate([snap.totals, np.zeros(n_new)])
    totals[ids] += eps
    states = dict(snap.states)
    for col, pos, vh in memo_pos:
        st = snap.state(col)
        st = np.concatenate([st, np.zeros(n_new, dtype=DIGEST)]) if n_new else st.copy()
        st[ids[pos]] = vh
        states[col] = st
    order = snap.order  # as stored: rewritten only with the registry
    if n_new:
        order = snap.index.merged(added, n_old)
        if order is not None and len(order) >= 1 << 32:
            order = None  # not stored beyond u32 indices: sorted on every read instead
    digests = np.concatenate([snap.digests, added]) if n_new else snap.digests
    return _Snapshot("", digests, totals, states, order), ids, added


def _init_file(path: Path) -> None:
    """Write a new, empty ledger into the empty file ``path`` (one transaction)."""
    conn = sqlite3.connect(str(path), timeout=BUSY_TIMEOUT_S, isolation_level=None)
    try:
        conn.execute(f"PRAGMA page_size = {PAGE_SIZE}")  # before the first table: large pages for large blobs
        conn.execute("BEGIN IMMEDIATE")
        for stmt in SCHEMA:
            conn.execute(stmt)
        conn.executemany("INSERT INTO meta VALUES (?, ?)", [
            ("schema_version", str(SCHEMA_VERSION)), ("created", _utc_now()), ("head", GENESIS),
            ("release_count", "0")])
        conn.execute(f"PRAGMA application_id = {APPLICATION_ID}")
        conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        conn.execute("COMMIT")
    finally:
        conn.close()


_NO_HARD_LINKS = {errno.EPERM, errno.EOPNOTSUPP, errno.ENOTSUP, errno.ENOSYS}


def _place(made: Path, path: Path) -> None:
    """Put the complete ledger ``made`` at ``path`` unless a file is there by now (another job
    made the ledger first: theirs is kept).  A hard link, so ``path`` appears complete at once;
    on a file system without hard links, the bytes are written into a new file there."""
    try:
        os.link(made, path)
        return
    except FileExistsError:
        return
    except OSError as err:
        if err.errno not in _NO_HARD_LINKS:
            raise
    data = made.read_bytes()
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
    except BaseException:
        path.unlink(missing_ok=True)  # made by this call a moment ago, and never a ledger: nothing is lost
        raise


def _create(path: Path) -> None:
    """Make a new ledger at ``path``, where nothing existed a moment ago.  It is built in a hidden
    file beside ``path`` and then put in place whole, so that nobody (another job, or anyone after
    a crash) ever finds an empty or half-made ledger there; an existing file is never made into a
    ledger (an empty one is reported as damaged: it may be a truncated ledger)."""
    made = path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}.new")
    try:
        os.close(os.open(made, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
        try:
            _init_file(made)
            _place(made, path)
        finally:
            made.unlink(missing_ok=True)
    except sqlite3.Error as err:
        raise sqlite_failure(path, err, recording=True) from None
    except OSError as err:
        why = "permission denied" if isinstance(err, PermissionError) else (err.strerror or "failed").lower()
        raise LedgerError(f"cannot create ledger {path} ({why}). Check that the steward's account may write to "
                          f"folder {path.parent} and that its disk has space.") from None


def _not_text(path: Path, *, recording: bool = False) -> LedgerError:
    return damaged(path, NOT_UTF8, recording=recording)


def _end_read(c: sqlite3.Connection) -> None:
    if c.in_transaction:
        with contextlib.suppress(sqlite3.Error):  # ends a read: nothing to lose
            c.execute("COMMIT")


def _uri(path: Path, mode: str) -> str:
    return f"{path.resolve().as_uri()}?mode={mode}"


def _undo_stopped_write(path: Path) -> None:
    """SQLite's own recovery: a writer's connection that reads the ledger rolls back the write a
    stopped job left in its journal, restoring the ledger as of its last recorded release."""
    conn = sqlite3.connect(_uri(path, "rw"), uri=True, timeout=BUSY_TIMEOUT_S, isolation_level=None)
    try:
        conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
    finally:
        conn.close()


# -- the ledger ---------------------------------------------------------------------------

class Ledger:
    """A steward's spend ledger (one SQLite file).  Open with ``Ledger.open(path)``."""

    def __init__(self, path: Path, conn: sqlite3.Connection, readonly: bool = False) -> None:
        self.path = path
        self.readonly = readonly
        self._conn = conn
        self._snap: _Snapshot | None = None  # cached state, valid while the head is unchanged
        self._version: int | None = None  # SQLite's data version when the cached state was read
        try:
            st = os.stat(path)
            self._ident: tuple[int, int] | None = (st.st_dev, st.st_ino)
        except OSError:
            self._ident = None

    # opening ---------------------------------------------------------------------------

    @classmethod
    def open(cls, path: Path | str, *, create: bool = True, readonly: bool = False) -> Ledger:
        """The ledger at ``path``, checked before use (ledger/schema.py: a file that is empty, not
        a ledger or damaged is a ``LedgerDamagedError``, and is left as it is).  ``create``: make a
        new ledger if nothing exists at ``path`` (never in an existing file, even an empty one).
        ``readonly``: for checks and summaries; SQLite opens the file read-only, so nothing (not
        even a journal file) is written; implies no ``create``."""
        path = Path(path)
        try:
            st = path.stat()
        except FileNotFoundError:
            if path.is_symlink():
                raise LedgerError(f"ledger {path} is a symbolic link to a file that does not exist. Point --ledger at "
                                  "the ledger itself, or restore the file the link points to.") from None
            if readonly or not create:
                raise LedgerError(f"no ledger at {path}. A ledger is made by the first release that records "
                                  "to it; check --ledger (default: ledger.sqlite3 in the private folder, "
                                  "$LDPT_PRIVATE_DIR).") from None
            if not path.parent.is_dir():
                raise LedgerError(f"cannot create ledger {path}: folder {path.parent} does not exist. Create it "
                                  "first (private to the steward, like the key).") from None
            _create(path)
            st = path.stat()
        except OSError as err:  # a folder on the way that is a file, or that this account may not search
            why = "permission denied" if isinstance(err, PermissionError) else (err.strerror or "failed").lower()
            raise LedgerError(f"cannot look up ledger {path} ({why}). Check the path and that the steward's account "
                              "may read its folder.") from None
        if not stat.S_ISREG(st.st_mode):
            raise LedgerError(f"ledger {path} is not a regular file. Point --ledger at a ledger file.")
        check_header(path)  # before the permission hint: a file that is no ledger gets no chmod advice
        open_to = shared_access(st)
        if open_to:
            raise LedgerError(
                f"ledger {path} can be read or written by other users ({open_to}). "
                f"The ledger is steward-only data (per-subject spend depends on the data): run "
                f"`chmod 600 {path}`.")
        return cls._connect(path, readonly)

    @classmethod
    def _connect(cls, path: Path, readonly: bool) -> Ledger:
        """Connect and check the schema.  A read-only connection that finds the journal of a write
        that a stopped job left unfinished lets SQLite undo that write first (as the next writer's
        connection would), then connects again."""
        try:
            return cls._connect_once(path, readonly)
        except sqlite3.Error as err:
            if not (readonly and getattr(err, "sqlite_errorcode", None) == READONLY_ROLLBACK):
                raise sqlite_failure(path, err) from None
        try:
            _undo_stopped_write(path)
            return cls._connect_once(path, readonly)
        except sqlite3.Error as err:
            raise sqlite_failure(path, err) from None

    @classmethod
    def _connect_once(cls, path: Path, readonly: bool) -> Ledger:
        # mode=rw: SQLite never creates the file (it may have gone since it was checked)
        # a read-only ledger may be read by a release's worker thread (release/charges.py), one
        # thread at a time: the release waits for the worker before it uses the ledger itself
        conn = sqlite3.connect(_uri(path, "ro" if readonly else "rw"), uri=True, timeout=BUSY_TIMEOUT_S,
                               isolation_level=None, check_same_thread=not readonly)
        led = cls(path, conn, readonly)
        try:
            led._check()
        except BaseException:
            conn.close()
            raise
        return led

    def _check(self) -> None:
        c = self._conn
        try:  # a text SQLite hands back (the schema's own included) may hold bytes changed on disk
            c.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_S * 1000)}")
            c.execute("PRAGMA cache_size = -131072")  # 128 MiB of page cache: 1M-subject releases
            c.execute("PRAGMA temp_store = MEMORY")
            c.execute("BEGIN")
            try:
                check_schema(c, self.path)
            finally:
                _end_read(c)
        except UnicodeDecodeError:
            raise _not_text(self.path) from None

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # reading ---------------------------------------------------------------------------

    @contextlib.contextmanager
    def _reading(self) -> Iterator[sqlite3.Connection]:
        """One read transaction (a consistent view); SQLite's failures told in plain words."""
        c = self._conn
        try:
            c.execute("BEGIN")
            try:
                yield c
            finally:
                _end_read(c)
        except sqlite3.Error as err:
            raise sqlite_failure(self.path, err) from None
        except UnicodeDecodeError:
            raise _not_text(self.path) from None

    def _get(self, name: str) -> bytes:
        parts = [r[0] for r in self._conn.execute("SELECT data FROM arrays WHERE name = ? ORDER BY part", (name,))]
        if not all(isinstance(p, bytes) for p in parts):
            raise damaged(self.path, "its current state (arrays) holds values that are not binary data")
        return b"".join(parts)

    def _head(self) -> str:
        row = self._conn.execute("SELECT value FROM meta WHERE name = 'head'").fetchone()
        if row is None or not isinstance(row[0], str):
            raise damaged(self.path, "its header table (meta) has no head hash")
        return str(row[0])

    def _load(self) -> _Snapshot:
        """The current state (call inside a transaction); cached while the head hash is unchanged."""
        c = self._conn
        head = self._head()
        if self._snap is not None and self._snap.head == head:
            return self._snap
        names = [r[0] for r in c.execute("SELECT DISTINCT name FROM arrays")]
        if not all(isinstance(n, str) for n in names):
            raise damaged(self.path, "its current state (arrays) holds an array whose name is not a text")
        reg, tot = self._get(_REGISTRY), self._get(_TOTALS)
        if len(reg) % DIGEST_BYTES or len(tot) != len(reg) // DIGEST_BYTES * 8:
            raise damaged(self.path, "its subject registry and running totals do not fit together (`ldpt ledger "
                          "verify` says more)")
        states = {}
        stored = {n: v for n, v in ((_REGISTRY, reg), (_TOTALS, tot)) if n in names}
        for name in names:
            if name.startswith(_STATE_PREFIX):
                data = self._get(name)
                if len(data) % DIGEST_BYTES or len(data) > len(reg):
                    raise damaged(self.path, f"the memo state of column {name[len(_STATE_PREFIX):]!r} does not fit "
                                  "the registry (`ldpt ledger verify` says more)")
                states[name[len(_STATE_PREFIX):]] = np.frombuffer(data, dtype=DIGEST)
                stored[name] = data
            if name not in stored:
                stored[name] = self._get(name)
            if name == _ORDER and len(stored[name]) != len(reg) // DIGEST_BYTES * 4:
                raise damaged(self.path, "the sorting order of its subject registry does not fit the registry "
                              "(`ldpt ledger verify` says more)")
        self._check_state_fits(stored)
        self._version = int(c.execute("PRAGMA data_version").fetchone()[0])
        # as stored (part of the state digest); the index uses it only if it does sort the registry
        order = np.frombuffer(stored[_ORDER], dtype="<u4") if _ORDER in stored else None
        self._snap = _Snapshot(head, np.frombuffer(reg, dtype=DIGEST), np.frombuffer(tot, dtype="<f8").astype(
            np.float64), states, order)
        _ = self._snap.index  # built here, with the check (in the release's worker thread)
        return self._snap

    def _check_state_fits(self, stored: Mapping[str, bytes]) -> None:
        """The current state is the one the last stored release recorded (its ``state_sha256``; no
        release: the empty state): a state deleted, shortened or edited after it would start people
        from the wrong spend.  One query and one digest of the arrays just read."""
        last = self._conn.execute("SELECT id, state_sha256 FROM releases ORDER BY id DESC LIMIT 1").fetchone()
        if last is not None and not isinstance(last[1], str):
            raise damaged(self.path, f"the row of release {last[0]} holds a value of the wrong type (`ldpt ledger "
                          "verify` says more)")
        if _state_fits(stored, _state_digest({}) if last is None else last[1]):
            return
        if last is not None and not stored:
            what = (f"its current state (subject registry, running totals, memo state) is gone, although it records "
                    f"{last[0]} release(s): it was deleted after the last release")
        else:
            what = ("its current state (subject registry, running totals, memo state) is not the one its last "
                    "release recorded: it was changed, shortened or deleted after it")
        raise damaged(self.path, what + " (`ldpt ledger verify` says more)")

    def _read(self) -> _Snapshot:
        with self._reading():
            return self._load()

    def check_state(self) -> None:
        """Read the current state and check that it is the one the last release recorded (a
        ``LedgerDamagedError`` if not); a release calls this before it charges anyone."""
        self._read()

    def spent(self, subject_hashes: Any) -> np.ndarray:
        """Eps each subject has been charged so far (0 for subjects never charged)."""
        h = as_digests(subject_hashes)
        snap = self._read()
        idx = snap.index.find(h)
        return np.where(idx >= 0, snap.totals[np.maximum(idx, 0)] if len(snap.totals) else 0.0, 0.0)

    def positions(self, subject_hashes: Any) -> np.ndarray:
        """Each subject's place in the registry (-1 for subjects never charged), to look up
        several memoized columns of the same subjects with one search (``last_values``)."""
        h = as_digests(subject_hashes)
        snap = self._read()
        pos = snap.index.find(h)
        snap.found = (h, pos)  # a record that reuses this state finds the same subjects without a search
        return pos

    def row_positions(self, subject_hashes: Any) -> np.ndarray:
        """Each digest's place in the registry (-1 for subjects never charged), for the digests of
        input rows as they come (any order, repeats allowed); nothing is remembered for the record
        (``distinct_rows`` does that, from these positions)."""
        return self._read().index.find(as_digests(subject_hashes))

    def distinct_rows(self, subject_hashes: Any, row_pos: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``hashes.distinct`` of input rows' digests whose registry positions ``row_positions``
        gave: (the distinct digests in byte order, the place of each row among them, the registry
        position of each distinct digest, -1 if new).  The registry's stored sorting order gives
        the byte order of the subjects already registered, so only the new ones are sorted (none
        on a night of people already registered).  The positions are remembered for the record,
        like ``positions``."""
        h = as_digests(subject_hashes)
        snap = self._read()
        row_pos = np.asarray(row_pos, dtype=np.int64)
        uniq, inv, pos = _distinct_known(snap.index, h, row_pos)
        snap.found = (uniq, pos)
        return uniq, inv, pos

    def last_values(self, column: str, subject_hashes: Any, positions: np.ndarray | None = None) -> np.ndarray:
        """Keyed hash of each subject's last value of a memoized column (all-zero digest if none).
        ``positions``: from ``positions`` for the same subjects (saves the search)."""
        h = as_digests(subject_hashes)
        snap = self._read()
        out = np.zeros(len(h), dtype=DIGEST)
        if column not in snap.states:
            return out
        idx = snap.index.find(h) if positions is None else np.asarray(positions)
        hit = idx >= 0
        if hit.all():
            return snap.state(column)[idx]
        out[hit] = snap.state(column)[idx[hit]]
        return out

    def release_spend(self, release_id: int) -> tuple[np.ndarray, np.ndarray]:
        """(subject hashes, eps) charged by one release, in registry order (steward-only data)."""
        with self._reading() as c:
            row = c.execute("SELECT subject_ids, eps FROM release_spend WHERE release_id = ?",
                            (int(release_id),)).fetchone()
            if row is None:
                raise LedgerError(f"ledger {self.path} has no release {release_id}; `ldpt ledger show` lists them.")
            digests = self._load().digests
            try:
                ids, eps = _decode_spend(*row)
                if len(ids) != len(eps) or (len(ids) and (ids.min() < 0 or ids.max() >= len(digests))):
                    raise ValueError("the spend does not fit the registry")
            except (ValueError, TypeError, zlib.error):
                raise damaged(self.path, f"the spend of release {int(release_id)} is damaged (`ldpt ledger verify` "
                              "says more)") from None
            return digests[ids], eps

    def charge_plan(self, subject_hashes: Any, per_subject_eps: Any, lifetime_epsilon: float) -> ChargePlan:
        """What charging this release would do: (over_count, max_overshoot, within_mask).

        ``within_mask[i]`` is True if subject i (as given, repeats included) stays within
        ``lifetime_epsilon`` after this release; repeats of a subject are charged together.
        A plan is advisory: ``record_release`` checks again under the write lock."""
        check_cap(lifetime_epsilon)
        h = as_digests(subject_hashes)
        uniq, add = aggregate(h, per_subject_eps)
        plan = cap_plan(self.spent(uniq), add, lifetime_epsilon)
        pos = np.searchsorted(uniq, h)
        return ChargePlan(plan.over_count, plan.max_overshoot, plan.within_mask[pos])

    # writing ---------------------------------------------------------------------------

    def _bind_key(self, stored: str | None, given: str) -> None:
        if stored is not None and stored != given:
            raise LedgerError(
                f"ledger {self.path} belongs to another key (fingerprint {stored[:16]}..., this release's key "
                f"{given[:16]}...). Subjects are kept only as hashes under the key, so a release under another key "
                "would start everyone from zero spend. Use the key this ledger was made with, or a new ledger for "
                "the new key (and count the old ledger's spend by hand).")

    def check_key(self, key_fingerprint: str) -> None:
        """Refuse a key other than the one this ledger's subjects are hashed under (read-only)."""
        with self._reading() as c:
            row = c.execute("SELECT value FROM meta WHERE name = 'key_fingerprint'").fetchone()
        self._bind_key(row[0] if row else None, key_fingerprint)

    def prepare_record(self, subject_hashes: Any, per_subject_eps: Any,
                       memo_updates: Mapping[str, tuple[Any, Any]] | None = None) -> PreparedRecord:
        """Work out ahead, on the state this (read-only) ledger read and checked, what
        ``record_release`` of these very arguments would store: the new registry, totals and memo
        state, their digest and the encoded spend.  Reads nothing from the file (a release's worker
        thread runs it while the release writes).  The record uses it only if, under its write lock,
        the state is still that one (``checked``) and it is given the same objects."""
        if self._snap is None:
            raise LedgerError(f"ledger {self.path}: prepare_record needs a state read and checked first "
                              "(check_state).")
        return _prepare(self._snap, False, subject_hashes, per_subject_eps, memo_updates)

    @staticmethod
    def prepare_first_record(subject_hashes: Any, per_subject_eps: Any,
                             memo_updates: Mapping[str, tuple[Any, Any]] | None = None) -> PreparedRecord:
        """``prepare_record`` for the first release of a ledger not made yet (on the empty state):
        used by a record that finds the ledger without any release under its lock."""
        empty = _Snapshot(GENESIS, np.zeros(0, dtype=DIGEST), np.zeros(0), {})
        return _prepare(empty, True, subject_hashes, per_subject_eps, memo_updates)

    def record_release(self, meta: ReleaseMeta | Mapping[str, Any], subject_hashes: Any, per_subject_eps: Any,
                       memo_updates: Mapping[str, tuple[Any, Any]] | None = None, *,
                       lifetime_epsilon: float | None = None, key_fingerprint: str | None = None,
                       checked: Ledger | None = None, prepared: PreparedRecord | None = None) -> int:
        """Record one release in one transaction; returns its id.

        ``memo_updates``: memoized column -> (subject hashes, value hashes from ``value_hashes``).
        With ``lifetime_epsilon`` the cap is checked under the write lock, and the whole
        release is refused (``BudgetExhaustedError``, nothing written) if any subject would
        go over it.  ``checked``: a ledger opened (read-only) on the same file whose current
        state was read and checked before (the release's pre-pass); if no job has written the
        file since (SQLite's data version of that connection, checked under the write lock) and
        the head is the same, that state is used rather than read and checked again.  ``prepared``
        (``prepare_record`` of these very arguments on ``checked``): used when that state is the
        one under the lock, so the record only writes."""
        row, cols = _release_row(meta, lifetime_epsilon)
        check_cap(lifetime_epsilon)
        ready = prepared if prepared is not None and prepared.made_of(subject_hashes, per_subject_eps,
                                                                      memo_updates) else None
        uniq, eps = (ready.uniq, ready.eps) if ready is not None else aggregate(as_digests(subject_hashes),
                                                                                 per_subject_eps)
        memo_pos = _memo_positions(cols, memo_updates, uniq)
        if self.readonly:
            raise LedgerError(f"ledger {self.path} was opened read-only (for a check); open it with "
                              "Ledger.open(path) to record a release.")
        c = self._conn
        try:
            self._begin_write()
            try:
                # under the lock: nobody can record between this read and the commit
                snap = self._unchanged(checked) or self._load()
                memo_cols = [col for col, _, _ in memo_pos]
                if ready is not None and not ready.fits(snap, memo_cols):
                    ready = None  # prepared on another state (a job recorded since): worked out again
                if ready is None:
                    ready = _prepared_on(snap, False, (subject_hashes, per_subject_eps, memo_updates), uniq, eps,
                                         memo_pos)
                self._check_cap_locked(snap, ready.idx, eps, lifetime_epsilon)
                head, rid = self._head_for(key_fingerprint)
                new, state_sha, spend = ready.new, ready.state_sha256, ready.spend
                self._write_state(ready.arrays, ready.added, memo_cols)
                row = {**row, "id": rid, "time": row["time"] or _utc_now(), "subjects_charged": len(uniq),
                       "state_sha256": state_sha}
                row_hash = self._write_row(row, head, spend)
                c.execute("COMMIT")
            except BaseException:
                self._snap = None
                if c.in_transaction:
                    with contextlib.suppress(sqlite3.Error):  # SQLite undoes the write itself if this fails
                        c.execute("ROLLBACK")
                raise
        except sqlite3.Error as err:
            raise sqlite_failure(self.path, err, recording=True) from None
        except UnicodeDecodeError:
            raise _not_text(self.path, recording=True) from None
        new.head = row_hash
        self._snap = new
        return rid

    def _unchanged(self, checked: Ledger | None) -> _Snapshot | None:
        """The state ``checked`` read, if the file is still the one it read (same file, no commit
        by any connection since, same head); else None.  Call under the write lock."""
        if checked is None or checked is self or checked._snap is None or checked._version is None:
            return None
        if self._ident is None or checked._ident != self._ident:
            return None
        try:
            version = int(checked._conn.execute("PRAGMA data_version").fetchone()[0])
        except sqlite3.Error:
            return None
        if version != checked._version or checked._snap.head != self._head():
            return None
        return checked._snap

    def _begin_write(self) -> None:
        try:
            self._conn.execute("BEGIN IMMEDIATE")  # the write lock: waits up to BUSY_TIMEOUT_S for another job
        except sqlite3.OperationalError as err:
            if getattr(err, "sqlite_errorcode", 0) & 0xFF not in (5, 6):  # SQLITE_BUSY, SQLITE_LOCKED
                raise
            raise LedgerError(f"ledger {self.path}: could not take the write lock within {BUSY_TIMEOUT_S:g} s; "
                              "another job is recording. Nothing was recorded: run the release again when it has "
                              "finished.") from None

    def _check_cap_locked(self, snap: _Snapshot, idx: np.ndarray, eps: np.ndarray, cap: float | None) -> None:
        """Refuse the whole release if any subject would go over the lifetime eps (under the lock)."""
        if cap is None:
            return
        known = idx >= 0
        spent = np.zeros(len(idx))
        spent[known] = snap.totals[idx[known]]
        plan = cap_plan(spent, eps, cap)
        if plan.over_count:
            raise BudgetExhaustedError(
                f"ledger {self.path}: recording this release would take {plan.over_count} subject(s) over "
                f"the lifetime eps {cap:g} (by up to {plan.max_overshoot:.6g}); nothing was "
                "recorded. Leave those subjects out of the release (Ledger.charge_plan gives a mask), "
                "lower the release's eps, or raise the lifetime budget in the policy if that is "
                "justified.")

    def _head_for(self, key_fingerprint: str | None) -> tuple[str, int]:
        """The chain's head and the new release's id; binds the ledger to the key on first use."""
        c = self._conn
        meta_now = dict(c.execute("SELECT name, value FROM meta"))
        head, count = meta_now.get("head"), meta_now.get("release_count")
        last = c.execute("SELECT id, row_hash FROM releases ORDER BY id DESC LIMIT 1").fetchone()  # the last rowid
        if (head, count) != ((GENESIS, "0") if last is None else (last[1], str(last[0]))):
            raise damaged(self.path, "its head hash and release count do not match its last stored release (`ldpt "
                          "ledger verify` says where its chain breaks)", recording=True)
        if key_fingerprint is not None:
            self._bind_key(meta_now.get("key_fingerprint"), key_fingerprint)
            if "key_fingerprint" not in meta_now:
                c.execute("INSERT INTO meta VALUES ('key_fingerprint', ?)", (key_fingerprint,))
        return str(head), int(str(count)) + 1

    def _write_row(self, row: dict[str, Any], head: str, spend: tuple[bytes, bytes, bytes]) -> str:
        """Insert the release row and its spend (``_spend_of``), move the head; returns the row hash."""
        c = self._conn
        spend_digest, ids_blob, eps_blob = spend
        row_hash = _row_hash(row, head, spend_digest)
        c.execute("INSERT INTO releases VALUES (:id, :time, :policy_sha256, :extract_sha256, :nonce, :columns, "
                  ":subjects_charged, :lifetime_epsilon, :state_sha256, :prev_hash, :row_hash)",
                  {**row, "prev_hash": head, "row_hash": row_hash})
        c.execute("INSERT INTO release_spend VALUES (?, ?, ?)", (row["id"], ids_blob, eps_blob))
        c.executemany("UPDATE meta SET value = ? WHERE name = ?",
                      [(row_hash, "head"), (str(row["id"]), "release_count")])
        return row_hash

    def _write_state(self, arrays: Mapping[str, bytes | memoryview], added: np.ndarray, memo_cols: list[str]) -> None:
        """Store the new state: the registry's new subjects (appended) and its sorting order, the
        totals and the memo state of the columns the release updates."""
        if len(added):
            self._append(_REGISTRY, _bytes_view(added))
            if _ORDER in arrays:
                self._put(_ORDER, arrays[_ORDER])
            else:
                self._conn.execute("DELETE FROM arrays WHERE name = ?", (_ORDER,))
        self._put(_TOTALS, arrays[_TOTALS])
        for col in memo_cols:
            self._put(_STATE_PREFIX + col, arrays[_STATE_PREFIX + col])

    def _put(self, name: str, data: bytes | memoryview) -> None:
        """Replace a stored array (in parts of at most PART_BYTES).  When its stored parts have the
        new parts' sizes (totals and memo state on a night without new subjects), they are
        overwritten where they are (SQLite's incremental blob writes, in the same transaction):
        no pages freed and allocated again."""
        c = self._conn
        spans = [(o, min(len(data), o + PART_BYTES)) for o in range(0, len(data), PART_BYTES)]
        stored = c.execute("SELECT rowid, length(data) FROM arrays WHERE name = ? ORDER BY part", (name,)).fetchall()
        if stored and len(stored) == len(spans) and all(size == e - o for (_, size), (o, e) in zip(stored, spans)):
            for (rowid, _), (o, e) in zip(stored, spans):
                with c.blobopen("arrays", "data", rowid) as blob:
                    blob.write(data[o:e])
            return
        c.execute("DELETE FROM arrays WHERE name = ?", (name,))
        c.executemany("INSERT INTO arrays VALUES (?, ?, ?)",
                      [(name, i, data[o:o + PART_BYTES]) for i, o in enumerate(range(0, len(data), PART_BYTES))])

    def _append(self, name: str, data: bytes | memoryview) -> None:
        """Add parts at the end of a stored array (the registry only grows)."""
        c = self._conn
        first = c.execute("SELECT coalesce(max(part) + 1, 0) FROM arrays WHERE name = ?", (name,)).fetchone()[0]
        c.executemany("INSERT INTO arrays VALUES (?, ?, ?)",
                      [(name, first + i, data[o:o + PART_BYTES])
                       for i, o in enumerate(range(0, len(data), PART_BYTES))])

    # checking and summarizing -----------------------------------------------------------

    def verify(self) -> VerifyResult:
        """Recompute the hash chain, then check the current state against the last release's
        state digest and the totals against the sum of all spend; names the first broken release."""
        with self._reading() as c:
            meta = dict(c.execute("SELECT name, value FROM meta"))
            names = ("id", "time", "policy_sha256", "extract_sha256", "nonce", "columns", "subjects_charged",
                     "lifetime_epsilon", "state_sha256", "prev_hash", "row_hash")
            rows = c.execute(f"SELECT {', '.join(names)} FROM releases ORDER BY id").fetchall()
            names_stored = [name for (name,) in c.execute("SELECT DISTINCT name FROM arrays")]
            if not all(isinstance(name, str) for name in names_stored):
                raise damaged(self.path, "its current state (arrays) holds an array whose name is not a text")
            arrays = {name: self._get(name) for name in names_stored}
            n_reg = len(arrays.get(_REGISTRY, b"")) // DIGEST_BYTES
            acc = np.zeros(n_reg)
            prev = GENESIS
            for n, values in enumerate(rows, start=1):
                r = dict(zip(names, values))
                broken, spend = self._check_link(r, n, prev, n_reg)
                if broken is not None:
                    return VerifyResult(False, len(rows), broken[0], broken[1], prev)
                prev = r["row_hash"]
                acc[spend[0]] += spend[1]
            if meta.get("head") != prev or meta.get("release_count") != str(len(rows)):
                return VerifyResult(False, len(rows), len(rows) + 1,
                                    f"the ledger's head records {meta.get('release_count')} release(s) but "
                                    f"{len(rows)} are stored: a release at the end was deleted or added", prev)
            orphans = c.execute("SELECT count(*) FROM release_spend WHERE release_id NOT IN "
                                "(SELECT id FROM releases)").fetchone()[0]
            if orphans:
                return VerifyResult(False, len(rows), None, f"{orphans} spend record(s) belong to no release", prev)
            expected_state = rows[-1][names.index("state_sha256")] if rows else _state_digest({})
            if not _state_fits(arrays, expected_state):
                return VerifyResult(False, len(rows), None, "the subject registry, running totals or memo state "
                                    "differ from what the last release recorded (edited after it)", prev)
            totals = np.frombuffer(arrays.get(_TOTALS, b""), dtype="<f8")
            if len(totals) != n_reg or not np.allclose(acc, totals, rtol=CAP_TOLERANCE, atol=CAP_TOLERANCE):
                return VerifyResult(False, len(rows), None, "the per-subject running totals do not match the sum of "
                                    "the recorded spend", prev)
            return VerifyResult(True, len(rows), None, f"chain intact over {len(rows)} release(s)", prev)

    def _check_link(self, r: dict[str, Any], n: int, prev: str, n_reg: int
                    ) -> tuple[tuple[int, str] | None, tuple[np.ndarray, np.ndarray]]:
        """Release ``n`` of the chain: ((its id, what is broken) or None, its spend (registry indices, eps))."""
        rid = r["id"]
        none = (np.zeros(0, dtype=np.int64), np.zeros(0))
        if not _row_types_ok(r):
            return (n, f"release {n}: its row holds a value of the wrong type (changed by hand)"), none
        if rid != n:
            return (n, f"release {n} is missing (the next stored id is {rid}): a release was deleted or inserted"), none
        if r["prev_hash"] != prev:
            why = (f"release {rid} does not link to release {rid - 1} (prev_hash differs): a release before it was "
                   "changed, deleted or inserted")
            return (rid, why), none
        spend = self._conn.execute("SELECT subject_ids, eps FROM release_spend WHERE release_id = ?",
                                   (rid,)).fetchone()
        try:
            if spend is None:
                raise ValueError("missing")
            ids, e = _decode_spend(*spend)
            ok = len(ids) == len(e) and (len(ids) == 0 or (ids[0] >= 0 and ids[-1] < n_reg
                                                            and np.all(np.diff(ids) > 0)))
        except (ValueError, TypeError, zlib.error):
            ok = False
        if not ok:
            return (rid, f"release {rid}: its spend is missing or damaged"), none
        if len(ids) != r["subjects_charged"]:
            return (rid, f"release {rid}: {len(ids)} subjects in its spend, but the release says "
                         f"{r['subjects_charged']}"), none
        try:
            expected = _row_hash(r, r["prev_hash"], _spend_digest(ids, e))
        except (TypeError, ValueError):
            expected = None
        if expected != r["row_hash"]:
            return (rid, f"release {rid}: its row or its spend was changed after it was recorded "
                         "(row_hash differs)"), none
        return None, (ids, e)

    def spend_totals(self) -> np.ndarray:
        """Total eps of every subject in the ledger (registry order; no identifiers)."""
        return self._read().totals

    def show(self, lifetime_epsilon: float | None = None) -> dict[str, Any]:
        """A summary for the steward.  The spend figures depend on the data: steward-only."""
        with self._reading() as c:
            rel = c.execute("SELECT id, time, columns, subjects_charged, lifetime_epsilon FROM releases "
                            "ORDER BY id").fetchall()
            head = self._head()
            totals = self._load().totals
        for rid, t, cols, n, cap in rel:
            if not _row_types_ok({"id": rid, "time": t, "columns": cols, "subjects_charged": n,
                                  "lifetime_epsilon": cap}):
                raise damaged(self.path, f"the row of release {rid} holds a value of the wrong type (`ldpt ledger "
                              "verify` says more)")
        releases = []
        eps_sum = 0.0
        for rid, t, cols, n, cap in rel:
            try:
                ce = sum(float(v["eps"]) for v in json.loads(cols).values())
            except (TypeError, ValueError, KeyError, AttributeError):
                ce = float("nan")
            eps_sum += ce
            releases.append({"id": rid, "time": t, "eps_per_row": ce, "subjects_charged": n,
                             "lifetime_epsilon": cap})
        if lifetime_epsilon is None and rel:
            lifetime_epsilon = next((r[4] for r in reversed(rel) if r[4] is not None), None)
        out: dict[str, Any] = {
            "ledger": str(self.path), "schema_version": SCHEMA_VERSION, "releases": len(rel), "head": head,
            "eps_per_row_summed_over_releases": eps_sum, "release_list": releases,
            "subjects": len(totals), "steward_only": SPEND_NOTE,
        }
        if len(totals):
            qs = [0.0, 0.5, 0.9, 0.99, 1.0]
            out["spend_quantiles"] = {f"{q:g}": float(v) for q, v in zip(qs, np.quantile(totals, qs))}
        if lifetime_epsilon is not None and len(totals):
            cap = float(lifetime_epsilon)
            out["lifetime_epsilon"] = cap
            out["near_cap"] = {f">={int(f * 100)}%": int((totals >= f * cap * (1 - CAP_TOLERANCE)).sum())
                               for f in (0.5, 0.75, 0.9, 1.0)}
            out["least_remaining_eps"] = float(max(cap - totals.max(), 0.0))
        return out




def default_ledger_path() -> Path:
    return private_dir() / DEFAULT_NAME
