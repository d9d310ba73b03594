"""The ledger file's layout, and the checks a file passes before a ledger reads or writes it.

A file is used as a ledger only if (each check O(1): the file's first 100 bytes, the four
tables' declarations and the header table's few rows, never a scan of releases or state):

- it is not empty and starts as a SQLite database does, with ldptransform's application id and
  a schema version this version reads, and it is a whole number of pages, no shorter than its
  header says (unless the journal of a stopped write lies beside it, which SQLite then undoes).
  These are read from the file's first bytes and its size before SQLite opens it, so that a
  file of any other kind is never opened by SQLite, let alone changed;
- its four tables exist with the columns, types, not-null flags and keys this version creates;
- its header table (``meta``) holds the schema version, the creation time, the head hash and the
  release count, each well-formed, and a key fingerprint (if any) of the form a key gives.

A failure is a ``LedgerDamagedError`` naming the file and what is wrong, and advising to restore
the ledger from a backup: never to delete it, as a new ledger would forget everyone's spent eps.
Failures SQLite reports later (pages it cannot read, a full disk, a lock held too long) are told
in plain words by ``sqlite_failure``, never in SQLite's own words.
"""

from __future__ import annotations

import functools
import sqlite3
from pathlib import Path

from .errors import LedgerDamagedError, LedgerError

SCHEMA_VERSION = 3  # 3: 16-byte AES-based digests; 2: 32-byte AES-based digests; 1: HMAC-SHA256
APPLICATION_ID = 0x4C445450  # "LDTP": marks a SQLite file as an ldptransform ledger

