"""The privacy ledger: how much eps each subject has spent over all releases.

A ledger is one SQLite file, private to the steward (mode 0600, kept with the key).  It
holds, per release, a row in ``releases`` (time, policy and extract hashes, nonce, the eps
of each column and whether it is memoized, how many subjects were charged), the eps each
subject was charged in ``subject_spend``, and for memoized columns the last value each
subject reported in ``subject_state``.

Nothing raw goes in: a subject is stored only as HMAC-SHA256 under a sub-key of the
release key with its own label ("ledger", "subject-hash/v1"), and a last value only as
HMAC-SHA256 under a per-column sub-key ("ledger", "value-hash/v1", column).  Without the
key the hashes cannot be linked to identifiers; with it, anyone can test a guess, so the
ledger is as sensitive as the key.  Per-subject spend depends on the data (who appears in
which release), so the summaries ``show`` gives are for the steward only.

Integrity: releases form a hash chain.  ``row_hash`` = SHA-256 of a label, the canonical
JSON of the release row, the previous ``row_hash`` and a digest of the release's
``subject_spend`` rows (sorted by subject hash).  The head hash and the release count are
also kept in ``meta``, so deleting the last release is caught too.  ``verify`` recomputes
the chain and names the first broken release.  The chain catches edits that do not
recompute it (mistakes, naive edits); someone who can write the file can rebuild the whole
chain, so keep a copy of the head hash (``show`` prints it) somewhere else to anchor it.

Concurrency and crashes: ``record_release`` runs in one ``BEGIN IMMEDIATE`` transaction
(busy timeout 30 s) and re-checks the lifetime cap inside it, so two jobs cannot both pass
a check and overspend, and a failure mid-record leaves nothing (rollback).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import sqlite3
import stat
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import LdptError
from .keys import SecretKey, check_nonce

SCHEMA_VERSION = 1
APPLICATION_ID = 0x4C445450  # "LDTP": marks a SQLite file as an ldptransform ledger
DEFAULT_NAME = "ledger.sqlite3"
BUSY_TIMEOUT_S = 30.0
GENESIS = "0" * 64
CAP_TOLERANCE = 1e-9  # relative slack on the cap for floating-point sums (0.1 + 0.2 > 0.3)
_ROW_LABEL = b"ldptransform/ledger/release-row/v1\n"
_SPEND_LABEL = b"ldptransform/ledger/subject-spend/v1\n"
_SUBJECT_LABELS = ("ledger", "subject-hash/v1")
_VALUE_LABELS = ("ledger", "value-hash/v1")
DIGEST = np.dtype("S32")
SPEND_NOTE = ("data-dependent (who appears in which release): steward-only, never publish or send to "
              "partners")

_SCHEMA = [
    "CREATE TABLE IF NOT EXISTS meta (name TEXT PRIMARY KEY, value TEXT NOT NULL)",
    """CREATE TABLE IF NOT EXISTS releases (
        id INTEGER PRIMARY KEY,
        time TEXT NOT NULL,
        policy_sha256 TEXT NOT NULL,
        extract_sha256 TEXT NOT NULL,
        nonce TEXT NOT NULL,
        columns TEXT NOT NULL,
        subjects_charged INTEGER NOT NULL,
        lifetime_epsilon REAL,
        prev_hash TEXT NOT NULL,
        row_hash TEXT NOT NULL)""",
    """CREATE TABLE IF NOT EXISTS subject_spend (
        release_id INTEGER NOT NULL,
        subject_hash BLOB NOT NULL,
        eps REAL NOT NULL,
        PRIMARY KEY (release_id, subject_hash)) WITHOUT ROWID""",
    # running total per subject (a cache of SUM(eps) over subject_spend; verify checks it)
    """CREATE TABLE IF NOT EXISTS subject_total (
        subject_hash BLOB PRIMARY KEY,
        eps REAL NOT NULL) WITHOUT ROWID""",
    """CREATE TABLE IF NOT EXISTS subject_state (
        subject_hash BLOB NOT NULL,
        column TEXT NOT NULL,
        last_value_hash BLOB NOT NULL,
        updated_release INTEGER NOT NULL,
        PRIMARY KEY (subject_hash, column)) WITHOUT ROWID""",
]


class LedgerError(LdptError):
    """The ledger file is missing, not a ledger, unsafe, or the call does not fit it."""


class BudgetExhaustedError(LedgerError):
    """Recording a release would take some subjects over their lifetime eps."""


# -- hashing of subjects and values --------------------------------------------------------

def _encode_values(values: Any, what: str) -> list[bytes]:
    """Values as UTF-8 bytes of their text form (42 and "42" are the same subject)."""
    if isinstance(values, (pa.ChunkedArray, pa.Array)):
        arr = values
    else:
        arr = pa.array(np.asarray(values).tolist() if isinstance(values, np.ndarray) and values.dtype.kind in "SV"
                       else values)
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    nulls = arr.null_count
    if nulls:
        raise LedgerError(f"{what}: {nulls} value(s) are missing. Every row charged to the ledger needs a "
                          "subject identifier: fill or drop those rows before the release.")
    if pa.types.is_binary(arr.type) or pa.types.is_large_binary(arr.type):
        return arr.to_pylist()
    if pa.types.is_floating(arr.type):
        raise LedgerError(f"{what}: identifiers are floating-point numbers (type {arr.type}); their text form "
                          "is ambiguous. Read the identifier column as text or whole numbers.")
    try:
        text = pc.cast(arr, pa.string()) if not pa.types.is_string(arr.type) else arr
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        raise LedgerError(f"{what}: values of type {arr.type} cannot be used as identifiers; use text or "
                          "whole numbers.") from None
    return [s.encode("utf-8") for s in text.to_pylist()]


def _hmac_all(subkey: bytes, encoded: list[bytes]) -> np.ndarray:
    """HMAC-SHA256(subkey, v) for every v (RFC 2104).  One hash per value cannot be vectorized in
    numpy; the key pads are hashed once and their SHA-256 states copied per value, which we
    measured at about 2.4x the speed of calling hmac.digest per value."""
    padded = subkey.ljust(64, b"\0")  # a 32-byte key: no pre-hashing (RFC 2104)
    inner = hashlib.sha256(bytes(b ^ 0x36 for b in padded)).copy
    outer = hashlib.sha256(bytes(b ^ 0x5C for b in padded)).copy

    def one(v: bytes) -> bytes:
        i = inner()
        i.update(v)
        o = outer()
        o.update(i.digest())
        return o.digest()

    joined = b"".join([one(v) for v in encoded])
    return np.frombuffer(joined, dtype=DIGEST) if joined else np.zeros(0, dtype=DIGEST)


def subject_hashes(key: SecretKey, subject_values: Any) -> np.ndarray:
    """Keyed hashes of subject identifiers: an array of dtype S32 (32-byte digests).

    Use ``arr.tobytes()`` (or ``as_digests``) rather than indexing single elements: numpy
    drops trailing zero bytes when it hands out one S32 element.
    """
    return _hmac_all(key.subkey(*_SUBJECT_LABELS), _encode_values(subject_values, "subject identifiers"))


def value_hashes(key: SecretKey, column: str, values: Any) -> np.ndarray:
    """Keyed hashes of a memoized column's values (per-column sub-key), dtype S32."""
    return _hmac_all(key.subkey(*_VALUE_LABELS, column), _encode_values(values, f"values of column {column!r}"))


