"""The spend ledger (ldptransform/ledger/) and `ldpt ledger show|verify`: keyed subject
hashes, opening and refusing files, spend and the lifetime cap, memoized state, rollback
of a failed record, the hash chain against hand edits, and two processes recording at once
(both succeed, one waits; or, together over the cap, exactly one is refused).
"""

from __future__ import annotations

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
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from conftest import FIXED_KEY_BYTES, cli_env
from ldptransform.errors import LdptError
from ldptransform.keys import SecretKey
from ldptransform.ledger import (DIGEST, BudgetExhaustedError, Ledger, LedgerError, ReleaseMeta, _decode_spend,
                                 _encode_spend, _Index, distinct, memo_value_hashes, subject_hashes, value_hashes)
from ldptransform.ledger.hashes import radix_order

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

def _aes(key: bytes, block: bytes) -> bytes:
    enc = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
    return enc.update(block) + enc.finalize()


def _one_digest(labels: tuple, message: bytes) -> bytes:
    """The keyed digest of one message computed on its own, block by block (the encrypted
    CBC-MAC of [u64 length || eight zero bytes] + message zero-padded): the reference the
    vectorized digests must equal."""
    chain, final = (KEY.subkey("ledger/v3", *labels, part) for part in ("chain", "final"))
    state = _aes(chain, len(message).to_bytes(8, "big") + bytes(8))
    padded = message + bytes(-len(message) % 16)
    for b in range(0, len(padded), 16):
        state = _aes(chain, bytes(x ^ y for x, y in zip(state, padded[b:b + 16])))
    return _aes(final, state)


def _one_memo_digest(column: str, context: bytes, subject: bytes, code: int) -> bytes:
    """The keyed digest of one (subject digest, value code) pair on its own: the CBC-MAC of the
    two blocks (eight zero bytes || big-endian i64 code, subject digest)."""
    k = KEY.subkey("ledger/v3", "memo-value", column, b"memo-context", context)
    first = _aes(k, bytes(8) + code.to_bytes(8, "big", signed=True))
    return _aes(k, bytes(x ^ y for x, y in zip(first, subject)))


def test_subject_hashes_are_keyed_digests_with_their_own_label() -> None:
    ids_ = ["42", "7", "", "person-0000000000000017", "n\u00e9e", "a-subject-of-exactly-32-bytes-..."]
    h = subject_hashes(KEY, pa.array(ids_))
    assert h.dtype == DIGEST and h.shape == (6,) and DIGEST.itemsize == 16
    raw = h.tobytes()
    for i, s in enumerate(ids_):
        assert raw[16 * i:16 * i + 16] == _one_digest(("subject",), s.encode())
    # identifiers of one length (the matrix path) hash as they do among others
    same_len = ["staff-00001", "staff-00002", "staff-00003"]
    for i, d in enumerate(np.frombuffer(subject_hashes(KEY, pa.array(same_len)).tobytes(), dtype="V16")):
        assert d.tobytes() == _one_digest(("subject",), same_len[i].encode())
    # the same identifier read as text or as a number is the same subject; a slice of a larger
    # array (non-zero Arrow offset) and a chunked array hash the same
    assert subject_hashes(KEY, pa.array([42, 7])).tobytes() == raw[:32]
    assert subject_hashes(KEY, np.array(["42", "7"])).tobytes() == raw[:32]
    assert subject_hashes(KEY, pa.array(ids_).slice(1, 3)).tobytes() == raw[16:64]
    assert subject_hashes(KEY, pa.chunked_array([ids_[:2], ids_[2:]])).tobytes() == raw
    assert subject_hashes(KEY, pa.array([], pa.string())).shape == (0,)
    # another key, or the value hash of a column, gives other digests (domain separation)
    assert subject_hashes(OTHER_KEY, pa.array([42])).tobytes() != raw[:16]
    v_site = value_hashes(KEY, "site", pa.array([42]))
    v_pay = value_hashes(KEY, "pay", pa.array([42]))
    assert v_site.tobytes() == _one_digest(("value", "site"), b"42")
    assert len({raw[:16], v_site.tobytes(), v_pay.tobytes()}) == 3


