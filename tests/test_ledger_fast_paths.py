"""The ledger's fast paths give what the plain ones give: the registry search of input rows as
they come (counting-sorted by their top 16 bits), the distinct subjects worked out from the rows'
registry positions and the stored sorting order (no sort of people already registered), the
state overwritten in place on a night without new subjects (and rolled back with the rest of a
failed record), and the release's ledger work in a worker thread fed by the kernel, which
charges exactly what the pre-pass route charges.

Data: invented identifiers and numpy's seeded generator (inputs only); keys and nonces fixed.
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ldptransform.keys import SecretKey
from ldptransform.ledger import DIGEST, Ledger, LedgerError, ReleaseMeta, distinct, subject_hashes
from ldptransform.ledger import store as ledger_store
from ldptransform.policy import parse_policy
from ldptransform.release import privatize
from test_ledger_release import policy as ledger_release_policy

KEY = SecretKey(bytes(range(100, 132)))
COLOURS = ["red", "green", "blue", "white", "black"]


def meta(n: int) -> ReleaseMeta:
    return ReleaseMeta(policy_sha256=f"{n:064x}", extract_sha256=f"{n + 1000:064x}", nonce=f"{n:032x}",
                       columns={"site": 1.0}, time=f"2026-01-{n:02d}T00:00:00Z")


def names(idx: np.ndarray) -> list[str]:
    return [f"member-{i:06d}" for i in idx]


@pytest.fixture
def registered(tmp_path: Path) -> Ledger:
    """A ledger of 5,000 registered people (two releases, so the registry has two parts)."""
    path = tmp_path / "ledger.sqlite3"
    with Ledger.open(path) as led:
        led.record_release(meta(1), subject_hashes(KEY, names(np.arange(0, 3000))), 1.0)
        led.record_release(meta(2), subject_hashes(KEY, names(np.arange(2000, 5000))), 0.5)
    return Ledger.open(path, create=False, readonly=True)


@pytest.mark.parametrize("case", ["all registered, repeats, any order", "some new, some repeated", "all new",
                                  "one row", "no rows"])
def test_distinct_rows_is_distinct_and_positions_of_every_row(registered: Ledger, case: str) -> None:
    rng = np.random.default_rng(7)
    idx = {"all registered, repeats, any order": rng.integers(0, 5000, size=8000),
           "some new, some repeated": rng.integers(3000, 9000, size=6000),
           "all new": rng.integers(20_000, 30_000, size=3000),
           "one row": np.array([42]),
           "no rows": np.zeros(0, dtype=np.int64)}[case]
    h = subject_hashes(KEY, names(idx)) if len(idx) else np.zeros(0, dtype=DIGEST)
    with registered as led:
        row_pos = led.row_positions(h)
        uniq, inv, pos = led.distinct_rows(h, row_pos)
        want_u, want_inv = distinct(h)
        np.testing.assert_array_equal(uniq, want_u)
        np.testing.assert_array_equal(inv, want_inv)
        np.testing.assert_array_equal(pos, led.positions(want_u))
        np.testing.assert_array_equal(row_pos, led.positions(h))  # the per-row search, rows unsorted
        assert ((row_pos >= 0) == (idx < 5000)).all()


def _digests(words: np.ndarray) -> np.ndarray:
    """Digests from (n, 2) big-endian u64 words (the first is the 64-bit prefix)."""
    return np.ascontiguousarray(words.astype(">u8")).view(DIGEST).reshape(-1)


def test_distinct_rows_falls_back_to_sorting_when_a_new_digest_shares_a_stored_prefix() -> None:
    """Two different digests with one 64-bit prefix (about n^2 / 2^65 by chance; made here on
    purpose) cannot be ordered by their prefixes: both the registry search (an exact index) and
    the merge of new subjects fall back to sorting whole digests, with the same answers."""
    rng = np.random.default_rng(11)
    words = rng.integers(0, 2**63, size=(2000, 2), dtype=np.uint64)
    reg = _digests(words)
    index = ledger_store._Index(reg)
    assert not index.exact
    twin = words[[5, 9]].copy()
    twin[:, 1] ^= np.uint64(1)  # same prefix as two registered subjects, not the same digest
    fresh = rng.integers(0, 2**63, size=(50, 2), dtype=np.uint64)
    q = _digests(np.concatenate([words[rng.integers(0, 2000, size=3000)], twin, fresh, twin]))
    uniq, inv, pos = ledger_store._distinct_known(index, q, index.find(q))
    want_u, want_inv = distinct(q)
    np.testing.assert_array_equal(uniq, want_u)
    np.testing.assert_array_equal(inv, want_inv)
    np.testing.assert_array_equal(pos, index.find(want_u))
    exact = ledger_store._Index(np.concatenate([reg, _digests(twin)]))  # the registry holds the twins itself
    assert exact.exact
    u2, inv2, pos2 = ledger_store._distinct_known(exact, q, exact.find(q))
    np.testing.assert_array_equal(u2, want_u)
    np.testing.assert_array_equal(inv2, want_inv)
    np.testing.assert_array_equal(pos2, exact.find(want_u))


def test_the_index_finds_unsorted_queries_as_a_dictionary_does() -> None:
    rng = np.random.default_rng(5)
    reg = _digests(rng.integers(0, 2**63, size=(70_000, 2), dtype=np.uint64))  # above one 16-bit bucket each
    index = ledger_store._Index(reg)
    absent = _digests(rng.integers(0, 2**63, size=(5000, 2), dtype=np.uint64))
    q = np.concatenate([reg[rng.permutation(70_000)[:40_000]], absent])[rng.permutation(45_000)]
    where = {d: i for i, d in enumerate(reg.tolist())}
    np.testing.assert_array_equal(index.find(q), [where.get(d, -1) for d in q.tolist()])


def _state_rows(path: Path) -> dict[str, list[tuple[int, int, bytes]]]:
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as c:
        out: dict[str, list[tuple[int, int, bytes]]] = {}
        for name, part, rowid, data in c.execute("SELECT name, part, rowid, data FROM arrays ORDER BY name, part"):
            out.setdefault(name, []).append((part, rowid, data))
    return out


def test_a_night_without_new_subjects_overwrites_the_state_in_place_and_a_failed_record_undoes_it(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "ledger.sqlite3"
    h = subject_hashes(KEY, names(np.arange(4000)))
    with Ledger.open(path) as led:
        led.record_release(meta(1), h, 1.0)
    before = _state_rows(path)
    with Ledger.open(path) as led:
        led.record_release(meta(2), h[::-1], 0.25)  # the same people: same sizes, rewritten where they are
    after = _state_rows(path)
    assert [(p, r) for p, r, _ in after["totals"]] == [(p, r) for p, r, _ in before["totals"]]  # same rows
    assert after["totals"][0][2] != before["totals"][0][2]
    with Ledger.open(path, readonly=True) as led:
        assert led.verify().ok
        np.testing.assert_allclose(led.spent(h), 1.25)

    def fail(*args: Any, **kwargs: Any) -> str:
        raise OSError(5, "Input/output error")  # after the state was overwritten, before the row

    monkeypatch.setattr(Ledger, "_write_row", fail)
    with Ledger.open(path) as led, pytest.raises(OSError):
        led.record_release(meta(3), h, 0.5)
    monkeypatch.undo()
    assert _state_rows(path) == after
    with Ledger.open(path, readonly=True) as led:
        assert led.verify().ok
        np.testing.assert_allclose(led.spent(h), 1.25)


def _people(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # invented input data only, never release noise
    return pd.DataFrame({"person": names(rng.permutation(n) % (n - n // 10)),  # some people on two rows
                         "colour": rng.choice(COLOURS, size=n),
                         "score": np.round(rng.uniform(0, 100, size=n), 2),
                         "hours": np.round(rng.uniform(0, 60, size=n), 1)})


def _policy(strategy: str) -> dict[str, Any]:
    """The ledger release tests' policy (a lifetime budget nobody reaches here), shuffled output."""
    pol = ledger_release_policy(cap=100.0)
    del pol["output"]
    if strategy == "sample":
        pol["budget"].update({"epsilon_per_row": 2.0, "strategy": "sample", "sample_columns": 2})
        for c in pol["columns"].values():
            c.pop("epsilon")
    return pol


