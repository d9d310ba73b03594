"""The privacy ledger (ldptransform/ledger.py) and `ldpt ledger show|verify`: keyed subject
hashes, opening and refusing files, spend and the lifetime cap, memoized state, rollback
of a failed record, the hash chain against hand edits, and two processes recording at once
(both succeed, one waits; or, together over the cap, exactly one is refused).
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from conftest import FIXED_KEY_BYTES, cli_env
from ldptransform.errors import LdptError
from ldptransform.keys import SecretKey
from ldptransform.ledger import (DIGEST, BudgetExhaustedError, Ledger, LedgerError, ReleaseMeta, subject_hashes,
                                 value_hashes)

KEY = SecretKey(FIXED_KEY_BYTES)
OTHER_KEY = SecretKey(bytes(range(32)))


def meta(n: int, **columns: object) -> ReleaseMeta:
    return ReleaseMeta(policy_sha256=f"{n:064x}", extract_sha256=f"{n + 1000:064x}", nonce=f"{n:032x}",
                       columns=columns or {"site": 1.0, "pay": 0.5}, time=f"2026-01-{n:02d}T00:00:00Z")


def ids(lo: int, hi: int) -> pa.Array:
    return pa.array([f"staff-{i:05d}" for i in range(lo, hi)])


def dump(path: Path) -> list[str]:
    con = sqlite3.connect(path)
    try:
        return list(con.iterdump())
    finally:
        con.close()


@pytest.fixture
def led(tmp_path: Path):
    with Ledger.open(tmp_path / "ledger.sqlite3") as ledger:
        yield ledger


# -- hashing ------------------------------------------------------------------------------

def test_subject_hashes_are_keyed_hmac_with_their_own_label() -> None:
    h = subject_hashes(KEY, pa.array([42, 7]))
    assert h.dtype == DIGEST and h.shape == (2,)
    sub = KEY.subkey("ledger", "subject-hash/v1")
    assert h.tobytes()[:32] == hmac.new(sub, b"42", hashlib.sha256).digest()
    assert h.tobytes()[32:] == hmac.new(sub, b"7", hashlib.sha256).digest()
    # the same identifier read as text or as a number is the same subject
    assert subject_hashes(KEY, pa.array(["42"])).tobytes() == h.tobytes()[:32]
    assert subject_hashes(KEY, np.array(["42", "7"])).tobytes() == h.tobytes()
    # another key, or the value hash of a memoized column, gives other digests (domain separation)
    assert subject_hashes(OTHER_KEY, pa.array([42])).tobytes() != h.tobytes()[:32]
    v_site = value_hashes(KEY, "site", pa.array([42]))
    v_pay = value_hashes(KEY, "pay", pa.array([42]))
    assert len({h.tobytes()[:32], v_site.tobytes(), v_pay.tobytes()}) == 3


def test_subject_hashes_refuse_missing_and_float_identifiers() -> None:
    with pytest.raises(LedgerError, match="1 value\\(s\\) are missing"):
        subject_hashes(KEY, pa.array(["a", None, "b"]))
    with pytest.raises(LedgerError, match="floating-point"):
        subject_hashes(KEY, pa.array([1.0, 2.0]))


# -- opening --------------------------------------------------------------------------------

def test_open_creates_a_private_file_and_refuses_other_files(tmp_path: Path) -> None:
    p = tmp_path / "ledger.sqlite3"
    Ledger.open(p).close()
    assert os.stat(p).st_mode & 0o777 == 0o600
    Ledger.open(p, create=False).close()  # reopens its own file

    with pytest.raises(LedgerError, match="no ledger at"):
        Ledger.open(tmp_path / "absent.sqlite3", create=False)
    text = tmp_path / "notes.txt"
    text.write_text("not a database\n" * 100)
    text.chmod(0o600)
    with pytest.raises(LedgerError, match="is not an ldptransform ledger"):
        Ledger.open(text)
    other = tmp_path / "other.sqlite3"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE t (x)")
    con.commit()
    con.close()
    other.chmod(0o600)
    with pytest.raises(LedgerError, match="is not an ldptransform ledger"):
        Ledger.open(other)
    assert dump(other) == ["BEGIN TRANSACTION;", "CREATE TABLE t (x);", "COMMIT;"]  # left untouched
    p.chmod(0o644)
    with pytest.raises(LedgerError, match="chmod 600"):
        Ledger.open(p)


# -- spend, cap, state --------------------------------------------------------------------------

def test_record_spent_and_charge_plan(led: Ledger) -> None:
    a = subject_hashes(KEY, ids(0, 100))
    b = subject_hashes(KEY, ids(50, 150))
    assert led.record_release(meta(1), a, 1.0) == 1
    # subject 60 appears twice in release 2: charged twice
    b2 = np.concatenate([b, b[10:11]])
    assert led.record_release(meta(2), b2, 0.5, lifetime_epsilon=3.0) == 2
    everyone = subject_hashes(KEY, ids(0, 200))
    expected = np.zeros(200)
    expected[0:100] += 1.0
    expected[50:150] += 0.5
    expected[60] += 0.5
    np.testing.assert_allclose(led.spent(everyone), expected)

    over, overshoot, within = led.charge_plan(everyone, 1.25, lifetime_epsilon=2.5)
    # totals after: 0..49 -> 2.25, 50..99 -> 2.75 (60 -> 3.25), 100..149 -> 1.75, 150.. -> 1.25
    assert over == 50 and overshoot == pytest.approx(0.75)
    np.testing.assert_array_equal(within, ~((np.arange(200) >= 50) & (np.arange(200) < 100)))
    # a per-subject eps array, and float sums at the cap are within (0.1 + 0.2 vs 0.3)
    over2, _, within2 = led.charge_plan(everyone[150:152], np.array([0.1, 0.2]), lifetime_epsilon=0.1 + 0.2 - 1e-12)
    assert over2 == 0 and within2.all()

    before = dump(led.path)
    with pytest.raises(BudgetExhaustedError, match="50 subject\\(s\\) over the lifetime eps 2.5") as err:
        led.record_release(meta(3), everyone, 1.25, lifetime_epsilon=2.5)
    assert isinstance(err.value, LdptError) and "staff-" not in str(err.value)
    assert dump(led.path) == before
    # the mask from charge_plan makes the release fit
    assert led.record_release(meta(3), everyone[within], 1.25, lifetime_epsilon=2.5) == 3
    assert led.verify().ok


def test_memoized_state_and_no_raw_values_in_the_file(led: Ledger, key_hex: str) -> None:
    raw_ids = ids(0, 20)
    h = subject_hashes(KEY, raw_ids)
    values = pa.array(["Riverside", "Old Mill"] * 10)
    vh = value_hashes(KEY, "site", values)
    m = meta(1, site={"eps": 1.0, "memoized": True}, pay=0.5)
    led.record_release(m, h, 1.5, {"site": (h, vh)})
    np.testing.assert_array_equal(led.last_values("site", h), vh)
    vh2 = value_hashes(KEY, "site", pa.array(["Head Office"] * 5))
    led.record_release(meta(2, site={"eps": 1.0, "memoized": True}), h[:5], 1.0, {"site": (h[:5], vh2)})
    got = led.last_values("site", subject_hashes(KEY, ids(0, 21)))
    np.testing.assert_array_equal(got[:5], vh2)
    np.testing.assert_array_equal(got[5:20], vh[5:])
    assert got[20:].tobytes() == bytes(32)  # never seen: all-zero digest
    with pytest.raises(LedgerError, match="does not mark as memoized"):
        led.record_release(meta(3), h, 1.0, {"site": (h, vh)})
    with pytest.raises(LedgerError, match="policy_sha256 must be 64 hex"):
        led.record_release(ReleaseMeta("abc", "0" * 64, "0" * 32, {"site": 1.0}), h, 1.0)
    with pytest.raises(LedgerError, match="finite eps > 0"):
        led.record_release(meta(3, site=0.0), h, 1.0)

    blob = led.path.read_bytes()
    for s in ["staff-00003", "Riverside", "Head Office"]:
        assert s.encode() not in blob
    assert bytes.fromhex(key_hex) not in blob and key_hex.encode() not in blob
    assert KEY.subkey("ledger", "subject-hash/v1") not in blob


def test_show_summarizes_without_identifiers(led: Ledger) -> None:
    led.record_release(meta(1), subject_hashes(KEY, ids(0, 100)), 1.0, lifetime_epsilon=2.0)
    led.record_release(meta(2), subject_hashes(KEY, ids(0, 10)), 1.0, lifetime_epsilon=2.0)
    s = led.show()
    assert s["releases"] == 2 and s["subjects"] == 100
    assert s["eps_per_row_summed_over_releases"] == pytest.approx(3.0)
    assert s["spend_quantiles"]["0.5"] == 1.0 and s["spend_quantiles"]["1"] == 2.0
    assert s["near_cap"] == {">=50%": 100, ">=75%": 10, ">=90%": 10, ">=100%": 10}
    assert s["least_remaining_eps"] == 0.0
    assert "steward-only" in s["steward_only"]
    assert "staff-" not in json.dumps(s)


# -- crash safety -----------------------------------------------------------------------------

def test_failure_inside_the_transaction_leaves_no_partial_release(led: Ledger,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    h = subject_hashes(KEY, ids(0, 50))
    led.record_release(meta(1), h, 1.0)
    before = dump(led.path)

    def boom(self, rid, memo):  # runs after the release row and its spend rows were inserted
        raise RuntimeError("simulated crash mid-record")

    monkeypatch.setattr(Ledger, "_write_state", boom)
    with pytest.raises(RuntimeError, match="simulated crash"):
        led.record_release(meta(2), subject_hashes(KEY, ids(25, 75)), 1.0)
    assert dump(led.path) == before
    monkeypatch.undo()
    assert led.verify().ok
    with Ledger.open(led.path) as again:  # a fresh connection sees the same
        assert again.verify().ok and again.show()["releases"] == 1
        assert again.record_release(meta(2), h, 1.0) == 2
        np.testing.assert_allclose(again.spent(h), 2.0)


# -- tampering ------------------------------------------------------------------------------

def _three_releases(path: Path) -> None:
    with Ledger.open(path) as led:
        for n in (1, 2, 3):
            led.record_release(meta(n), subject_hashes(KEY, ids(10 * n, 10 * n + 30)), 0.5 * n)


@pytest.mark.parametrize("edit, broken", [
    ("UPDATE subject_spend SET eps = 0.1 WHERE release_id = 2 "
     "AND subject_hash = (SELECT min(subject_hash) FROM subject_spend WHERE release_id = 2)", 2),
    ("UPDATE releases SET columns = '{\"site\":{\"eps\":0.1,\"memoized\":false}}' WHERE id = 2", 2),
    ("UPDATE releases SET time = '2020-01-01T00:00:00Z' WHERE id = 1", 1),
    ("DELETE FROM subject_spend WHERE release_id = 3 AND subject_hash = "
     "(SELECT min(subject_hash) FROM subject_spend WHERE release_id = 3)", 3),
    ("DELETE FROM releases WHERE id = 2", 2),
    ("DELETE FROM releases WHERE id = 3", 3),  # the head still counts 3 releases
    ("INSERT INTO releases SELECT 4, time, policy_sha256, extract_sha256, nonce, columns, subjects_charged, "
     "lifetime_epsilon, row_hash, row_hash FROM releases WHERE id = 3", 4),
    ("UPDATE subject_total SET eps = 0 WHERE subject_hash = (SELECT min(subject_hash) FROM subject_total)", None),
])
def test_hand_edits_break_the_chain(tmp_path: Path, edit: str, broken: int | None) -> None:
    p = tmp_path / "ledger.sqlite3"
    _three_releases(p)
    with Ledger.open(p) as led:
        assert led.verify().ok
    con = sqlite3.connect(p)
    con.execute(edit)
    con.commit()
    con.close()
    with Ledger.open(p) as led:
        res = led.verify()
    assert not res.ok and res.first_broken == broken, res


def test_cli_ledger_verify_and_show(tmp_path: Path, ldpt, private_dir: Path) -> None:
    default = private_dir / "ledger.sqlite3"
    res = ldpt("ledger", "verify")
    assert res.returncode == 2 and "no ledger at" in res.stderr and "Traceback" not in res.stderr
    _three_releases(default)
    res = ldpt("ledger", "verify")
    assert res.returncode == 0, res.stderr
    assert "chain intact over 3 release(s)" in res.stdout
    res = ldpt("ledger", "show", "--format", "json")
    assert res.returncode == 0, res.stderr
    s = json.loads(res.stdout)
    assert s["releases"] == 3 and s["subjects"] == 50 and "steward-only" in s["steward_only"]
    res = ldpt("ledger", "show")
    assert res.returncode == 0 and "STEWARD ONLY" in res.stdout and "staff-" not in res.stdout

    con = sqlite3.connect(default)
    con.execute("UPDATE subject_spend SET eps = eps + 1 WHERE release_id = 2")
    con.commit()
    con.close()
    res = ldpt("ledger", "verify", "--ledger", default)
    assert res.returncode == 1 and "BROKEN at release 2" in res.stdout

    junk = tmp_path / "junk.sqlite3"
    junk.write_bytes(b"\x00" * 4096)
    junk.chmod(0o600)
    res = ldpt("ledger", "show", "--ledger", junk)
    assert res.returncode == 2 and "is not an ldptransform ledger" in res.stderr and "Traceback" not in res.stderr


# -- two processes at once ---------------------------------------------------------------------

JOB = textwrap.dedent("""
    import json, sys, time
    from pathlib import Path
    import pyarrow as pa
    from ldptransform.errors import LdptError
    from ldptransform.keys import SecretKey
    from ldptransform.ledger import Ledger, ReleaseMeta, subject_hashes

    path, sync, job, eps, cap = sys.argv[1], Path(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4]), sys.argv[5]
    cap = None if cap == "none" else float(cap)
    key = SecretKey(bytes(range(200, 232)))
    h = subject_hashes(key, pa.array([f"staff-{i:05d}" for i in range(100)]))

    def barrier(name):
        (sync / f"{name}-{job}").touch()
        t0 = time.monotonic()
        while not all((sync / f"{name}-{j}").exists() for j in (1, 2)):
            if time.monotonic() - t0 > 60:
                sys.exit("barrier timed out")
            time.sleep(0.005)

    orig = Ledger._write_state
    def slow(self, rid, memo):  # hold the write lock a while, so the other job must wait
        time.sleep(1.0)
        orig(self, rid, memo)
    Ledger._write_state = slow

    out = {"job": job}
    with Ledger.open(path) as led:
        if cap is not None:
            out["plan_over"] = led.charge_plan(h, eps, cap).over_count
        barrier("ready")
        t0 = time.monotonic()
        try:
            out["id"] = led.record_release(ReleaseMeta("%064x" % job, "%064x" % (job + 10), "%032x" % job,
                                                       {"site": eps}), h, eps, lifetime_epsilon=cap)
        except LdptError as err:
            out["refused"] = str(err)
        out["seconds"] = time.monotonic() - t0
    print(json.dumps(out))