def test_memo_value_hashes_bind_subject_code_column_and_context() -> None:
    h = subject_hashes(KEY, ids(0, 4))
    for codes in (np.array([5, 0, 5, 2], dtype=np.int64), np.array([3, 3, -1, 2**40], dtype=np.int64)):
        got = memo_value_hashes(KEY, "site", b"ctx", h, codes).tobytes()  # codes in a short range, or not
        for i in range(4):
            assert got[16 * i:16 * i + 16] == _one_memo_digest("site", b"ctx", h.tobytes()[16 * i:16 * i + 16],
                                                               int(codes[i]))
    # two subjects with one value do not share a digest; another column or context gives others
    assert got[:16] != got[16:32]
    assert memo_value_hashes(KEY, "pay", b"ctx", h, codes).tobytes()[:16] != got[:16]
    assert memo_value_hashes(KEY, "site", b"other", h, codes).tobytes()[:16] != got[:16]
    assert memo_value_hashes(KEY, "site", b"ctx", h[:0], codes[:0]).shape == (0,)


def test_radix_order_is_the_stable_sorting_permutation() -> None:
    rng = np.random.default_rng(16)
    keys = rng.integers(0, 2**64, size=70_000, dtype=np.uint64)
    keys[::7] = keys[::7][0]  # many equal keys: their rows stay in order
    keys[1::11] = np.uint64(2**63 + 5)
    for k in (keys, keys[:1000], np.sort(keys), keys[::-1].copy()):
        np.testing.assert_array_equal(radix_order(k), np.argsort(k, kind="stable"))


def test_distinct_is_unique_with_inverse_also_for_shared_prefixes() -> None:
    h = subject_hashes(KEY, ids(0, 500))
    rep = np.concatenate([h[::-1], h[100:300], h[:5]])
    for arr in (rep, h, h[::-1]):
        uniq, inv = distinct(arr)
        want_u, want_inv = np.unique(arr, return_inverse=True)
        assert uniq.tobytes() == want_u.tobytes()
        np.testing.assert_array_equal(inv, want_inv.reshape(-1))
    raw = bytearray(h.tobytes())
    raw[16 * 7:16 * 7 + 8] = raw[16 * 3:16 * 3 + 8]  # subject 7 shares subject 3's prefix
    twins = np.frombuffer(bytes(raw), dtype=DIGEST)
    arr = np.concatenate([twins, twins[[3, 7, 3]]])
    uniq, inv = distinct(arr)
    assert len(uniq) == 500 and (uniq[inv] == arr).all()


def test_subject_hashes_refuse_missing_and_float_identifiers() -> None:
    with pytest.raises(LedgerError, match="1 value\\(s\\) are missing"):
        subject_hashes(KEY, pa.array(["a", None, "b"]))
    with pytest.raises(LedgerError, match="floating-point"):
        subject_hashes(KEY, pa.array([1.0, 2.0]))


def test_index_finds_digests_also_when_two_share_a_64_bit_prefix() -> None:
    """The registry index sorts by the first 8 bytes; digests sharing them must still be told
    apart (the exact fallback), and absent digests give -1."""
    h = subject_hashes(KEY, ids(0, 1000))
    idx = _Index(h)
    assert not idx.exact
    np.testing.assert_array_equal(idx.find(h[::-1]), np.arange(1000)[::-1])
    assert (idx.find(subject_hashes(KEY, ids(1000, 1100))) == -1).all()
    near = bytearray(h.tobytes()[:32])
    near[31] ^= 0xFF  # subject 1's prefix, another digest: every prefix is found, not every digest
    np.testing.assert_array_equal(idx.find(np.frombuffer(bytes(near), dtype=DIGEST)), [0, -1])
    raw = bytearray(h.tobytes())
    raw[16 * 7:16 * 7 + 8] = raw[16 * 3:16 * 3 + 8]  # subject 7 now shares subject 3's prefix
    twins = np.frombuffer(bytes(raw), dtype=DIGEST)
    idx = _Index(twins)
    assert idx.exact
    np.testing.assert_array_equal(idx.find(twins), np.arange(1000))
    fake = bytearray(raw[16 * 3:16 * 3 + 16])
    fake[15] ^= 0xFF  # same prefix as both, another digest
    assert idx.find(np.frombuffer(bytes(fake), dtype=DIGEST))[0] == -1