SCHEMA = [
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
        state_sha256 TEXT NOT NULL,
        prev_hash TEXT NOT NULL,
        row_hash TEXT NOT NULL)""",
    # a release's spend: registry indices (sorted, delta-coded, u64 LE) and eps (f64 LE), zlib
    """CREATE TABLE IF NOT EXISTS release_spend (
        release_id INTEGER PRIMARY KEY,
        subject_ids BLOB NOT NULL,
        eps BLOB NOT NULL)""",
    # current state as arrays aligned by registry index: "subjects" (16-byte digests, appended
    # one part per release), "totals" (f64 LE), "state:<column>" (16-byte last-value digests);
    # and "order" (u32 LE), the permutation that sorts the registry's 64-bit prefixes
    """CREATE TABLE IF NOT EXISTS arrays (
        name TEXT NOT NULL,
        part INTEGER NOT NULL,
        data BLOB NOT NULL,
        PRIMARY KEY (name, part))""",
]

# the tables in the words messages use
TABLES = {"meta": "its header table (meta)", "releases": "its table of releases (releases)",
          "release_spend": "its table of each release's spend (release_spend)",
          "arrays": "its table of the current state: subject registry, running totals, memo state (arrays)"}

# the header table's rows: name -> (required, what it is in words)
META_ROWS = {"schema_version": (True, "schema version"), "created": (True, "creation time"),
             "head": (True, "head hash"), "release_count": (True, "release count"),
             "key_fingerprint": (False, "key fingerprint")}

_MAGIC = b"SQLite format 3\x00"
_HEADER_BYTES = 100
_HEX = frozenset("0123456789abcdef")

# SQLite's primary result codes this module tells apart (the low byte of an extended code)
_BUSY, _LOCKED, _NOMEM, _READONLY, _INTERRUPT, _IOERR, _FULL, _CANTOPEN = 5, 6, 7, 8, 9, 10, 13, 14
_PERM, _AUTH = 3, 23
_CORRUPT, _NOTADB = 11, 26
READONLY_ROLLBACK = _READONLY | (3 << 8)  # a read-only connection found a journal left by a stopped writer

_RESTORE = ("Restore the ledger from a backup; do not delete it or start a new ledger in its "
            "place, as a new ledger would forget the eps everyone has already spent.")


NOT_UTF8 = "a text stored in it is not valid UTF-8 (its bytes were changed on disk or by another program)"


def damaged(path: Path, what: str, *, recording: bool = False) -> LedgerDamagedError:
    """The error for a damaged ledger file: names it, says what is wrong and how to recover."""
    done = "Nothing was recorded and the file was left as it is." if recording else "The file was left as it is."
    return LedgerDamagedError(f"ledger {path} is damaged: {what}. {done} {_RESTORE}")


def not_a_ledger(path: Path, what: str) -> LedgerDamagedError:
    return LedgerDamagedError(
        f"{path} is not an ldptransform ledger: {what}. It was left as it is. Point --ledger at the steward's "
        "ledger. If the ledger used to be kept at this path, it was overwritten: restore it from a backup, and do "
        "not start a new ledger while people have been charged in the old one, as a new ledger would forget the "
        "eps they have spent (ldpt starts a new ledger only at a path where no file exists).")


def _header(path: Path) -> bytes:
    try:
        with open(path, "rb") as f:
            return f.read(_HEADER_BYTES)
    except OSError as err:
        why = "permission denied" if isinstance(err, PermissionError) else (err.strerror or "unreadable").lower()
        raise LedgerError(f"cannot read ledger {path} ({why}). Check that the steward's account may read it.") from None


def _looks_like_text(data: bytes) -> bool:
    if b"\x00" in data:
        return False
    try:
        data.decode("utf-8")
    except UnicodeDecodeError as err:
        return err.start >= len(data) - 3  # only a character cut at the end of the sample
    return True


def check_header(path: Path) -> None:
    """The file's first 100 bytes: a SQLite database with ldptransform's application id and
    this schema version.  Reads the bytes only (SQLite never opens a file that fails)."""
    data = _header(path)
    if not data:
        raise damaged(path, "it is empty (0 bytes): it was truncated or overwritten, or an earlier ldptransform "
                      "was stopped while making it (ldpt makes a new ledger whole, and only at a path where no file "
                      "exists)")
    if not data.startswith(_MAGIC[:len(data)]):
        raise not_a_ledger(path, "it is a text file, not a database" if _looks_like_text(data) else
                           "its first bytes are not those of a SQLite database")
    if len(data) < _HEADER_BYTES:
        raise damaged(path, f"it ends after {len(data)} bytes, within the database's own header (truncated)")
    app_id = int.from_bytes(data[68:72], "big")
    version = int.from_bytes(data[60:64], "big", signed=True)
    if app_id != APPLICATION_ID:
        raise not_a_ledger(path, "it is a SQLite database that ldpt did not make, or whose header was changed (it "
                           "does not carry ldptransform's application id)")
    if version < 1:
        raise damaged(path, "its schema version is missing from the database's header")
    if 2 in (data[18], data[19]):  # the file format's write and read versions: 2 is write-ahead logging
        raise LedgerError(f"ledger {path} was switched to SQLite's write-ahead log (journal mode WAL), which ldpt does "
                          "not use: in that mode even reading it writes files beside it. Switch it back, as the "
                          f"steward, with `sqlite3 {path} 'PRAGMA journal_mode=DELETE'` while no job uses it.")
    cut = None if Path(f"{path}-journal").exists() else _truncation(path)  # a stopped write: SQLite undoes it
    if cut is not None:  # a last page cut short would read as zeros
        raise damaged(path, cut)
    if version != SCHEMA_VERSION:
        raise LedgerError(f"ledger {path} has schema version {version}; this ldptransform reads version "
                          f"{SCHEMA_VERSION}. Use the ldptransform version that wrote it"
                          + (f" (version {version} ledgers hash subjects differently, and a keyed digest cannot "
                             "be turned into another without the identifiers, so this version cannot match "
                             "them; start a new ledger only after your privacy officer has decided how to "
                             "account for the eps already spent)." if version in (1, 2) else "."))


@functools.cache
def expected_columns() -> dict[str, list[tuple[str, str, int, int]]]:
    """Per table, (name, declared type, not null, place in the primary key) of each column, as
    ``SCHEMA`` creates them (read from a fresh in-memory database once)."""
    conn = sqlite3.connect(":memory:")
    try:
        for stmt in SCHEMA:
            conn.execute(stmt)
        return {t: _columns(conn, t) for t in TABLES}
    finally:
        conn.close()


def _columns(conn: sqlite3.Connection, table: str) -> list[tuple[str, str, int, int]]:
    return [(str(name), str(kind or "").upper(), int(notnull), int(pk))
            for _, name, kind, notnull, _, pk in conn.execute(f"PRAGMA table_info({table})")]


def _hex(v: object, n: int) -> bool:
    return isinstance(v, str) and len(v) == n and set(v) <= _HEX


def check_schema(conn: sqlite3.Connection, path: Path) -> None:
    """The tables, their columns and the header table's rows, before any read or write (call
    inside a read transaction; a handful of small queries whatever the ledger's size)."""
    present = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table' AND name IN "
                                          "(?, ?, ?, ?)", tuple(TABLES))}
    expected = expected_columns()
    for table, words in TABLES.items():
        if table not in present:
            raise damaged(path, f"{words} is missing")
        if _columns(conn, table) != expected[table]:
            raise damaged(path, f"{words} does not have the columns, types and keys a ledger's has (it was changed "
                          "by hand or by another program)")
    rows = dict(conn.execute(f"SELECT name, value FROM meta WHERE name IN ({', '.join('?' * len(META_ROWS))})",
                             tuple(META_ROWS)))
    for name, (required, words) in META_ROWS.items():
        if required and name not in rows:
            raise damaged(path, f"its header table (meta) has no {words}")
    v, count = rows["schema_version"], rows["release_count"]
    problems = [(v != str(SCHEMA_VERSION), "its header table (meta) gives another schema version than the database's "
                 "header"),
                (not _hex(rows["head"], 64), "the head hash in its header table (meta) is not a 64-character hex "
                 "digest"),
                (not (isinstance(count, str) and count.isascii() and count.isdigit()),
                 "the release count in its header table (meta) is not a whole number"),
                (not (isinstance(rows["created"], str) and rows["created"]),
                 "the creation time in its header table (meta) is not a text"),
                ("key_fingerprint" in rows and not _hex(rows["key_fingerprint"], 16),
                 "the key fingerprint in its header table (meta) is not the 16 hex characters a key gives")]
    for bad, what in problems:
        if bad:
            raise damaged(path, what)


