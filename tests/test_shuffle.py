"""The keyed shuffle of an extract's rows (policy output.row_order: shuffled, the default).

What is checked: the extract is the as-input extract's rows (same key and nonce) in the order
of the row tags, computed here independently with AES from the published construction; the
order is the same whatever the batch size, the spill sizes, the output layout; it does not
depend on the data; it differs with the nonce; the partner's neighbour attack on a sorted
input gains nothing; public dictionaries hold only released values; the spill files are
private and removed; the manifest records the order.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from ldptransform.keys import SecretKey
from ldptransform.policy import parse_policy
from ldptransform.release import privatize, shuffle

KEY = SecretKey(bytes(range(32)))
NONCE = "5a" * 16
DEMO_CSV = Path(__file__).resolve().parents[1] / "demo_data" / "staff_survey.csv"
SITES = ["North Works", "Riverside", "Old Mill", "Harbour Lab", "Head Office"]


def table(n: int, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # synthetic test data only
    return pd.DataFrame({
        "rowid": np.arange(n),
        "site": rng.choice(SITES, size=n),
        "hours": np.round(rng.uniform(0, 60, size=n), 1),
        "band": rng.choice(["a", "b", "c"], size=n),
    })


def policy(order: str | None = None, **extra: Any) -> Any:
    p: dict[str, Any] = {
        "budget": {"epsilon_per_row": 3.0},
        "columns": {
            "rowid": {"type": "public"},
            "site": {"type": "categorical", "categories": SITES, "epsilon": 1.0, "mechanism": "oue"},
            "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0, "mechanism": "piecewise"},
            "band": {"type": "categorical", "categories": ["a", "b", "c"], "epsilon": 1.0, "mechanism": "grr"},
        },
    }
    if order is not None:
        p["output"] = {"row_order": order}
    p.update(extra)
    return parse_policy(p, "shuffle-test.yaml")


def release(raw: Path, pol: Any, out: Path, nonce: str = NONCE, **kw: Any) -> Any:
    return privatize(raw, pol, KEY, out, nonce=nonce, **kw)  # diagnostics: the test's private folder


@pytest.fixture
def raw(tmp_path: Path) -> Path:
    path = tmp_path / "raw.parquet"
    table(5000).to_parquet(path, index=False)
    return path


def reference_tags(n: int, nonce: str) -> np.ndarray:
    """Row r's tag: the first 8 bytes (little-endian) of AES-256(sub-key, r as a 128-bit
    big-endian counter block), the sub-key HMAC-SHA256 of the key over the nonce and the label
    "row-order" (the keyed stream's construction, docs/architecture.md), computed here directly."""
    sub = KEY.subkey(bytes.fromhex(nonce), "row-order")
    blocks = b"".join(r.to_bytes(16, "big") for r in range(n))
    enc = Cipher(algorithms.AES(sub), modes.ECB()).encryptor()
    out = enc.update(blocks) + enc.finalize()
    return np.frombuffer(out, dtype="<u8").reshape(n, 2)[:, 0]


def test_the_extract_is_the_rows_in_the_order_of_their_keyed_tags(raw: Path, tmp_path: Path,
                                                                  other_steward: Any) -> None:
    kept = release(raw, policy("as-input"), tmp_path / "kept.parquet")
    other_steward()  # the same noise under another policy, on purpose: one steward's nonce record refuses it
    shuf = release(raw, policy(), tmp_path / "shuf.parquet")
    a = pd.read_parquet(tmp_path / "kept.parquet")
    b = pd.read_parquet(tmp_path / "shuf.parquet")
    assert (a["rowid"] == np.arange(5000)).all()
    order = np.argsort(reference_tags(5000, NONCE), kind="stable")
    np.testing.assert_array_equal(b["rowid"].to_numpy(), order)
    # every row's reports travel with it: the shuffled extract is the kept one, permuted
    pd.testing.assert_frame_equal(b.astype(str), a.iloc[order].reset_index(drop=True).astype(str))
    assert shuf.manifest.privacy.row_order == "shuffled" and kept.manifest.privacy.row_order == "as-input"
    assert "neighbours" in (kept.manifest.privacy.row_order_note or "")
    assert shuf.manifest.policy_sha256 != kept.manifest.policy_sha256


def test_the_order_is_the_same_for_every_batch_size_spill_size_and_layout(raw: Path, tmp_path: Path,
                                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    pol = policy()
    ref = release(raw, pol, tmp_path / "ref.parquet")
    for i, rows in enumerate((7, 999)):
        assert release(raw, pol, tmp_path / f"b{i}.parquet", batch_rows=rows).manifest.extract.sha256 == \
            ref.manifest.extract.sha256
    # spilled runs, small chunks and windows: the external sort gives the in-memory sort's bytes
    monkeypatch.setattr(shuffle, "RUN_ROWS", 1000)
    monkeypatch.setattr(shuffle, "WINDOW_ROWS", 700)
    monkeypatch.setattr(shuffle.windows, "__defaults__", (700,))
    spilled = release(raw, pol, tmp_path / "spilled.parquet", batch_rows=333)
    assert spilled.manifest.extract.sha256 == ref.manifest.extract.sha256
    # a dataset of parts: shuffled across all parts, parts of fragment_rows rows by rank
    ds = release(raw, pol, tmp_path / "ds", fragment_rows=1200)
    assert ds.manifest.extract.parts is not None
    assert [p.rows for p in ds.manifest.extract.parts] == [1200, 1200, 1200, 1200, 200]
    assert pq.read_table(tmp_path / "ds").equals(pq.read_table(tmp_path / "ref.parquet"))
    # CSV output: the same rows in the same order
    release(raw, pol, tmp_path / "ref_csv.csv")
    assert (pd.read_csv(tmp_path / "ref_csv.csv")["rowid"] == pd.read_parquet(tmp_path / "ref.parquet")["rowid"]).all()
    # nothing of the spill is left beside the outputs
    assert not [p for p in tmp_path.iterdir() if "row-order" in p.name]


def test_the_order_does_not_depend_on_the_data_and_changes_with_the_nonce(tmp_path: Path,
                                                                         other_steward: Any) -> None:
    rows = {}
    for name, seed, nonce in (("a", 1, NONCE), ("b", 2, NONCE), ("c", 1, "77" * 16)):
        other_steward()  # other data under the same nonce, on purpose
        path = tmp_path / f"{name}.parquet"
        table(4000, seed).to_parquet(path, index=False)
        release(path, policy(), tmp_path / f"out-{name}.parquet", nonce=nonce)
        rows[name] = pd.read_parquet(tmp_path / f"out-{name}.parquet")["rowid"].to_numpy()
    np.testing.assert_array_equal(rows["a"], rows["b"])  # other data, same key, nonce and size: same order
    assert (rows["a"] != rows["c"]).mean() > 0.99      # another nonce: another order
    # no trace of the input order: rank correlation of position and input row within 4 standard errors
    rho = np.corrcoef(np.arange(4000), rows["a"])[0, 1]
    assert abs(rho) < 4 / np.sqrt(4000), rho


def test_neighbours_of_a_sorted_input_tell_nothing_once_shuffled(tmp_path: Path, other_steward: Any) -> None:
    """The row-order attack: the demo survey exported sorted by site, site randomized by k-ary
    randomized response at eps 1.  A partner guesses each row's site from its own report, or
    from the majority of the reports of its 301 neighbours.  In input order the neighbours give
    the site away (measured about 97% correct); shuffled, their majority is no better than the
    row's own report (at most 1 percentage point above it).  Fixed key and nonce."""
    df = pd.read_csv(DEMO_CSV).sort_values("site", kind="stable").reset_index(drop=True)
    raw = tmp_path / "sorted.csv"
    df.to_csv(raw, index=False)
    truth_of = df.set_index("staff_id")["site"]
    found = {}
    for order in ("as-input", "shuffled"):
        other_steward()  # the same nonce for both orders, on purpose
        pol = parse_policy({"budget": {"epsilon_per_row": 1.0}, "unlisted": "drop", "output": {"row_order": order},
                            "columns": {"site": {"type": "categorical", "categories": SITES, "epsilon": 1.0,
                                                 "mechanism": "grr", "unknown": "as-category"},
                                        "staff_id": {"type": "public"}}}, "attack.yaml")
        release(raw, pol, tmp_path / f"{order}.parquet")
        ex = pd.read_parquet(tmp_path / f"{order}.parquet")
        truth = truth_of.loc[ex["staff_id"]].to_numpy()
        rep = ex["site"].astype(str).to_numpy()
        labels, codes = np.unique(rep, return_inverse=True)
        cum = np.vstack([np.zeros(len(labels)), np.cumsum(np.eye(len(labels))[codes], axis=0)])
        i = np.arange(len(rep))
        lo, hi = np.clip(i - 150, 0, len(rep)), np.clip(i + 151, 0, len(rep))
        majority = labels[np.argmax(cum[hi] - cum[lo], axis=1)]
        found[order] = (float((rep == truth).mean()), float((majority == truth).mean()))
    print("row-order attack (own report, neighbour majority):", found)
    own, neighbours = found["shuffled"]
    assert found["as-input"][1] > 0.9  # the attack works on the input's order
    assert neighbours <= own + 0.01, found


def test_a_public_dictionary_column_carries_only_released_values(tmp_path: Path, other_steward: Any) -> None:
    """A Parquet dictionary column whose dictionary lists values no row holds: the extract's
    dictionary is rebuilt from the released rows (shuffled or not)."""
    n = 3000
    df = table(n)
    team = pa.DictionaryArray.from_arrays(pa.array(np.arange(n) % 3, pa.int32()),
                                          pa.array(["red", "green", "blue", "never-used", "ex-staff-only"]))
    t = pa.Table.from_pandas(df, preserve_index=False).append_column("team", team)
    raw = tmp_path / "dict.parquet"
    pq.write_table(t, raw, row_group_size=1000)
    for order in ("shuffled", "as-input"):
        other_steward()
        pol = policy(order)
        cols = {**pol.policy.canonical()["columns"], "team": {"type": "public"}}
        pol = parse_policy({**pol.policy.canonical(), "columns": cols}, "dict.yaml")
        release(raw, pol, tmp_path / f"{order}.parquet")
        out = pq.read_table(tmp_path / f"{order}.parquet").column("team")
        assert pa.types.is_dictionary(out.type)
        seen = set()
        for chunk in out.chunks:
            seen |= set(chunk.dictionary.to_pylist())
        assert seen == {"red", "green", "blue"}, (order, seen)
        raw_bytes = (tmp_path / f"{order}.parquet").read_bytes()
        assert b"never-used" not in raw_bytes and b"ex-staff-only" not in raw_bytes


def test_spilled_runs_are_private_while_they_exist_and_removed_after(raw: Path, tmp_path: Path,
                                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(shuffle, "RUN_ROWS", 1000)
    modes_seen: list[int] = []
    real = shuffle.RunWriter._spill

    def spy(self: Any) -> None:
        real(self)
        assert self.folder is not None
        modes_seen.append(os.stat(self.folder).st_mode & 0o777)
        assert all((os.stat(p).st_mode & 0o077) == 0 or p.is_file() for p in self.folder.iterdir())

    monkeypatch.setattr(shuffle.RunWriter, "_spill", spy)
    release(raw, policy(), tmp_path / "x.parquet")
    assert modes_seen and set(modes_seen) == {0o700}
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith("raw")) == \
        ["x.manifest.json", "x.parquet"]


def test_a_stop_during_the_shuffle_leaves_nothing(raw: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(shuffle, "RUN_ROWS", 1000)

    def boom(*a: Any, **k: Any) -> Any:
        raise KeyboardInterrupt("stopped")

    monkeypatch.setattr(shuffle, "read_window", boom)
    with pytest.raises(KeyboardInterrupt):
        release(raw, policy(), tmp_path / "x.parquet")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["raw.parquet"]


def test_the_cli_shows_the_row_order(tmp_path: Path, ldpt: Any) -> None:
    raw = tmp_path / "raw.csv"
    table(300).to_csv(raw, index=False)
    key = tmp_path / "k.key"
    assert ldpt("key", "new", key).returncode == 0
    for order in ("shuffled", "as-input"):
        pol = policy(order).policy.canonical()
        pfile = tmp_path / f"{order}.json"
        pfile.write_text(json.dumps(pol))
        r = ldpt("privatize", raw, "--policy", pfile, "--key", key, "--out", tmp_path / f"{order}.parquet")
        assert r.returncode == 0, r.stderr
        man = json.loads((tmp_path / f"{order}.manifest.json").read_text())
        assert man["privacy"]["row_order"] == order
        if order == "as-input":
            assert "input's order" in r.stderr
        else:
            assert "input's order" not in r.stderr
        check = ldpt("policy", "check", pfile)
        assert check.returncode == 0 and f"output: rows {order}" in check.stdout
        assert ("CAUTION" in check.stdout) == (order == "as-input")


def test_validate_reproduces_shuffled_releases_and_input_order_ones_from_before_the_shuffle(raw: Path,
                                                                                           tmp_path: Path) -> None:
    """The steward's re-derivation follows the manifest: a shuffled release, and a manifest
    written before the shuffle existed (no output section, no privacy.row_order: input order)."""
    from ldptransform.validate import validate

    release(raw, policy(), tmp_path / "s.parquet", nonce="1f" * 16)
    rep = validate(tmp_path / "s.parquet", raw=raw, key=KEY)
    assert {c.name: c.ok for c in rep.checks}["reproduced"] is True
    release(raw, policy("as-input"), tmp_path / "old.parquet", nonce="2f" * 16)
    man_path = tmp_path / "old.manifest.json"
    man = json.loads(man_path.read_text())
    del man["policy"]["output"], man["privacy"]["row_order"], man["privacy"]["row_order_note"]
    man["privacy"].pop("central", None)
    man_path.write_text(json.dumps(man))
    rep = validate(tmp_path / "old.parquet", man_path, raw=raw, key=KEY)
    assert {c.name: c.ok for c in rep.checks}["reproduced"] is True


def test_external_sort_orders_by_full_tag_with_ties_in_input_order(tmp_path: Path,
                                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    """Runs are only grouped by tag bucket (a radix sort); the windows sort by the full tag.
    With many equal tags and equal buckets forced, spread over several spilled runs and windows,
    the rows still come out as a stable sort of the tags (equal tags in input-row order)."""
    monkeypatch.setattr(shuffle, "RUN_ROWS", 500)
    rng = np.random.default_rng(5)
    n = 3000
    # few distinct buckets and many exact duplicates, so ties occur within and across runs
    top = rng.integers(0, 4, n).astype(np.uint64) << np.uint64(62)
    tags = top | rng.integers(0, 50, n).astype(np.uint64)
    schema = pa.schema([pa.field("row", pa.int64()), pa.field("s", pa.string())])
    writer = shuffle.RunWriter(schema, tmp_path, "t")
    for s in range(0, n, 170):
        e = min(n, s + 170)
        batch = pa.record_batch([pa.array(np.arange(s, e)), pa.array([f"r{i}" for i in range(s, e)])], schema=schema)
        writer.add(batch, tags[s:e])
    runs = writer.finish(in_memory=False)
    assert len(runs.runs) >= 6
    wins = shuffle.windows(runs, target=400)
    assert len(wins) >= 4
    got = pa.concat_tables([shuffle.read_window(runs, w, schema) for w in wins])
    runs.close()
    expected = np.argsort(tags, kind="stable")
    np.testing.assert_array_equal(got.column("row").to_numpy(), expected)
    assert got.column("s").to_pylist() == [f"r{i}" for i in expected]


def test_window_cut_finds_rows_of_a_bucket_whatever_their_order_inside_it(tmp_path: Path,
                                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    """A chunk that starts exactly at a bucket's first tag, after a chunk that starts later
    inside the same bucket (runs are only grouped by bucket): the window still reads both."""
    monkeypatch.setattr(shuffle, "CHUNK_ROWS", 4)
    b = np.uint64(7) << shuffle._BUCKET_SHIFT
    # one run of bucket 7 rows and then bucket 8: its chunks start at b + 9, at b exactly, at bucket 8
    tags = np.concatenate([b + np.array([9, 5, 6, 7, 0, 1, 2, 3], dtype=np.uint64),
                           (np.uint64(8) << shuffle._BUCKET_SHIFT) + np.array([4, 1, 3, 2], dtype=np.uint64)])
    schema = pa.schema([pa.field("row", pa.int64())])
    writer = shuffle.RunWriter(schema, tmp_path, "c")
    monkeypatch.setattr(shuffle, "RUN_ROWS", len(tags))
    writer.add(pa.record_batch([pa.array(np.arange(len(tags)))], schema=schema), tags)
    runs = writer.finish(in_memory=False)
    got = np.concatenate([shuffle.read_window(runs, w, schema).column("row").to_numpy()
                          for w in shuffle.windows(runs, target=1)])
    runs.close()
    np.testing.assert_array_equal(got, np.argsort(tags, kind="stable"))