def test_the_registry_keeps_its_sorting_order_and_a_wrong_one_is_not_used(led: Ledger) -> None:
    """Each release that adds subjects stores the permutation that sorts the registry (merged,
    not sorted anew); an index given an order that does not sort the digests sorts them itself."""
    for n, (lo, hi) in enumerate([(0, 300), (200, 700), (650, 660), (0, 100)], start=1):
        led.record_release(meta(n), subject_hashes(KEY, ids(lo, hi)), 0.5)
    con = led._conn
    reg = np.frombuffer(b"".join(r[0] for r in con.execute(
        "SELECT data FROM arrays WHERE name = 'subjects' ORDER BY part")), dtype=DIGEST)
    order = np.frombuffer(b"".join(r[0] for r in con.execute(
        "SELECT data FROM arrays WHERE name = 'order' ORDER BY part")), dtype="<u4")
    assert len(reg) == 700
    np.testing.assert_array_equal(order, np.argsort(reg))
    wrong = order[::-1].copy()
    idx = _Index(reg, wrong)
    np.testing.assert_array_equal(idx.order, np.argsort(reg))
    np.testing.assert_array_equal(idx.find(reg[::-1]), np.arange(700)[::-1])
    assert Ledger.open(led.path, readonly=True).verify().ok


def test_memo_updates_must_be_charged_subjects_and_the_last_repeat_wins(led: Ledger) -> None:
    h = subject_hashes(KEY, ids(0, 10))
    vh = value_hashes(KEY, "site", pa.array([f"v{i}" for i in range(12)]))
    m = meta(1, site={"eps": 1.0, "memoized": True})
    with pytest.raises(LedgerError, match="1 subject\\(s\\) are not among the release's charged subjects"):
        led.record_release(m, h[:9], 1.0, {"site": (h, vh[:10])})
    assert led.show()["releases"] == 0
    rep = np.concatenate([h, h[2:4]])  # subjects 2 and 3 twice: their second values (v10, v11) stay
    led.record_release(m, h, 1.0, {"site": (rep, vh)})
    got = led.last_values("site", h)
    np.testing.assert_array_equal(got[[0, 1, 4]], vh[[0, 1, 4]])
    np.testing.assert_array_equal(got[[2, 3]], vh[[10, 11]])


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
    for version in (1, 2):  # ledgers of schemas 1 and 2 hashed subjects otherwise: never mixed
        old = tmp_path / f"old{version}.sqlite3"
        Ledger.open(old).close()
        con = sqlite3.connect(old)
        con.execute(f"PRAGMA user_version = {version}")
        con.close()
        before = old.read_bytes()
        with pytest.raises(LedgerError, match=f"schema version {version}; this ldptransform reads version 3\\. "
                                              ".*hash subjects differently"):
            Ledger.open(old)
        with pytest.raises(LedgerError, match=f"schema version {version}"):
            Ledger.open(old, readonly=True)
        assert old.read_bytes() == before  # refused before SQLite opens it: left as it is
    p.chmod(0o644)
    with pytest.raises(LedgerError, match="chmod 600"):
        Ledger.open(p)


# -- spend, cap, state --------------------------------------------------------------------------

def counted(fn, calls: list):
    def call():
        calls.append(1)
        return fn()
    return call


def test_a_record_uses_the_checked_state_only_while_nobody_has_written(tmp_path: Path, monkeypatch) -> None:
    """``record_release(checked=...)`` takes the state a read-only ledger read (the pre-pass's)
    instead of reading it again under the lock, but only while the file is the same one and no
    job has committed to it since: a stale state would hide the other job's spend from the cap."""
    path = tmp_path / "ledger.sqlite3"
    h = subject_hashes(KEY, ids(0, 50))
    with Ledger.open(path) as led:
        led.record_release(meta(1), h, 1.0, lifetime_epsilon=2.0)
    ro = Ledger.open(path, readonly=True)
    ro.check_state()
    with Ledger.open(path) as other:  # another job records after the pre-pass read the state
        other.record_release(meta(2), h[:10], 1.0, lifetime_epsilon=2.0)
    loads: list[int] = []
    with Ledger.open(path) as led:
        real = led._load
        monkeypatch.setattr(led, "_load", counted(real, loads))
        with pytest.raises(BudgetExhaustedError, match="take 10 subject\\(s\\) over"):
            led.record_release(meta(3), h, 0.5, lifetime_epsilon=2.0, checked=ro)
        assert loads  # the stale state was not used: read again under the lock
        ro.check_state()  # read again: nobody has written since
        loads.clear()
        assert led.record_release(meta(3), h[10:], 0.5, lifetime_epsilon=2.0, checked=ro) == 3
        assert not loads  # the checked state was used, not read again
    ro.close()
    with Ledger.open(path, readonly=True) as check:
        assert check.verify().ok
        np.testing.assert_allclose(check.spent(h), [2.0] * 10 + [1.5] * 40)
    # a file put in place of the one read (same bytes, another file) is read again
    ro = Ledger.open(path, readonly=True)
    ro.check_state()
    copy = tmp_path / "copy.sqlite3"
    copy.write_bytes(path.read_bytes())
    copy.chmod(0o600)
    os.replace(copy, path)
    loads.clear()
    with Ledger.open(path) as led:
        real = led._load
        monkeypatch.setattr(led, "_load", counted(real, loads))
        led.record_release(meta(4), h[10:20], 0.5, lifetime_epsilon=2.0, checked=ro)
    assert loads
    ro.close()


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
    assert got[20:].tobytes() == bytes(16)  # never seen: all-zero digest
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
    for label in (("subject",), ("value", "site")):  # nor the digests' keys
        for part in ("chain", "final"):
            k = KEY.subkey("ledger/v3", *label, part)
            assert k not in blob and k.hex().encode() not in blob


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

    def boom(self, name, data):  # runs after the release row, its spend and the registry were written
        raise RuntimeError("simulated crash mid-record")

    monkeypatch.setattr(Ledger, "_put", boom)
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
            h = subject_hashes(KEY, ids(10 * n, 10 * n + 30))
            vh = value_hashes(KEY, "site", pa.array([f"site-{n}"] * 30))
            led.record_release(meta(n, site={"eps": 0.5 * n, "memoized": True}), h, 0.5 * n, {"site": (h, vh)})