def _truncation(path: Path) -> str | None:
    """If the file is shorter than its header says (pages cut off), that in words; else None."""
    try:
        data = _header(path)
        size = path.stat().st_size
    except (LedgerError, OSError):
        return None
    if len(data) < _HEADER_BYTES:
        return None
    page = int.from_bytes(data[16:18], "big")
    page = 65536 if page == 1 else page
    pages = int.from_bytes(data[28:32], "big")
    valid = pages > 0 and data[24:28] == data[92:96]  # the in-header size is kept up to date
    if valid and size < page * pages:
        return f"it is shorter than its own header says ({size} of {page * pages} bytes: truncated)"
    if size % page:
        return f"its size ({size} bytes) is not a whole number of its {page}-byte pages (truncated or extended)"
    return None


def sqlite_failure(path: Path, err: sqlite3.Error, *, recording: bool = False) -> LedgerError:
    """A failure SQLite reported, in plain words (never SQLite's own message): the lock held too
    long, a full disk, a disk failure, no access, or (anything else, our queries being fixed) a
    damaged file."""
    code = getattr(err, "sqlite_errorcode", None)
    primary = code & 0xFF if isinstance(code, int) else None
    nothing = "; nothing was recorded" if recording else ""
    if code == READONLY_ROLLBACK:
        return LedgerError(f"ledger {path} was left in the middle of a write by a job that was stopped (the journal "
                           "file beside it holds what to undo), and undoing that write needs write access to the "
                           "ledger and its folder. Run the command as the steward's account, which owns them.")
    if primary in (_BUSY, _LOCKED):
        return LedgerError(f"ledger {path} is held by another job (waited its busy timeout){nothing}. Run again when "
                           "the other job has finished.")
    if primary == _FULL:
        return LedgerError(f"the disk holding ledger {path} is full{nothing}; the ledger keeps its last release. "
                           "Free space on that disk and run again.")
    if primary == _IOERR:
        return LedgerError(f"the disk could not read or write ledger {path} (an input/output failure){nothing}. "
                           "Check the disk and run again; if it keeps failing, restore the ledger from a backup "
                           "onto a sound disk.")
    if primary in (_READONLY, _PERM, _AUTH):
        return LedgerError(f"ledger {path} cannot be written: the file, its folder or the disk is read-only for this "
                           f"account{nothing}. SQLite writes a journal file beside the ledger while recording, so "
                           "the steward's account needs write access to both.")
    if primary == _CANTOPEN:
        return LedgerError(f"cannot open ledger {path}{nothing}: check that it and its folder exist and that the "
                           "steward's account may read and write both (SQLite writes a journal file beside it).")
    if primary == _NOMEM:
        return LedgerError(f"ran out of memory while using ledger {path}{nothing}. Free memory and run again.")
    if primary == _INTERRUPT:
        return LedgerError(f"the use of ledger {path} was interrupted{nothing}.")
    if code is None and "decode" in str(err).lower():  # Python's sqlite3: a text cell that is not UTF-8
        return damaged(path, NOT_UTF8, recording=recording)
    what = _truncation(path) or ("SQLite cannot read parts of it (damaged pages)" if primary in (_CORRUPT, _NOTADB)
                                 else "its tables do not hold what a ledger's hold")
    return damaged(path, what, recording=recording)