def memo_value_hashes(key: SecretKey, column: str, context: bytes, subject_h: np.ndarray,
                      codes: np.ndarray) -> np.ndarray:
    """Keyed hashes of (subject, value code) for a memoized column, dtype S32: HMAC-SHA256 under a
    per-column sub-key that also binds ``context`` (the column's memo context: mechanism spec and
    grid), of the subject's keyed hash followed by the code as 8 big-endian bytes.  The subject is
    in the message so that two subjects with the same value do not share a hash (no equality
    classes, hence no frequency analysis, in the ledger); a changed mechanism or grid gives
    another hash, so the next release is charged, as its randomness is fresh."""
    h = as_digests(subject_h)
    rec = np.empty(len(h), dtype=[("h", DIGEST), ("c", ">i8")])
    rec["h"] = h
    rec["c"] = np.asarray(codes, dtype=np.int64)
    msgs = rec.view(np.dtype((np.void, 40))).tolist() if len(h) else []
    return _hmac_all(key.subkey(*_VALUE_LABELS, column, b"memo-context", context), msgs)


def as_digests(h: Any, what: str = "subject hashes") -> np.ndarray:
    """Accept S32 / V32 arrays, (n, 32) uint8 arrays or a list of 32-byte strings; return contiguous S32."""
    if isinstance(h, (list, tuple)):
        if any(not isinstance(x, (bytes, bytearray)) or len(x) != 32 for x in h):
            raise LedgerError(f"{what} must be 32-byte digests from ledger.subject_hashes.")
        return np.frombuffer(b"".join(h), dtype=DIGEST) if h else np.zeros(0, dtype=DIGEST)
    a = np.asarray(h)
    if a.dtype.kind in "SV" and a.dtype.itemsize == 32 and a.ndim == 1:
        return np.ascontiguousarray(a).view(DIGEST)
    if a.dtype == np.uint8 and a.ndim == 2 and a.shape[1] == 32:
        return np.ascontiguousarray(a).view(DIGEST).reshape(-1)
    raise LedgerError(f"{what} must be 32-byte digests from ledger.subject_hashes (got an array of dtype "
                      f"{a.dtype} and shape {a.shape}).")