""")


def _run_two(tmp_path: Path, private_dir: Path, eps: float, cap: str) -> list[dict]:
    script = tmp_path / "job.py"
    script.write_text(JOB)
    sync = tmp_path / "sync"
    sync.mkdir()
    procs = [subprocess.Popen([sys.executable, str(script), str(tmp_path / "ledger.sqlite3"), str(sync), str(j),
                               str(eps), cap], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              env=cli_env(private_dir)) for j in (1, 2)]
    outs = []
    for p in procs:
        so, se = p.communicate(timeout=120)
        assert p.returncode == 0, se
        outs.append(json.loads(so))
    return sorted(outs, key=lambda o: o["job"])


def test_two_processes_record_at_once_one_waits(tmp_path: Path, private_dir: Path) -> None:
    with Ledger.open(tmp_path / "ledger.sqlite3"):
        pass  # created up front so both jobs only append
    outs = _run_two(tmp_path, private_dir, 0.75, "none")
    assert sorted(o["id"] for o in outs) == [1, 2]
    # each holds the lock >= 1 s; the one that went second waited for the first
    assert max(o["seconds"] for o in outs) >= 1.9, outs
    with Ledger.open(tmp_path / "ledger.sqlite3") as led:
        assert led.verify().ok
        s = led.show()
        assert s["releases"] == 2 and s["subjects"] == 100
        nonces = [r[0] for r in led._conn.execute("SELECT nonce FROM releases ORDER BY nonce")]
        assert nonces == [f"{1:032x}", f"{2:032x}"]
        np.testing.assert_allclose(led.spent(subject_hashes(KEY, ids(0, 100))), 1.5)


def test_two_processes_over_the_cap_together_exactly_one_refused(tmp_path: Path, private_dir: Path) -> None:
    path = tmp_path / "ledger.sqlite3"
    with Ledger.open(path) as led:
        led.record_release(meta(9), subject_hashes(KEY, ids(0, 100)), 0.5, lifetime_epsilon=1.5)
    outs = _run_two(tmp_path, private_dir, 0.6, "1.5")  # 0.5 + 0.6 fits; 0.5 + 0.6 + 0.6 does not
    assert [o["plan_over"] for o in outs] == [0, 0]  # each passed its own check before either recorded
    refused = [o for o in outs if "refused" in o]
    recorded = [o for o in outs if "id" in o]
    assert len(refused) == 1 and len(recorded) == 1 and recorded[0]["id"] == 2
    assert "100 subject(s) over the lifetime eps 1.5" in refused[0]["refused"]
    with Ledger.open(path) as led:
        assert led.verify().ok and led.show()["releases"] == 2
        np.testing.assert_allclose(led.spent(subject_hashes(KEY, ids(0, 100))), 1.1)


def test_a_lock_held_too_long_is_a_clear_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import ldptransform.ledger as ledger_mod

    path = tmp_path / "ledger.sqlite3"
    Ledger.open(path).close()
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")  # another job's write lock
    try:
        monkeypatch.setattr(ledger_mod, "BUSY_TIMEOUT_S", 0.2)
        with Ledger.open(path) as led:
            with pytest.raises(LedgerError, match="could not take the write lock"):
                led.record_release(meta(1), subject_hashes(KEY, ids(0, 5)), 1.0)
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    with Ledger.open(path) as led:
        assert led.show()["releases"] == 0 and led.verify().ok