def _edit_spend(con: sqlite3.Connection, rid: int, change) -> None:
    """Rewrite release ``rid``'s spend blobs after ``change(ids, eps) -> (ids, eps)``."""
    ids, eps = _decode_spend(*con.execute("SELECT subject_ids, eps FROM release_spend WHERE release_id = ?",
                                          (rid,)).fetchone())
    ids, eps = change(ids.copy(), eps.copy())
    con.execute("UPDATE release_spend SET subject_ids = ?, eps = ? WHERE release_id = ?",
                (*_encode_spend(ids, eps), rid))


def _edit_array(con: sqlite3.Connection, name: str, change) -> None:
    data = bytearray(b"".join(r[0] for r in con.execute("SELECT data FROM arrays WHERE name = ? ORDER BY part",
                                                       (name,))))
    change(data)
    con.execute("DELETE FROM arrays WHERE name = ?", (name,))
    con.execute("INSERT INTO arrays VALUES (?, 0, ?)", (name, bytes(data)))


def _set_first_eps(ids, eps):
    eps[0] = 0.1
    return ids, eps


def _swap_registry(data: bytearray) -> None:
    data[0:16], data[16:32] = data[16:32], data[0:16]


def _zero_total(data: bytearray) -> None:
    data[0:8] = bytes(8)


def _change_state(data: bytearray) -> None:
    data[0] ^= 1


@pytest.mark.parametrize("edit, broken", [
    (lambda con: _edit_spend(con, 2, _set_first_eps), 2),
    ("UPDATE releases SET columns = '{\"site\":{\"eps\":0.1,\"memoized\":false}}' WHERE id = 2", 2),
    ("UPDATE releases SET time = '2020-01-01T00:00:00Z' WHERE id = 1", 1),
    (lambda con: _edit_spend(con, 3, lambda i, e: (i[1:], e[1:])), 3),  # one subject's charge removed
    ("UPDATE release_spend SET eps = x'00' WHERE release_id = 2", 2),  # not zlib data
    ("DELETE FROM release_spend WHERE release_id = 1", 1),
    ("DELETE FROM releases WHERE id = 2", 2),
    ("DELETE FROM releases WHERE id = 3", 3),  # the head still counts 3 releases
    ("INSERT INTO releases SELECT 4, time, policy_sha256, extract_sha256, nonce, columns, subjects_charged, "
     "lifetime_epsilon, state_sha256, row_hash, row_hash FROM releases WHERE id = 3", 4),
    (lambda con: _edit_array(con, "totals", _zero_total), None),
    (lambda con: _edit_array(con, "subjects", _swap_registry), None),
    (lambda con: _edit_array(con, "state:site", _change_state), None),
])
def test_hand_edits_break_the_chain(tmp_path: Path, edit, broken: int | None) -> None:
    p = tmp_path / "ledger.sqlite3"
    _three_releases(p)
    with Ledger.open(p) as led:
        assert led.verify().ok
    con = sqlite3.connect(p)
    con.execute(edit) if isinstance(edit, str) else edit(con)
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
    con.execute("UPDATE releases SET lifetime_epsilon = 99 WHERE id = 2")
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

    orig = Ledger._put
    def slow(self, name, data):  # hold the write lock a while, so the other job must wait
        time.sleep(1.0)
        orig(self, name, data)
    Ledger._put = slow

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
    import ldptransform.ledger.store as ledger_mod

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