def _blobs(h: np.ndarray) -> list[bytes]:
    raw = h.tobytes()
    return [raw[i:i + 32] for i in range(0, len(raw), 32)]


def _spend_digest(hashes: np.ndarray, eps: np.ndarray) -> bytes:
    """SHA-256 of (subject hash, eps as big-endian float64) pairs sorted by subject hash."""
    order = np.argsort(hashes, kind="stable")
    rec = np.empty(len(hashes), dtype=[("h", DIGEST), ("e", ">f8")])
    rec["h"] = hashes[order]
    rec["e"] = eps[order]
    return hashlib.sha256(_SPEND_LABEL + rec.tobytes()).digest()


def _row_hash(row: Mapping[str, Any], prev_hash: str, spend_digest: bytes) -> str:
    try:
        cols = json.loads(row["columns"])
    except (TypeError, ValueError):
        cols = {"<unparseable>": str(row["columns"])}
    body = {"id": row["id"], "time": row["time"], "policy_sha256": row["policy_sha256"],
            "extract_sha256": row["extract_sha256"], "nonce": row["nonce"], "columns": cols,
            "subjects_charged": row["subjects_charged"], "lifetime_epsilon": row["lifetime_epsilon"]}
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


def _check_sha(v: str, what: str) -> str:
    if not isinstance(v, str) or len(v) != 64 or any(c not in "0123456789abcdef" for c in v.lower()):
        raise LedgerError(f"release meta: {what} must be 64 hex characters (the SHA-256 in the manifest).")
    return v.lower()


def _utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


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


@dataclass
class ChargePlan:
    over_count: int
    max_overshoot: float
    within_mask: np.ndarray = field(repr=False)

    def __iter__(self):  # unpacks as (over_count, max_overshoot, within_mask)
        return iter((self.over_count, self.max_overshoot, self.within_mask))


# -- the ledger ---------------------------------------------------------------------------

