"""A damaged ledger is reported as damaged, never re-created, changed or met with a traceback.

Files at the ledger's path that are empty, not a ledger (garbage bytes, text, another program's
SQLite database) or a damaged ledger (truncated, a table dropped, a header row deleted or
altered, columns of the wrong type, pages overwritten): `ldpt ledger verify` reports a failed
check (exit 1), `ldpt ledger show` and `ldpt privatize` a user error (exit 2), each in one
paragraph that names the file and says to restore it from a backup, never SQLite's own words;
and the file is left byte for byte as it was (same size, same modification time, no journal
beside it).  Checks open the ledger read-only; a journal a stopped writer left is undone by
SQLite's own recovery; a new ledger appears only where no file exists, and whole.
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
import subprocess
import sys
import textwrap
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pytest

from conftest import FIXED_KEY_BYTES, assert_user_error, listing, partials, write_fixed_key, write_policy
from ldptransform.keys import SecretKey
from ldptransform.ledger import Ledger, LedgerDamagedError, LedgerError, ReleaseMeta, subject_hashes, value_hashes

KEY = SecretKey(FIXED_KEY_BYTES)

# SQLite's and Python's own words, which no message may show
RAW_WORDS = ("file is not a database", "malformed", "no such table", "no such column", "sqlite3.", "OperationalError",
             "DatabaseError", "NoneType", "Traceback", "[Errno", "disk image", "attempt to write")


def meta(n: int) -> ReleaseMeta:
    return ReleaseMeta(policy_sha256=f"{n:064x}", extract_sha256=f"{n + 1000:064x}", nonce=f"{n:032x}",
                       columns={"site": {"eps": 1.0, "memoized": True}, "pay": 0.5},
                       time=f"2026-02-{n:02d}T00:00:00Z")


def good_ledger(path: Path, releases: int = 2, people: int = 40) -> Path:
    """A valid ledger with ``releases`` releases of ``people`` invented identifiers each."""
    with Ledger.open(path) as led:
        for n in range(1, releases + 1):
            h = subject_hashes(KEY, pa.array([f"staff-{i:05d}" for i in range(10 * n, 10 * n + people)]))
            vh = value_hashes(KEY, "site", pa.array(["Riverside"] * people))
            led.record_release(meta(n), h, 1.5, {"site": (h, vh)}, key_fingerprint=KEY.fingerprint())
    return path


def _sql(*statements: str) -> Callable[[Path], None]:
    def make(path: Path) -> None:
        good_ledger(path)
        con = sqlite3.connect(path)
        for s in statements:
            con.execute(s)
        con.commit()
        con.close()
    return make


def _other_program(path: Path) -> None:
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE survey (person TEXT, answer TEXT)")
    con.execute("INSERT INTO survey VALUES ('p1', 'yes')")
    con.commit()
    con.close()


def _empty_database(path: Path) -> None:
    con = sqlite3.connect(path)
    con.execute("VACUUM")  # a valid SQLite file with no tables (what an old ldpt would have filled in)
    con.close()


def _cut(keep: Callable[[int], int]) -> Callable[[Path], None]:
    def make(path: Path) -> None:
        good_ledger(path)
        data = path.read_bytes()
        path.write_bytes(data[:keep(len(data))])
    return make


def _retype_spend(path: Path) -> None:
    good_ledger(path)
    con = sqlite3.connect(path)
    con.executescript("""
        CREATE TABLE spend_text (release_id TEXT PRIMARY KEY, subject_ids TEXT NOT NULL, eps TEXT NOT NULL);
        INSERT INTO spend_text SELECT release_id, hex(subject_ids), hex(eps) FROM release_spend;
        DROP TABLE release_spend;
        ALTER TABLE spend_text RENAME TO release_spend;
    """)
    con.close()


GARBAGE = b"".join(hashlib.sha256(b"garbage %d" % i).digest() for i in range(200))  # fixed, not a database

# name -> (how the file is made, words the message must hold)
DAMAGED: dict[str, tuple[Callable[[Path], object], str]] = {
    "empty file": (lambda p: p.write_bytes(b""), "is empty"),
    "garbage bytes": (lambda p: p.write_bytes(GARBAGE), "not an ldptransform ledger"),
    "zero bytes": (lambda p: p.write_bytes(bytes(4096)), "not an ldptransform ledger"),
    "text file": (lambda p: p.write_text("person,site\np1,Riverside\n" * 50, encoding="utf-8"), "text file"),
    "another program's database": (_other_program, "not an ldptransform ledger"),
    "an empty database": (_empty_database, "not an ldptransform ledger"),
    "truncated to half": (_cut(lambda n: n // 2), "truncated"),
    "truncated in its header": (_cut(lambda n: 60), "truncated"),
    "one page cut off": (_cut(lambda n: n - 65536), "truncated"),  # a ledger's pages are of 64 KiB
    "part of a page cut off": (_cut(lambda n: n - 4096), "truncated"),
    "releases table dropped": (_sql("DROP TABLE releases"), "table of releases (releases) is missing"),
    "spend table dropped": (_sql("DROP TABLE release_spend"), "(release_spend) is missing"),
    "state table dropped": (_sql("DROP TABLE arrays"), "(arrays) is missing"),
    "header table dropped": (_sql("DROP TABLE meta"), "header table (meta) is missing"),
    "head row deleted": (_sql("DELETE FROM meta WHERE name = 'head'"), "has no head hash"),
    "count row deleted": (_sql("DELETE FROM meta WHERE name = 'release_count'"), "has no release count"),
    "version row deleted": (_sql("DELETE FROM meta WHERE name = 'schema_version'"), "has no schema version"),
    "created row deleted": (_sql("DELETE FROM meta WHERE name = 'created'"), "has no creation time"),
    "version row altered": (_sql("UPDATE meta SET value = '7' WHERE name = 'schema_version'"),
                            "another schema version"),
    "head row altered": (_sql("UPDATE meta SET value = 'not a digest' WHERE name = 'head'"), "head hash"),
    "count row altered": (_sql("UPDATE meta SET value = 'two' WHERE name = 'release_count'"), "release count"),
    "count row of another type": (_sql("UPDATE meta SET value = x'32' WHERE name = 'release_count'"),
                                  "release count"),
    "key fingerprint altered": (_sql("UPDATE meta SET value = 'x' WHERE name = 'key_fingerprint'"),
                                "key fingerprint"),
    "application id altered": (_sql("PRAGMA application_id = 7"), "not an ldptransform ledger"),
    "schema version cleared": (_sql("PRAGMA user_version = 0"), "schema version is missing"),
    "spend columns retyped": (_retype_spend, "columns, types and keys"),
    "a column added": (_sql("ALTER TABLE releases ADD COLUMN note TEXT"), "columns, types and keys"),
    "state stored as text": (_sql("UPDATE arrays SET data = 'abc' WHERE name = 'totals'"), "not binary data"),
    "an array named in binary": (_sql("INSERT INTO arrays VALUES (x'35', 0, x'00')"), "name is not a text"),
    "release row of another type": (_sql("UPDATE releases SET subjects_charged = 'many' WHERE id = 1"),
                                    "wrong type"),
}

# damage only a read of the current state shows (verify names it as a broken chain or damage)
STATE_DAMAGED: dict[str, tuple[Callable[[Path], object], str]] = {
    "state deleted": (_sql("DELETE FROM arrays"), "current state (subject registry, running totals, memo state) "
                      "is gone"),
    "state of a column deleted": (_sql("DELETE FROM arrays WHERE name = 'state:site'"), "not the one its last "
                                  "release recorded"),
    "totals edited": (_sql("UPDATE arrays SET data = zeroblob(length(data)) WHERE name = 'totals'"),
                      "not the one its last release recorded"),
    "state zeroed": (_sql("UPDATE arrays SET data = x'00'"), "do not fit together"),
    "a text of invalid UTF-8": (_sql("UPDATE meta SET value = CAST(x'ebba25a51b' AS TEXT) WHERE name = 'created'"),
                                "not valid UTF-8"),
}
DAMAGED_ALL = {**DAMAGED, **STATE_DAMAGED}


def _make(tmp_path: Path, name: str) -> tuple[Path, str]:
    make, words = DAMAGED_ALL[name]
    folder = tmp_path / "steward"
    folder.mkdir()
    path = folder / "ledger.sqlite3"
    make(path)
    path.chmod(0o600)
    return path, words


def _state(path: Path) -> tuple[bytes, int, int, list[str]]:
    st = path.stat()
    return path.read_bytes(), st.st_size, st.st_mtime_ns, listing(path.parent)


def _one_paragraph(text: str, path: Path) -> str:
    text = text.strip()
    assert text and "\n\n" not in text, text
    assert str(path) in text, text
    for raw in RAW_WORDS:
        assert raw not in text, f"{raw!r} in:\n{text}"
    return text


@pytest.mark.parametrize("name", list(DAMAGED))
def test_verify_reports_a_damaged_ledger_as_a_failed_check_and_leaves_it(tmp_path: Path, ldpt, name: str) -> None:
    path, words = _make(tmp_path, name)
    before = _state(path)
    res = ldpt("ledger", "verify", "--ledger", path)
    assert res.returncode == 1, (res.returncode, res.stdout, res.stderr)
    text = _one_paragraph(res.stdout, path)
    assert words in text and ("damaged" in text or "not an ldptransform ledger" in text), text
    assert "from a backup" in text or "BROKEN at release" in text, text  # a row: its link in the chain is broken
    assert _state(path) == before  # same bytes, size and modification time; no journal, nothing new beside it


@pytest.mark.parametrize("name", list(DAMAGED))
def test_show_and_open_refuse_a_damaged_ledger_and_leave_it(tmp_path: Path, ldpt, name: str) -> None:
    path, words = _make(tmp_path, name)
    before = _state(path)
    text = assert_user_error(ldpt("ledger", "show", "--ledger", path), [str(path), words])
    _one_paragraph(text, path)
    assert "from a backup" in text and ("do not delete" in text or "do not start a new ledger" in text), text
    with pytest.raises(LedgerDamagedError) as err:  # the library refuses it the same way, also when it may create
        with Ledger.open(path, create=True) as led:  # (damage inside rows shows when they are read)
            led.show()
    _one_paragraph(str(err.value), path)
    assert _state(path) == before


# -- privatize ------------------------------------------------------------------------------

POLICY = {
    "budget": {"epsilon_per_row": 2.0, "lifetime_epsilon": 10.0},
    "subject_key": "person",
    "columns": {
        "person": {"type": "drop"},
        "site": {"type": "categorical", "categories": ["North Works", "Riverside", "Old Mill"], "epsilon": 1.0,
                 "mechanism": "grr", "memoize": True},
        "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0, "mechanism": "hybrid"},
    },
}


def _release_inputs(tmp_path: Path) -> tuple[Path, Path, Path, Path]:
    work = tmp_path / "work"
    work.mkdir()
    raw = work / "staff.csv"
    pd.DataFrame({"person": [f"staff-{i:04d}" for i in range(60)],
                  "site": (["North Works", "Riverside", "Old Mill"] * 20),
                  "hours": [float(20 + i % 30) for i in range(60)]}).to_csv(raw, index=False)
    policy = write_policy(work / "policy.yaml", POLICY)
    key = write_fixed_key(tmp_path / "release.key")
    return work, raw, policy, key


@pytest.mark.parametrize("name", ["empty file", "another program's database", "truncated to half",
                                  "state table dropped", "head row deleted", "spend columns retyped"])
def test_privatize_refuses_a_damaged_ledger_before_writing_anything(tmp_path: Path, ldpt, name: str) -> None:
    path, words = _make(tmp_path, name)
    work, raw, policy, key = _release_inputs(tmp_path)
    before, work_before = _state(path), listing(work)
    res = ldpt("privatize", raw, "--policy", policy, "--key", key, "--out", work / "extract.parquet",
               "--ledger", path, "--nonce", "0" * 31 + "1")
    text = assert_user_error(res, [str(path), words])
    _one_paragraph(text, path)
    assert listing(work) == work_before and partials(work) == []
    assert _state(path) == before


def test_privatize_makes_a_new_ledger_only_where_no_file_exists(tmp_path: Path, ldpt) -> None:
    work, raw, policy, key = _release_inputs(tmp_path)
    folder = tmp_path / "steward"
    folder.mkdir()
    path = folder / "ledger.sqlite3"
    res = ldpt("privatize", raw, "--policy", policy, "--key", key, "--out", work / "extract.parquet",
               "--ledger", path, "--nonce", "0" * 31 + "1")
    assert res.returncode == 0, res.stderr
    assert listing(folder) == ["ledger.sqlite3"] and path.stat().st_mode & 0o777 == 0o600  # nothing else left
    res = ldpt("ledger", "verify", "--ledger", path)
    assert res.returncode == 0 and "chain intact over 1 release(s)" in res.stdout


# -- read-only checks -------------------------------------------------------------------------

def _spy_connect(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Record the database names every SQLite connection to a file is opened with."""
    opened: list[str] = []
    real = sqlite3.connect

    def connect(database: Any, *args: Any, **kwargs: Any) -> sqlite3.Connection:
        if database != ":memory:":  # the expected schema, read once from an in-memory database
            opened.append(str(database))
        return real(database, *args, **kwargs)

    monkeypatch.setattr(sqlite3, "connect", connect)
    return opened