def _spend_and_state(path: Path) -> tuple[Any, ...]:
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as c:
        spend = c.execute("SELECT subject_ids, eps FROM release_spend ORDER BY release_id DESC LIMIT 1").fetchone()
        state = c.execute("SELECT name, part, data FROM arrays ORDER BY name, part").fetchall()
        charged = c.execute("SELECT subjects_charged, state_sha256 FROM releases ORDER BY id DESC LIMIT 1").fetchone()
    return spend, state, charged


@pytest.mark.parametrize("night", [1, 2])
@pytest.mark.parametrize("strategy", ["split", "sample"])
def test_the_worker_fed_by_the_kernel_charges_what_the_pre_pass_charges(tmp_path: Path, private_dir: Path,
                                                                         monkeypatch: pytest.MonkeyPatch,
                                                                         strategy: str, night: int) -> None:
    """A release against the same ledger (night 2; night 1: no ledger yet), once as a release is
    normally made (the ledger's work in a worker thread, fed by the kernel's subjects and value
    codes, batch by batch, the record prepared there beside the shuffle's second pass) and once
    through the pre-pass of --allow-partial (nobody is over the budget, so nobody is held back;
    worked out in the release's thread): the same spend, the same state, the same state digest;
    and the ledger verifies.  Both under one nonce (which rows report which column under sample
    depends on it), each with a private folder (so a nonce record) of its own."""
    pol = parse_policy(_policy(strategy), "fast-paths.yaml")
    night1, night2 = _people(3000, 1), _people(3000, 1)
    night2.loc[night2.index % 7 == 0, "colour"] = "red"
    for name, df in (("night1", night1), ("night2", night2)):
        df.to_csv(tmp_path / f"{name}.csv", index=False)
    base = private_dir / "base.sqlite3"
    if night == 2:
        privatize(tmp_path / "night1.csv", pol, KEY, tmp_path / "n1.parquet", nonce="1" * 32, ledger_path=base)
    got = {}
    for route, partial in (("folded", False), ("pre-pass", True)):
        own = private_dir / route
        own.mkdir(mode=0o700)
        monkeypatch.setenv("LDPT_PRIVATE_DIR", str(own))
        led = own / "ledger.sqlite3"
        if night == 2:
            shutil.copy2(base, led)
        r = privatize(tmp_path / f"night{night}.csv", pol, KEY, tmp_path / f"n2-{route}.parquet", nonce="2" * 32,
                      ledger_path=led, batch_rows=700, allow_partial=partial)
        assert r.ledger_release_id == night and r.held_back_subjects == 0
        with Ledger.open(led, readonly=True) as check:
            assert check.verify().ok
        got[route] = _spend_and_state(led)
    assert got["folded"] == got["pre-pass"]