class Ledger:
    """A steward's privacy ledger (one SQLite file).  Open with ``Ledger.open(path)``."""

    def __init__(self, path: Path, conn: sqlite3.Connection) -> None:
        self.path = path
        self._conn = conn

    # opening ---------------------------------------------------------------------------

    @classmethod
    def open(cls, path: Path | str, *, create: bool = True) -> "Ledger":
        path = Path(path)
        try:
            st = path.stat()
        except FileNotFoundError:
            if not create:
                raise LedgerError(f"no ledger at {path}. A ledger is made by the first release that records "
                                  "to it; check --ledger (default: ledger.sqlite3 in the private folder, "
                                  "$LDPT_PRIVATE_DIR).") from None
            if not path.parent.is_dir():
                raise LedgerError(f"cannot create ledger {path}: folder {path.parent} does not exist. Create it "
                                  "first (private to the steward, like the key).")
            try:
                os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
            except FileExistsError:
                pass  # another job created it at the same moment: fine, initialization is idempotent
            st = path.stat()
        if not stat.S_ISREG(st.st_mode):
            raise LedgerError(f"ledger {path} is not a regular file. Point --ledger at a ledger file.")
        if st.st_mode & 0o077:
            raise LedgerError(
                f"ledger {path} can be read or written by other users (mode {stat.S_IMODE(st.st_mode):04o}). "
                f"The ledger is steward-only data (per-subject spend depends on the data): run "
                f"`chmod 600 {path}`.")
        try:
            conn = sqlite3.connect(str(path), timeout=BUSY_TIMEOUT_S, isolation_level=None)
        except sqlite3.Error as err:
            raise LedgerError(f"cannot open ledger {path}: {err}. Check the path and permissions.") from None
        led = cls(path, conn)
        try:
            led._init_or_check()
        except BaseException:
            conn.close()
            raise
        return led

    def _init_or_check(self) -> None:
        c = self._conn
        not_ledger = (f"{self.path} is not an ldptransform ledger (it is not a SQLite file made by ldpt, or it "
                      "was written by something else). Point --ledger at a ledger, or at a path that does not "
                      "exist yet to start a new one; never reuse another file.")
        try:
            c.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_S * 1000)}")
            c.execute("PRAGMA cache_size = -131072")  # 128 MiB of page cache: 1M-subject releases
            c.execute("PRAGMA temp_store = MEMORY")
            app_id = c.execute("PRAGMA application_id").fetchone()[0]
            version = c.execute("PRAGMA user_version").fetchone()[0]
            if app_id == 0 and version == 0:
                has_tables = c.execute("SELECT count(*) FROM sqlite_master").fetchone()[0]
                if has_tables:
                    raise LedgerError(not_ledger)
                c.execute("BEGIN IMMEDIATE")
                try:  # re-read under the write lock: another job may have initialized it meanwhile
                    if c.execute("PRAGMA application_id").fetchone()[0] == 0:
                        for stmt in _SCHEMA:
                            c.execute(stmt)
                        c.executemany("INSERT INTO meta VALUES (?, ?)", [
                            ("schema_version", str(SCHEMA_VERSION)), ("created", _utc_now()),
                            ("head", GENESIS), ("release_count", "0")])
                        c.execute(f"PRAGMA application_id = {APPLICATION_ID}")
                        c.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
                    c.execute("COMMIT")
                except BaseException:
                    c.execute("ROLLBACK")
                    raise
                app_id, version = APPLICATION_ID, SCHEMA_VERSION
        except sqlite3.OperationalError as err:
            raise LedgerError(f"cannot open ledger {self.path}: {err}. If another job holds it for more than "
                              f"{BUSY_TIMEOUT_S:g} s, try again when it has finished.") from None
        except sqlite3.DatabaseError:
            raise LedgerError(not_ledger) from None
        if app_id != APPLICATION_ID:
            raise LedgerError(not_ledger)
        if version != SCHEMA_VERSION:
            raise LedgerError(f"ledger {self.path} has schema version {version}; this ldptransform reads version "
                              f"{SCHEMA_VERSION}. Use the ldptransform version that wrote it.")

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # reading ---------------------------------------------------------------------------

    def _totals(self) -> tuple[np.ndarray, np.ndarray]:
        """All (subject hash, total eps) pairs, sorted by hash (numpy and SQLite both order bytes as memcmp)."""
        rows = self._conn.execute("SELECT subject_hash, eps FROM subject_total ORDER BY subject_hash").fetchall()
        if not rows:
            return np.zeros(0, dtype=DIGEST), np.zeros(0, dtype=np.float64)
        h = np.frombuffer(b"".join([r[0] for r in rows]), dtype=DIGEST)
        e = np.fromiter((r[1] for r in rows), dtype=np.float64, count=len(rows))
        if len(h) > 1 and not np.all(h[1:] > h[:-1]):
            order = np.argsort(h, kind="stable")
            h, e = h[order], e[order]
        return h, e

    def _spent_in(self, hashes: np.ndarray) -> np.ndarray:
        th, te = self._totals()
        out = np.zeros(len(hashes), dtype=np.float64)
        if len(th) == 0 or len(hashes) == 0:
            return out
        pos = np.minimum(np.searchsorted(th, hashes), len(th) - 1)
        hit = th[pos] == hashes
        out[hit] = te[pos[hit]]
        return out

    def spent(self, subject_hashes: Any) -> np.ndarray:
        """Eps each subject has been charged so far (0 for subjects never charged)."""
        h = as_digests(subject_hashes)
        c = self._conn
        c.execute("BEGIN")
        try:
            return self._spent_in(h)
        finally:
            c.execute("COMMIT")

    def last_values(self, column: str, subject_hashes: Any) -> np.ndarray:
        """Keyed hash of each subject's last value of a memoized column (all-zero digest if none)."""
        h = as_digests(subject_hashes)
        c = self._conn
        out = np.zeros(len(h), dtype=DIGEST)
        if len(h) == 0:
            return out
        c.execute("BEGIN")
        try:
            c.execute("CREATE TEMP TABLE IF NOT EXISTS ledger_query (i INTEGER PRIMARY KEY, h BLOB NOT NULL)")
            c.execute("DELETE FROM ledger_query")
            c.executemany("INSERT INTO ledger_query VALUES (?, ?)", enumerate(_blobs(h)))
            rows = c.execute("SELECT q.i, s.last_value_hash FROM ledger_query q JOIN subject_state s "
                             "ON s.subject_hash = q.h AND s.column = ?", (column,)).fetchall()
            c.execute("DELETE FROM ledger_query")
        finally:
            c.execute("COMMIT")
        if rows:
            idx = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
            out[idx] = np.frombuffer(b"".join(r[1] for r in rows), dtype=DIGEST)
        return out

    @staticmethod
    def _aggregate(h: np.ndarray, per_subject_eps: Any) -> tuple[np.ndarray, np.ndarray]:
        """One entry per distinct subject; a subject with several rows is charged their sum."""
        eps = np.broadcast_to(np.asarray(per_subject_eps, dtype=np.float64), h.shape)
        if not np.all(np.isfinite(eps)) or np.any(eps < 0):
            raise LedgerError("per-subject eps must be finite and >= 0 (the eps each subject's rows use in this "
                              "release).")
        uniq, inv = np.unique(h, return_inverse=True)
        return uniq, np.bincount(inv.reshape(-1), weights=eps, minlength=len(uniq))

    @staticmethod
    def _plan(spent: np.ndarray, add: np.ndarray, cap: float) -> ChargePlan:
        total = spent + add
        within = total <= cap * (1 + CAP_TOLERANCE)
        over = int((~within).sum())
        overshoot = float((total - cap).max()) if over else 0.0
        return ChargePlan(over, max(overshoot, 0.0), within)

    @staticmethod
    def _check_cap(cap: float | None) -> None:
        if cap is not None and (isinstance(cap, bool) or not math.isfinite(cap) or cap <= 0):
            raise LedgerError("lifetime_epsilon must be a finite number > 0 (the eps a subject may spend over all "
                              "releases).")

    def charge_plan(self, subject_hashes: Any, per_subject_eps: Any, lifetime_epsilon: float) -> ChargePlan:
        """What charging this release would do: (over_count, max_overshoot, within_mask).

        ``within_mask[i]`` is True if subject i (as given, repeats included) stays within
        ``lifetime_epsilon`` after this release; repeats of a subject are charged together.
        A plan is advisory: ``record_release`` checks again under the write lock."""
        self._check_cap(lifetime_epsilon)
        h = as_digests(subject_hashes)
        uniq, add = self._aggregate(h, per_subject_eps)
        plan = self._plan(self.spent(uniq), add, lifetime_epsilon)
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
        row = self._conn.execute("SELECT value FROM meta WHERE name = 'key_fingerprint'").fetchone()
        self._bind_key(row[0] if row else None, key_fingerprint)

    def record_release(self, meta: ReleaseMeta | Mapping[str, Any], subject_hashes: Any, per_subject_eps: Any,
                       memo_updates: Mapping[str, tuple[Any, Any]] | None = None, *,
                       lifetime_epsilon: float | None = None, key_fingerprint: str | None = None) -> int:
        """Record one release in one transaction; returns its id.

        ``memo_updates``: memoized column -> (subject hashes, value hashes from ``value_hashes``).
        With ``lifetime_epsilon`` the cap is checked under the write lock, and the whole
        release is refused (``BudgetExhaustedError``, nothing written) if any subject would
        go over it."""
        if not isinstance(meta, ReleaseMeta):
            try:
                meta = ReleaseMeta(**dict(meta))
            except TypeError as err:
                raise LedgerError(f"release meta: {err}. Give policy_sha256, extract_sha256, nonce, columns "
                                  "(and optionally time).") from None
        cols = meta.normalized_columns()
        policy_sha = _check_sha(meta.policy_sha256, "policy_sha256")
        extract_sha = _check_sha(meta.extract_sha256, "extract_sha256")
        nonce = check_nonce(meta.nonce, "release meta: nonce")
        self._check_cap(lifetime_epsilon)
        uniq, eps = self._aggregate(as_digests(subject_hashes), per_subject_eps)
        memo: list[tuple[str, np.ndarray, np.ndarray]] = []
        for col, (sh, vh) in (memo_updates or {}).items():
            if col not in cols or not cols[col]["memoized"]:
                raise LedgerError(f"memo update for column {col!r}, which the release meta does not mark as "
                                  "memoized. Mark it {'memoized': true} in columns, or drop the update.")
            sh, vh = as_digests(sh), as_digests(vh, f"value hashes of column {col!r}")
            if len(sh) != len(vh):
                raise LedgerError(f"memo update for column {col!r}: {len(sh)} subject hashes but {len(vh)} value "
                                  "hashes; give one value hash per subject.")
            order = np.argsort(sh, kind="stable")  # B-tree writes in key order; a repeated subject: last wins
            sh, vh = sh[order], vh[order]
            memo.append((col, sh, vh))
        columns_json = json.dumps(cols, sort_keys=True, separators=(",", ":"))
        c = self._conn
        try:
            c.execute("BEGIN IMMEDIATE")  # the write lock: waits up to BUSY_TIMEOUT_S for another job
        except sqlite3.OperationalError as err:
            raise LedgerError(f"ledger {self.path}: could not take the write lock ({err}) within "
                              f"{BUSY_TIMEOUT_S:g} s; another job is recording. Nothing was recorded: run the "
                              "release again when it has finished.") from None
        try:
            if lifetime_epsilon is not None:
                plan = self._plan(self._spent_in(uniq), eps, lifetime_epsilon)
                if plan.over_count:
                    raise BudgetExhaustedError(
                        f"ledger {self.path}: recording this release would take {plan.over_count} subject(s) over "
                        f"the lifetime eps {lifetime_epsilon:g} (by up to {plan.max_overshoot:.6g}); nothing was "
                        "recorded. Leave those subjects out of the release (Ledger.charge_plan gives a mask), "
                        "lower the release's eps, or raise the lifetime budget in the policy if that is "
                        "justified.")
            meta_now = dict(c.execute("SELECT name, value FROM meta"))
            if key_fingerprint is not None:
                self._bind_key(meta_now.get("key_fingerprint"), key_fingerprint)
                if "key_fingerprint" not in meta_now:
                    c.execute("INSERT INTO meta VALUES ('key_fingerprint', ?)", (key_fingerprint,))
            head, count = meta_now["head"], meta_now["release_count"]
            rid = int(count) + 1
            row = {"id": rid, "time": meta.time or _utc_now(), "policy_sha256": policy_sha,
                   "extract_sha256": extract_sha, "nonce": nonce, "columns": columns_json,
                   "subjects_charged": int(len(uniq)),
                   "lifetime_epsilon": None if lifetime_epsilon is None else float(lifetime_epsilon)}
            row_hash = _row_hash(row, head, _spend_digest(uniq, eps))
            c.execute("INSERT INTO releases VALUES (:id, :time, :policy_sha256, :extract_sha256, :nonce, :columns, "
                      ":subjects_charged, :lifetime_epsilon, :prev_hash, :row_hash)",
                      {**row, "prev_hash": head, "row_hash": row_hash})
            blobs, eps_list = _blobs(uniq), eps.tolist()
            c.executemany("INSERT INTO subject_spend VALUES (?, ?, ?)", zip([rid] * len(uniq), blobs, eps_list))
            c.executemany("INSERT INTO subject_total VALUES (?, ?) ON CONFLICT (subject_hash) DO UPDATE SET "
                          "eps = eps + excluded.eps", zip(blobs, eps_list))
            self._write_state(rid, memo)
            c.executemany("UPDATE meta SET value = ? WHERE name = ?",
                          [(row_hash, "head"), (str(rid), "release_count")])
            c.execute("COMMIT")
        except BaseException:
            if c.in_transaction:
                c.execute("ROLLBACK")
            raise
        return rid

    def _write_state(self, rid: int, memo: Iterable[tuple[str, np.ndarray, np.ndarray]]) -> None:
        for col, sh, vh in memo:
            self._conn.executemany(
                "INSERT INTO subject_state VALUES (?, ?, ?, ?) ON CONFLICT (subject_hash, column) DO UPDATE SET "
                "last_value_hash = excluded.last_value_hash, updated_release = excluded.updated_release",
                zip(_blobs(sh), [col] * len(sh), _blobs(vh), [rid] * len(sh)))

    # checking and summarizing -----------------------------------------------------------

    def verify(self) -> VerifyResult:
        """Recompute the hash chain; the result names the first broken release."""
        c = self._conn
        c.execute("BEGIN")
        try:
            meta = dict(c.execute("SELECT name, value FROM meta"))
            rows = c.execute("SELECT id, time, policy_sha256, extract_sha256, nonce, columns, subjects_charged, "
                             "lifetime_epsilon, prev_hash, row_hash FROM releases ORDER BY id").fetchall()
            names = ("id", "time", "policy_sha256", "extract_sha256", "nonce", "columns", "subjects_charged",
                     "lifetime_epsilon", "prev_hash", "row_hash")
            prev = GENESIS
            all_h: list[np.ndarray] = []
            all_e: list[np.ndarray] = []
            for n, values in enumerate(rows, start=1):
                r = dict(zip(names, values))
                rid = r["id"]
                if rid != n:
                    return VerifyResult(False, len(rows), n, f"release {n} is missing (the next stored id is {rid}):"
                                        " a release was deleted or inserted", prev)
                if r["prev_hash"] != prev:
                    return VerifyResult(False, len(rows), rid, f"release {rid} does not link to release {rid - 1} "
                                        "(prev_hash differs): a release before it was changed, deleted or inserted",
                                        prev)
                spend = c.execute("SELECT subject_hash, eps FROM subject_spend WHERE release_id = ?",
                                  (rid,)).fetchall()
                if any(not isinstance(s[0], bytes) or len(s[0]) != 32 for s in spend):
                    return VerifyResult(False, len(rows), rid, f"release {rid}: a subject hash is not 32 bytes",
                                        prev)
                h = np.frombuffer(b"".join(s[0] for s in spend), dtype=DIGEST) if spend else np.zeros(0, DIGEST)
                e = np.array([s[1] for s in spend], dtype=np.float64)
                if len(spend) != r["subjects_charged"]:
                    return VerifyResult(False, len(rows), rid, f"release {rid}: {len(spend)} subject spend rows, "
                                        f"but the release says {r['subjects_charged']}", prev)
                try:
                    expected = _row_hash(r, r["prev_hash"], _spend_digest(h, e))
                except (TypeError, ValueError):
                    expected = None
                if expected != r["row_hash"]:
                    return VerifyResult(False, len(rows), rid, f"release {rid}: its row or its subject spend rows "
                                        "were changed after it was recorded (row_hash differs)", prev)
                prev = r["row_hash"]
                all_h.append(h)
                all_e.append(e)
            if meta.get("head") != prev or meta.get("release_count") != str(len(rows)):
                return VerifyResult(False, len(rows), len(rows) + 1,
                                    f"the ledger's head records {meta.get('release_count')} release(s) but "
                                    f"{len(rows)} are stored: a release at the end was deleted or added", prev)
            orphans = c.execute("SELECT count(*) FROM subject_spend WHERE release_id NOT IN "
                                "(SELECT id FROM releases)").fetchone()[0]
            if orphans:
                return VerifyResult(False, len(rows), None, f"{orphans} subject spend rows belong to no release",
                                    prev)
            th, te = self._totals()
            if all_h:
                uh, inv = np.unique(np.concatenate(all_h), return_inverse=True)
                ue = np.bincount(inv.reshape(-1), weights=np.concatenate(all_e), minlength=len(uh))
            else:
                uh, ue = np.zeros(0, dtype=DIGEST), np.zeros(0)
            if len(uh) != len(th) or not np.array_equal(uh, th) or \
                    not np.allclose(ue, te, rtol=CAP_TOLERANCE, atol=CAP_TOLERANCE):
                return VerifyResult(False, len(rows), None, "the per-subject running totals do not match the sum of "
                                    "the recorded spend (subject_total was edited)", prev)
            return VerifyResult(True, len(rows), None, f"chain intact over {len(rows)} release(s)", prev)
        finally:
            c.execute("COMMIT")

    def spend_totals(self) -> np.ndarray:
        """Total eps of every subject in the ledger (unordered; no identifiers)."""
        rows = self._conn.execute("SELECT eps FROM subject_total").fetchall()
        return np.fromiter((r[0] for r in rows), dtype=np.float64, count=len(rows))

    def show(self, lifetime_epsilon: float | None = None) -> dict[str, Any]:
        """A summary for the steward.  The spend figures depend on the data: steward-only."""
        c = self._conn
        c.execute("BEGIN")
        try:
            rel = c.execute("SELECT id, time, columns, subjects_charged, lifetime_epsilon FROM releases "
                            "ORDER BY id").fetchall()
            head = c.execute("SELECT value FROM meta WHERE name = 'head'").fetchone()[0]
            totals = self.spend_totals()
        finally:
            c.execute("COMMIT")
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
            "subjects": int(len(totals)), "steward_only": SPEND_NOTE,
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
    from .release import private_dir

    return private_dir() / DEFAULT_NAME