def test_verify_show_and_the_release_pre_pass_open_the_ledger_read_only(tmp_path: Path, ldpt,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    path = good_ledger(tmp_path / "ledger.sqlite3")
    before = _state(path)
    opened = _spy_connect(monkeypatch)
    for args in (("verify",), ("show",), ("show", "--format", "json")):
        res = ldpt("ledger", *args, "--ledger", path)
        assert res.returncode == 0, res.stderr
    assert len(opened) == 3 and all(o.endswith("?mode=ro") for o in opened), opened
    assert _state(path) == before
    # privatize: the pre-pass only reads (read-only), recording opens it once to write
    work, raw, policy, key = _release_inputs(tmp_path)
    opened.clear()
    res = ldpt("privatize", raw, "--policy", policy, "--key", key, "--out", work / "extract.parquet",
               "--ledger", path, "--nonce", "0" * 31 + "9")
    assert res.returncode == 0, res.stderr
    ledger_opens = [o for o in opened if "ledger.sqlite3" in o]
    assert [o.rsplit("?", 1)[-1] for o in ledger_opens] == ["mode=ro", "mode=rw"], opened


def test_a_ledger_opened_read_only_cannot_be_written(tmp_path: Path) -> None:
    path = good_ledger(tmp_path / "ledger.sqlite3")
    before = _state(path)
    with Ledger.open(path, readonly=True) as led:
        assert led.verify().ok and led.show()["releases"] == 2
        with pytest.raises(LedgerError, match="opened read-only"):
            led.record_release(meta(3), subject_hashes(KEY, pa.array(["staff-00001"])), 1.0)
        with pytest.raises(sqlite3.OperationalError):
            led._conn.execute("PRAGMA user_version = 5")
    with pytest.raises(LedgerError, match="no ledger at"):
        Ledger.open(tmp_path / "absent.sqlite3", readonly=True)  # read-only never creates
    assert not (tmp_path / "absent.sqlite3").exists()
    assert _state(path) == before


STOPPED_WRITER = textwrap.dedent("""
    import os, sqlite3, sys
    con = sqlite3.connect(sys.argv[1], isolation_level=None)
    con.execute("PRAGMA cache_size = 1")  # spill changed pages into the file before the commit
    con.execute("BEGIN IMMEDIATE")
    con.execute("UPDATE arrays SET data = zeroblob(length(data))")
    con.execute("INSERT INTO arrays VALUES ('filler', 0, zeroblob(800000))")
    os._exit(9)  # stopped mid-write: the journal beside the ledger holds what to undo
""")


def test_verify_after_a_stopped_writer_undoes_its_write_and_finds_the_chain_intact(tmp_path: Path, ldpt,
                                                                                   private_dir: Path) -> None:
    path = good_ledger(tmp_path / "ledger.sqlite3")
    committed = path.read_bytes()
    script = tmp_path / "stop.py"
    script.write_text(STOPPED_WRITER)
    p = subprocess.run([sys.executable, str(script), str(path)], capture_output=True, text=True, timeout=60)
    assert p.returncode == 9, p.stderr
    journal = tmp_path / "ledger.sqlite3-journal"
    assert journal.exists() and journal.stat().st_size > 0 and path.read_bytes() != committed
    res = ldpt("ledger", "verify", "--ledger", path)
    assert res.returncode == 0 and "chain intact over 2 release(s)" in res.stdout, (res.stdout, res.stderr)
    assert not journal.exists() and path.read_bytes() == committed  # as of its last recorded release


# -- every page overwritten in turn ---------------------------------------------------------------

def test_an_overwritten_page_anywhere_is_damage_or_a_broken_chain_never_a_crash(tmp_path: Path) -> None:
    """Each page of a ledger overwritten with a fixed byte pattern in turn: opening, verify, show
    and spent end in a LedgerError (damaged, in plain words) or a verify that fails; never
    another exception, never an intact verdict, and the file is never changed."""
    good = good_ledger(tmp_path / "good.sqlite3", releases=2, people=1500)
    data = good.read_bytes()
    page = int.from_bytes(data[16:18], "big")
    page = 65536 if page == 1 else page  # how SQLite's header writes its largest page size
    assert len(data) // page >= 5
    h = subject_hashes(KEY, pa.array(["staff-00020"]))
    for n in range(len(data) // page):
        bad = tmp_path / f"page{n}.sqlite3"
        bad.write_bytes(data[:n * page] + bytes([0xA5]) * page + data[(n + 1) * page:])
        bad.chmod(0o600)
        before = _state(bad)
        intact = []
        for use in ("verify", "show", "spent"):
            try:
                with Ledger.open(bad, create=False, readonly=use != "spent") as led:
                    if use == "verify":
                        intact.append(led.verify().ok)
                    else:
                        led.show() if use == "show" else led.spent(h)
            except LedgerError as err:
                _one_paragraph(str(err), bad)
                assert "backup" in str(err), str(err)
                intact.append(False)
        assert intact[0] is False, f"page {n}: verify found the chain intact"
        assert _state(bad) == before, f"page {n}: the file changed"
        bad.unlink()


# -- writing -----------------------------------------------------------------------------------

def test_recording_refuses_a_head_that_does_not_match_the_last_release(tmp_path: Path) -> None:
    path = good_ledger(tmp_path / "ledger.sqlite3")
    con = sqlite3.connect(path)
    con.execute("UPDATE meta SET value = ? WHERE name = 'head'", ("ab" * 32,))
    con.commit()
    con.close()
    before = _state(path)
    with Ledger.open(path) as led:
        with pytest.raises(LedgerDamagedError, match="head hash and release count do not match its last stored "
                                                     "release.*Nothing was recorded"):
            led.record_release(meta(3), subject_hashes(KEY, pa.array(["staff-00001"])), 1.0)
        assert not led.verify().ok
    assert _state(path)[0] == before[0]


def test_a_full_disk_while_recording_is_told_in_plain_words(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = good_ledger(tmp_path / "ledger.sqlite3")
    before = path.read_bytes()

    def full(*args: object, **kwargs: object) -> None:
        err = sqlite3.OperationalError("database or disk is full")
        err.sqlite_errorcode = 13  # SQLITE_FULL, as SQLite reports it
        raise err

    monkeypatch.setattr(Ledger, "_put", full)
    with Ledger.open(path) as led:
        with pytest.raises(LedgerError) as err:
            led.record_release(meta(3), subject_hashes(KEY, pa.array(["staff-00001"])), 1.0)
        assert led.show()["releases"] == 2
    text = _one_paragraph(str(err.value), path)
    assert "is full; nothing was recorded" in text and "database or disk" not in text
    assert path.read_bytes() == before


def test_an_empty_file_is_never_made_into_a_ledger(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite3"
    path.touch(mode=0o600)
    for create in (True, False):
        with pytest.raises(LedgerDamagedError, match="is empty \\(0 bytes\\)"):
            Ledger.open(path, create=create)
    assert path.stat().st_size == 0 and listing(tmp_path) == ["ledger.sqlite3"]


def test_jobs_creating_one_ledger_at_once_all_get_the_same_whole_ledger(tmp_path: Path) -> None:
    """Eight threads open a ledger that does not exist yet, at the same moment: each finds a
    complete ledger (never an empty file), one of them made it, nothing else is left."""
    path = tmp_path / "ledger.sqlite3"
    start = threading.Barrier(8)
    errors: list[BaseException] = []

    def job() -> None:
        try:
            start.wait(timeout=30)
            with Ledger.open(path) as led:
                led.show()
        except BaseException as err:  # collected for the assertion below
            errors.append(err)

    threads = [threading.Thread(target=job) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert errors == []
    assert listing(tmp_path) == ["ledger.sqlite3"]
    with Ledger.open(path, readonly=True) as led:
        assert led.verify().ok and led.verify().releases == 0


def test_a_failed_creation_leaves_nothing(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import ldptransform.ledger.store as store

    def fails(path: Path) -> None:
        path.write_bytes(b"SQLite format 3\x00 half-made")  # whatever was written before the failure
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(store, "_init_file", fails)
    with pytest.raises(LedgerError) as err:
        Ledger.open(tmp_path / "ledger.sqlite3")
    text = _one_paragraph(str(err.value), tmp_path / "ledger.sqlite3")
    assert "cannot create ledger" in text and "no space left on device" in text
    assert listing(tmp_path) == []


def test_a_link_to_nowhere_is_not_followed_to_make_a_ledger(tmp_path: Path) -> None:
    link = tmp_path / "ledger.sqlite3"
    link.symlink_to(tmp_path / "gone" / "ledger.sqlite3")
    with pytest.raises(LedgerError, match="symbolic link to a file that does not exist"):
        Ledger.open(link)
    assert listing(tmp_path) == ["ledger.sqlite3"] and os.path.islink(link)


def test_release_meta_with_missing_or_unknown_fields_is_named_in_plain_words(tmp_path: Path) -> None:
    h = subject_hashes(KEY, pa.array(["staff-00001"]))
    with Ledger.open(tmp_path / "ledger.sqlite3") as led:
        with pytest.raises(LedgerError) as err:
            led.record_release({"policy_sha256": "a" * 64, "nonce": "b" * 32, "colums": {"site": 1.0}}, h, 1.0)
        assert led.show()["releases"] == 0
    text = str(err.value)
    assert "unknown field(s) colums; missing field(s) extract_sha256, columns" in text
    assert "__init__" not in text and "keyword argument" not in text


def test_a_ledger_switched_to_write_ahead_logging_is_refused_without_writing_beside_it(tmp_path: Path,
                                                                                       ldpt) -> None:
    path = good_ledger(tmp_path / "ledger.sqlite3")
    con = sqlite3.connect(path)
    assert con.execute("PRAGMA journal_mode = WAL").fetchone() == ("wal",)
    con.close()
    before = _state(path)
    for command in ("verify", "show"):
        text = assert_user_error(ldpt("ledger", command, "--ledger", path), [str(path), "journal_mode=DELETE"])
        _one_paragraph(text, path)
    assert _state(path) == before  # no -wal or -shm file beside it
    con = sqlite3.connect(path)
    con.execute("PRAGMA journal_mode = DELETE")
    con.close()
    with Ledger.open(path, readonly=True) as led:
        assert led.verify().ok


@pytest.mark.parametrize("name", list(STATE_DAMAGED))
def test_a_state_that_does_not_fit_the_history_is_refused_by_show_and_privatize(tmp_path: Path, ldpt,
                                                                               private_dir: Path, name: str) -> None:
    """The current state deleted, shortened or edited after the last release (or a text that is
    not UTF-8): verify fails (exit 1), show and privatize refuse it (exit 2) in one paragraph that
    names the ledger and says to restore it, and a refused release leaves nothing behind, not even
    its nonce record in the private folder."""
    path, words = _make(tmp_path, name)
    before = _state(path)
    res = ldpt("ledger", "verify", "--ledger", path)
    assert res.returncode == 1, (res.returncode, res.stdout, res.stderr)
    _one_paragraph(res.stdout, path)
    text = assert_user_error(ldpt("ledger", "show", "--ledger", path), [str(path), "damaged", words])
    assert "from a backup" in _one_paragraph(text, path) and "do not delete" in text
    work, raw, policy, key = _release_inputs(tmp_path)
    private_before = listing(private_dir)
    work_before = listing(work)
    res = ldpt("privatize", raw, "--policy", policy, "--key", key, "--out", work / "extract.parquet",
               "--ledger", path)
    text = assert_user_error(res, [str(path), "damaged", words])
    assert "Nothing was recorded" in text or "left as it is" in text, text
    _one_paragraph(text, path)
    assert listing(work) == work_before and partials(work) == [] and listing(private_dir) == private_before
    assert _state(path) == before


def test_a_valid_ledger_whose_release_charged_nobody_is_still_usable(tmp_path: Path) -> None:
    path = tmp_path / "ledger.sqlite3"
    with Ledger.open(path) as led:
        led.record_release(meta(1), subject_hashes(KEY, pa.array([], type=pa.string())), 1.0)
    with Ledger.open(path, create=False) as led:
        led.check_state()
        assert led.verify().ok and led.show()["subjects"] == 0
        led.record_release(meta(2), subject_hashes(KEY, pa.array(["staff-00001"])), 1.0)
        led.check_state()
        assert led.verify().ok and led.show()["subjects"] == 1