def test_a_record_prepared_ahead_is_used_only_on_the_state_it_was_prepared_on(tmp_path: Path,
                                                                              monkeypatch: pytest.MonkeyPatch) -> None:
    """``prepare_record`` works out the record on the checked state; the record uses it when the
    state under its lock is that one and it is given the very same arguments; when another job
    recorded in between, or other arguments are given, it works the record out again."""
    path = tmp_path / "ledger.sqlite3"
    h = subject_hashes(KEY, names(np.arange(3000)))
    with Ledger.open(path) as led:
        led.record_release(meta(1), h, 1.0)
    with Ledger.open(path, readonly=True) as ro, pytest.raises(LedgerError, match="check_state"):
        ro.prepare_record(h, 0.5)
    calls: list[str] = []
    real = ledger_store._next_state

    def counted(*args: Any) -> Any:
        calls.append("worked out")
        return real(*args)

    monkeypatch.setattr(ledger_store, "_next_state", counted)
    # used: nothing recorded since, the same objects
    ro = Ledger.open(path, readonly=True)
    ro.check_state()
    ready = ro.prepare_record(h, 0.5)
    assert calls == ["worked out"]
    with Ledger.open(path) as led:
        led.record_release(meta(2), h, 0.5, checked=ro, prepared=ready)
    assert calls == ["worked out"]
    ro.close()
    # not used: another job recorded after it was prepared
    ro = Ledger.open(path, readonly=True)
    ro.check_state()
    ready = ro.prepare_record(h, 0.25)
    with Ledger.open(path) as other:
        other.record_release(meta(3), h[:100], 2.0)
    with Ledger.open(path) as led:
        led.record_release(meta(4), h, 0.25, checked=ro, prepared=ready)
    assert calls == ["worked out"] * 4
    ro.close()
    # not used: other arguments than it was made of
    ro = Ledger.open(path, readonly=True)
    ro.check_state()
    ready = ro.prepare_record(h, 0.25)
    with Ledger.open(path) as led:
        led.record_release(meta(5), h.copy(), 0.25, checked=ro, prepared=ready)
    assert calls == ["worked out"] * 6
    ro.close()
    monkeypatch.undo()
    with Ledger.open(path, readonly=True) as led:
        assert led.verify().ok
        want = np.full(3000, 1.0 + 0.5 + 0.25 + 0.25)
        want[:100] += 2.0
        np.testing.assert_allclose(led.spent(h), want)


def test_a_shuffled_release_works_out_its_record_beside_the_second_pass(tmp_path: Path, private_dir: Path,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """With the default (shuffled) row order, the ledger's worker works out the charges and the
    record's new state once the rows are privatized, while the release writes them out; the
    record then only writes (the new state is not worked out in the release's own thread), on
    the first night (no ledger yet) as on the next."""
    import threading

    pol = parse_policy(_policy("split"), "fast-paths.yaml")
    df = _people(2000, 4)
    df.to_csv(tmp_path / "night.csv", index=False)
    led = private_dir / "ledger.sqlite3"
    where: list[str] = []
    real = ledger_store._next_state

    def seen(*args: Any) -> Any:
        where.append("main" if threading.current_thread() is threading.main_thread() else "worker")
        return real(*args)

    monkeypatch.setattr(ledger_store, "_next_state", seen)
    r = privatize(tmp_path / "night.csv", pol, KEY, tmp_path / "n1.parquet", nonce="1" * 32, ledger_path=led)
    assert r.ledger_release_id == 1 and where == ["worker"]  # the first release, the ledger made by its record
    r = privatize(tmp_path / "night.csv", pol, KEY, tmp_path / "n2.parquet", nonce="2" * 32, ledger_path=led)
    assert r.ledger_release_id == 2 and where == ["worker", "worker"]
    monkeypatch.undo()
    with Ledger.open(led, readonly=True) as check:
        assert check.verify().ok
        rows = df.groupby("person").size()
        once = sorted(rows[rows == 1].index)
        # night 1 charges every column (3 x eps 1); night 2 the fresh column only, as the memoized
        # values of a person with one row are the ones recorded
        np.testing.assert_allclose(check.spent(subject_hashes(KEY, once)), 4.0)
