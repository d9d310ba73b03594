"""A pandas DataFrame, a pyarrow Table and a RecordBatchReader as the input of a release
(ldptransform/memory.py), and a release returned in memory (``privatize_to_memory``).

The reference is always the file route: the same typed rows written as a Parquet file and
released with the same key and nonce (inside ``nonces.rederiving()``, so the two routes' nonce
records do not meet).  Every comparison is of bytes: extract files, dataset parts, ledger spend.
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from ldptransform import InMemoryRelease, privatize_to_memory
from ldptransform import memory as memory_mod
from ldptransform.errors import DataError, OptionError, UsageError
from ldptransform.keys import SecretKey
from ldptransform.ledger import BudgetExhaustedError, Ledger, subject_hashes
from ldptransform.policy import LoadedPolicy, parse_policy
from ldptransform.release import nonces, privatize

KEY = SecretKey(bytes(range(40, 72)))
NONCE = "0f1e2d3c4b5a69788796a5b4c3d2e1f0"
COLOURS = ["red", "green", "blue", "white"]
N = 900
SCHEMA = pa.schema([("person", pa.string()), ("colour", pa.string()), ("score", pa.float64()),
                    ("visits", pa.int64()), ("remote", pa.bool_()), ("wave", pa.string())])


def rows(n: int = N, seed: int = 5) -> pd.DataFrame:
    """Invented rows (test data only, never release noise), with missing values in most columns."""
    rng = np.random.default_rng(seed)
    colour = rng.choice(COLOURS, size=n).astype(object)
    colour[rng.random(n) < 0.1] = None
    score = np.round(rng.uniform(0, 100, size=n), 2)
    score[rng.random(n) < 0.1] = np.nan
    remote = rng.random(n) < 0.5
    return pd.DataFrame({
        "person": pd.Series([f"p-{i:05d}" for i in range(n)], dtype=object),
        "colour": pd.Series(colour, dtype=object),
        "score": score,
        "visits": rng.integers(0, 20, size=n),
        "remote": pd.Series(remote, dtype=object),
        "wave": pd.Series(rng.choice(["2026-a", "2026-b"], size=n), dtype=object),
    })


def policy_dict(order: str = "shuffled", cap: float | None = None, memoize: bool = False) -> dict[str, Any]:
    p: dict[str, Any] = {
        "budget": {"epsilon_per_row": 4.0},
        "subject_key": "person",
        "output": {"row_order": order},
        "unlisted": "error",
        "columns": {
            "colour": {"type": "categorical", "categories": list(COLOURS), "epsilon": 1.0, "mechanism": "grr",
                       "missing": "as-category", "memoize": memoize},
            "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": "hybrid",
                      "missing": {"fill": 50}},
            "visits": {"type": "numeric", "bounds": [0, 20], "epsilon": 1.0, "missing": {"fill": 3}},
            "remote": {"type": "public"},
            "wave": {"type": "public"},
        },
    }
    if cap is not None:
        p["budget"]["lifetime_epsilon"] = cap
    return p


def policy(**kw: Any) -> LoadedPolicy:
    return parse_policy(policy_dict(**kw), "memory-io.yaml")


def arrow(df: pd.DataFrame) -> pa.Table:
    """The rows as the typed table a Parquet file of them holds."""
    return pa.Table.from_pandas(df, schema=SCHEMA, preserve_index=False).replace_schema_metadata(None)


def as_input(df: pd.DataFrame, kind: str) -> Any:
    if kind == "pandas":
        return df
    table = arrow(df)
    if kind == "table":
        return table
    return pa.RecordBatchReader.from_batches(table.schema, table.to_batches(max_chunksize=97))


def steward(tmp: Path) -> Path:
    d = tmp / "steward"
    d.mkdir(mode=0o700, exist_ok=True)
    return d


def release(inp: Any, pol: LoadedPolicy, tmp: Path, name: str, **kw: Any) -> Any:
    (tmp / name).parent.mkdir(exist_ok=True)
    return privatize(inp, pol, KEY, tmp / name, nonce=NONCE, batch_rows=128, fragment_rows=300,
                     diagnostics_path=steward(tmp) / f"{name.replace('/', '_')}.diag.json", **kw)


def reference(df: pd.DataFrame, pol: LoadedPolicy, tmp: Path, name: str, **kw: Any) -> Any:
    """The file route: the typed rows as a Parquet file, released with the same key and nonce."""
    raw = tmp / "ref-input.parquet"
    if not raw.exists():
        pq.write_table(arrow(df), raw, row_group_size=100)  # parts of a dataset follow its row groups
    with nonces.rederiving():
        return release(raw, pol, tmp, name, **kw)


def extract_bytes(path: Path) -> list[bytes]:
    if path.is_dir():
        return [p.read_bytes() for p in sorted(path.iterdir())]
    return [path.read_bytes()]


@pytest.fixture(autouse=True)
def _small_chunks(monkeypatch: pytest.MonkeyPatch) -> None:
    """Chunks of 250 rows, so the inputs' chunk boundaries fall inside batches and parts."""
    monkeypatch.setattr(memory_mod, "CHUNK_ROWS", 250)


SHAPES = [("out.parquet", "shuffled"), ("out.parquet", "as-input"), ("out.csv", "shuffled"), ("out.csv", "as-input"),
          ("folder", "shuffled"), ("folder", "as-input")]


@pytest.mark.parametrize("kind", ["pandas", "table", "reader"])
@pytest.mark.parametrize(("out", "order"), SHAPES)
def test_same_extract_bytes_as_the_file_route(tmp_path: Path, kind: str, out: str, order: str) -> None:
    df = rows()
    pol = policy(order=order)
    ref = reference(df, pol, tmp_path, f"ref/{out}")
    res = release(as_input(df, kind), pol, tmp_path, f"mem/{out}")
    assert extract_bytes(res.extract_path) == extract_bytes(ref.extract_path)
    assert res.manifest.extract.sha256 == ref.manifest.extract.sha256
    if out == "folder":
        assert len(res.manifest.extract.parts or []) == 3
    recorded = [json.loads(line) for line in nonces.state_path().read_text().splitlines()]
    assert [r["input"]["kind"] for r in recorded] == [memory_mod.input_kind(as_input(df, kind))]
    assert recorded[0]["input"]["rows"] == N
    # the digest is private: it is in the steward's record only, never in the manifest or the extract
    digest = recorded[0]["input"]["sha256"]
    assert digest not in res.manifest_path.read_text()
    assert all(digest.encode() not in b for b in extract_bytes(res.extract_path))


def test_the_three_inputs_have_one_digest_whatever_the_chunks_given(tmp_path: Path) -> None:
    df = rows()
    table = arrow(df)
    readers = [pa.RecordBatchReader.from_batches(table.schema, table.to_batches(max_chunksize=c)) for c in (1, 333)]
    digests = {memory_mod.MemorySource(x).digest() for x in [df, table, pa.concat_tables([table.slice(0, 7),
                                                                                         table.slice(7)]), *readers]}
    assert len(digests) == 1
    changed = df.copy()
    changed.loc[17, "visits"] = 19 if changed.loc[17, "visits"] != 19 else 18
    assert memory_mod.MemorySource(changed).digest() not in digests


def spent(ledger: Path, ids: list[str]) -> np.ndarray:
    with Ledger.open(ledger, create=False) as led:
        return led.spent(subject_hashes(KEY, ids))


def _spool_files() -> list[str]:
    return [n for n in os.listdir(nonces.state_path().parent) if memory_mod.SPOOL_NAME in n]


@pytest.mark.parametrize("kind", ["pandas", "table", "reader"])
@pytest.mark.parametrize("out", ["out.parquet", "folder"])
@pytest.mark.parametrize("partial", [False, True], ids=["one pass", "allow-partial"])
def test_with_a_ledger_same_bytes_and_same_charges(tmp_path: Path, kind: str, out: str, partial: bool) -> None:
    """With a ledger the charges come from the extract's own pass (a reader is read once, never
    spooled); with --allow-partial a pre-pass comes first, so a reader is spooled privately."""
    df = rows()
    pol = policy(order="as-input" if out == "folder" else "shuffled", cap=10.0, memoize=True)
    ref = reference(df, pol, tmp_path, f"ref/{out}", ledger_path=tmp_path / "ref.ledger", allow_partial=partial)
    seen: list[int] = []

    def look(_: int) -> None:  # during the extract's pass: a reader is read from its private spooled copy
        seen.extend(stat.S_IMODE(os.stat(nonces.state_path().parent / n).st_mode) for n in _spool_files())

    res = release(as_input(df, kind), pol, tmp_path, f"mem/{out}", ledger_path=tmp_path / "mem.ledger",
                  on_progress=look, allow_partial=partial)
    assert extract_bytes(res.extract_path) == extract_bytes(ref.extract_path)
    ids = list(df["person"])
    np.testing.assert_array_equal(spent(tmp_path / "mem.ledger", ids), spent(tmp_path / "ref.ledger", ids))
    assert spent(tmp_path / "mem.ledger", ids).max() > 0
    assert set(seen) == ({0o600} if kind == "reader" and partial else set())
    assert _spool_files() == []  # removed when the release ended


def test_a_spooled_reader_is_removed_when_the_release_is_refused(tmp_path: Path) -> None:
    df = rows()
    pol = policy(cap=1.0)  # each row costs 3: over the lifetime budget, refused after the pre-pass
    with pytest.raises(BudgetExhaustedError):
        release(as_input(df, "reader"), pol, tmp_path, "mem/out.parquet", ledger_path=tmp_path / "mem.ledger")
    assert _spool_files() == []
    assert os.listdir(tmp_path / "mem") == []
    assert not nonces.state_path().exists()


def test_one_row_per_person_reads_a_reader_twice_from_its_spooled_copy(tmp_path: Path) -> None:
    df = rows()
    pd_ = policy_dict()
    pd_["output"]["one_row_per_person"] = True
    pol = parse_policy(pd_, "memory-io.yaml")
    ref = reference(df, pol, tmp_path, "ref/out.parquet")
    res = release(as_input(df, "reader"), pol, tmp_path, "mem/out.parquet")
    assert extract_bytes(res.extract_path) == extract_bytes(ref.extract_path)
    assert _spool_files() == []
    twice = pd.concat([df, df.iloc[:1]], ignore_index=True)
    with pytest.raises(DataError, match="one_row_per_person"):
        release(as_input(twice, "reader"), pol, tmp_path, "mem2/out.parquet")
    assert _spool_files() == [] and os.listdir(tmp_path / "mem2") == []


def test_the_index_is_never_released_unless_the_policy_names_it(tmp_path: Path) -> None:
    df = rows()
    pol = policy()
    ref = reference(df, pol, tmp_path, "ref/out.parquet")
    # an index the policy does not name (unlisted: error would refuse it if it were read as a column)
    named = df.set_axis(pd.Index([f"secret-{i}" for i in range(N)], name="row_label"))
    shifted = df.set_axis(pd.RangeIndex(1000, 1000 + N))
    for i, frame in enumerate([named, shifted, df.iloc[::-1].iloc[::-1]]):
        res = release(frame, pol, tmp_path, f"mem{i}/out.parquet")
        assert extract_bytes(res.extract_path) == extract_bytes(ref.extract_path)
        assert b"secret-" not in res.extract_path.read_bytes()
        assert "row_label" not in res.manifest_path.read_text()
    # the subject column as the index: read as that column
    res = release(df.set_index("person"), pol, tmp_path, "mem-subject/out.parquet")
    assert extract_bytes(res.extract_path) == extract_bytes(ref.extract_path)


def test_an_index_the_policy_names_is_released_as_that_column(tmp_path: Path) -> None:
    df = rows()
    d = policy_dict(order="as-input")
    d["columns"] = {"site": {"type": "public"}, **d["columns"]}
    pol = parse_policy(d, "memory-io.yaml")
    df2 = df.assign(site=[f"site-{i % 3}" for i in range(N)])
    with_column = df2[["site", *df.columns]]
    raw = tmp_path / "site.parquet"
    pq.write_table(pa.Table.from_pandas(with_column, preserve_index=False).cast(
        pa.schema([("site", pa.string()), *SCHEMA])).replace_schema_metadata(None), raw)
    with nonces.rederiving():
        want = release(raw, pol, tmp_path, "ref/out.parquet")
    for i, frame in enumerate([df2.set_index("site"), df2.set_index(["site", "person"])]):
        res = release(frame, pol, tmp_path, f"mem{i}/out.parquet")
        assert extract_bytes(res.extract_path) == extract_bytes(want.extract_path)
        assert pq.read_table(res.extract_path).column_names[0] == "site"
    clash = df2.set_index("site")
    clash["site"] = "x"
    with pytest.raises(DataError, match="'site'.*index"):
        release(clash, pol, tmp_path, "clash/out.parquet")


def nullable(df: pd.DataFrame) -> pd.DataFrame:
    """The same rows in pandas' nullable and categorical dtypes (pd.NA for missing)."""
    cats = pd.CategoricalDtype(["unused", "white", "blue", "green", "red", "never"])
    return pd.DataFrame({
        "person": df["person"].astype("string[pyarrow]"),
        "colour": df["colour"].astype(cats),
        "score": df["score"].astype("Float64"),
        "visits": df["visits"].astype("Int64"),
        "remote": df["remote"].astype("boolean"),
        "wave": df["wave"].astype(pd.CategoricalDtype(["zz-unused-wave", "2026-b", "2026-a"])),
    })


@pytest.mark.parametrize("order", ["shuffled", "as-input"])
@pytest.mark.parametrize("out", ["out.parquet", "out.csv"])
def test_nullable_and_categorical_dtypes_give_the_plain_bytes(tmp_path: Path, order: str, out: str) -> None:
    df = rows()
    df.loc[df.index % 7 == 0, "remote"] = None
    pol = policy(order=order)
    plain = release(df, pol, tmp_path, f"plain/{out}")
    typed = nullable(df)
    assert typed["score"].isna().sum() > 0 and typed["colour"].isna().sum() > 0
    with nonces.rederiving():
        res = release(typed, pol, tmp_path, f"typed/{out}")
        string = release(df.astype({"person": "string", "wave": "string"}), pol, tmp_path, f"string/{out}")
    assert res.extract_path.read_bytes() == plain.extract_path.read_bytes()
    assert string.extract_path.read_bytes() == plain.extract_path.read_bytes()
    # the pandas categories (their order, the unused ones) reach neither the extract nor the manifest
    for text in (res.extract_path.read_bytes(), res.manifest_path.read_bytes()):
        assert b"zz-unused-wave" not in text and b"never" not in text and b"unused" not in text
    if out.endswith(".parquet"):  # pd.NA in a nullable boolean public column is released as missing, as None is
        assert pq.read_table(res.extract_path).column("remote").null_count == df["remote"].isna().sum() > 0


def test_a_float_column_with_missing_values_equals_its_nullable_integer_twin(tmp_path: Path) -> None:
    df = rows()
    as_float = df.assign(visits=df["visits"].astype(float).where(df.index % 5 != 0))
    as_int = df.assign(visits=df["visits"].astype("Int64").where(df.index % 5 != 0))
    assert as_int["visits"].isna().sum() == (N + 4) // 5
    pol = policy()
    a = release(as_float, pol, tmp_path, "a/out.parquet")
    with nonces.rederiving():
        b = release(as_int, pol, tmp_path, "b/out.parquet")
    assert a.extract_path.read_bytes() == b.extract_path.read_bytes()


@pytest.mark.parametrize(("make", "names"), [
    (lambda df: df.rename(columns={"wave": 7}), ["7", "number", "text"]),
    (lambda df: df.set_axis(pd.MultiIndex.from_tuples([(c, "x") for c in df.columns]), axis=1),
     ["'person'", "several levels of column names"]),
    (lambda df: df.set_axis([*df.columns[:-1], "colour"], axis=1), ["duplicate", "'colour'"]),
    (lambda df: df.assign(wave=[1 if i % 2 else "x" for i in range(len(df))]), ["'wave'", "several types"]),
    (lambda df: df.assign(wave=[b"x" if i % 2 else "x" for i in range(len(df))]), ["'wave'", "several types"]),
])
def test_layout_errors_name_the_column_and_write_nothing(tmp_path: Path, make: Any, names: list[str]) -> None:
    frame = make(rows())
    with pytest.raises(DataError) as err:
        release(frame, policy(), tmp_path, "mem/out.parquet")
    text = str(err.value)
    assert err.value.exit_code == 2 and "pandas DataFrame" in text and "\n" not in text
    for name in names:
        assert name in text
    assert "p-00001" not in text and "Traceback" not in text
    assert os.listdir(tmp_path / "mem") == [] and not nonces.state_path().exists()


def test_the_same_errors_for_an_arrow_table(tmp_path: Path) -> None:
    table = arrow(rows())
    dup = pa.Table.from_arrays(table.columns, names=[*table.column_names[:-1], "colour"])
    with pytest.raises(DataError, match="pyarrow Table given has duplicate column names: 'colour'"):
        release(dup, policy(), tmp_path, "mem/out.parquet")
    with pytest.raises(UsageError, match="a pandas DataFrame, a pyarrow Table, a pyarrow RecordBatchReader"):
        release([1, 2, 3], policy(), tmp_path, "mem/out.parquet")


def test_a_dictionary_column_of_an_arrow_table_is_read_as_its_values(tmp_path: Path) -> None:
    df = rows()
    table = arrow(df)
    wave = pa.array(df["wave"]).dictionary_encode()
    wave = pa.DictionaryArray.from_arrays(wave.indices, wave.dictionary)
    coded = table.set_column(table.schema.get_field_index("wave"), "wave", wave)
    pol = policy(order="as-input")
    plain = release(table, pol, tmp_path, "plain/out.parquet")
    with nonces.rederiving():
        res = release(coded, pol, tmp_path, "coded/out.parquet")
    assert res.extract_path.read_bytes() == plain.extract_path.read_bytes()
    assert pq.read_schema(res.extract_path).field("wave").type == pa.string()


# -- in memory ---------------------------------------------------------------------------------

@pytest.mark.parametrize("order", ["shuffled", "as-input"])
def test_privatize_to_memory_equals_the_file_route(tmp_path: Path, order: str) -> None:
    df = rows()
    pol = policy(order=order)
    ref = release(df, pol, tmp_path, "ref/extract.parquet")
    got = privatize_to_memory(df, pol, KEY, as_="arrow", nonce=NONCE, batch_rows=128)
    assert isinstance(got, InMemoryRelease)
    table, manifest = got
    want = pq.read_table(ref.extract_path)
    assert table.equals(want) and table.schema == want.schema
    frame = privatize_to_memory(as_input(df, "reader"), pol, KEY, nonce=NONCE).data
    pd.testing.assert_frame_equal(frame, want.to_pandas(), check_exact=True)
    a, b = manifest.model_dump(), ref.manifest.model_dump()
    a.pop("created_utc"), b.pop("created_utc")
    assert a == b  # the manifest the file release wrote (its extract named extract.parquet)
    left = os.listdir(nonces.state_path().parent)
    assert not [n for n in left if "in-memory" in n or memory_mod.SPOOL_NAME in n]


def test_privatize_to_memory_is_a_release_recorded_and_charged(tmp_path: Path) -> None:
    df = rows()
    pol = policy(cap=10.0, memoize=True)
    with nonces.rederiving():
        ref = release(df, pol, tmp_path, "ref/extract.parquet", ledger_path=tmp_path / "ref.ledger")
    before = set(os.listdir(nonces.state_path().parent))
    table, manifest = privatize_to_memory(df, pol, KEY, as_="arrow", nonce=NONCE,
                                          ledger_path=tmp_path / "mem.ledger")
    assert table.equals(pq.read_table(ref.extract_path))
    ids = list(df["person"])
    np.testing.assert_array_equal(spent(tmp_path / "mem.ledger", ids), spent(tmp_path / "ref.ledger", ids))
    (rec,) = [json.loads(line) for line in nonces.state_path().read_text().splitlines()]
    assert rec["nonce"] == NONCE and rec["extract"] == "in memory" and rec["input"]["kind"] == "pandas-dataframe"
    assert set(os.listdir(nonces.state_path().parent)) - before == {nonces.STATE_NAME}  # no diagnostics left
    other = df.copy()
    other.loc[0, "score"] = 1.0 if other.loc[0, "score"] != 1.0 else 2.0
    with pytest.raises(OptionError, match="already used"):  # a nonce reused on other data: refused
        privatize_to_memory(other, pol, KEY, nonce=NONCE, ledger_path=tmp_path / "mem.ledger")
    np.testing.assert_array_equal(spent(tmp_path / "mem.ledger", ids), spent(tmp_path / "ref.ledger", ids))


def test_privatize_to_memory_options_are_checked() -> None:
    with pytest.raises(OptionError, match=r"as_ must be 'pandas' or 'arrow'"):
        privatize_to_memory(rows(), policy(), KEY, as_="polars")  # type: ignore[arg-type]
    with pytest.raises(OptionError, match="file_name"):
        privatize_to_memory(rows(), policy(), KEY, file_name="sub/extract.parquet")


def test_a_stop_removes_the_spooled_copy_and_the_in_memory_folder(tmp_path: Path) -> None:
    df = rows()
    pol = policy(cap=10.0)

    def stop(_: int) -> None:  # a stop signal arriving during the extract's pass (after the spooling pass)
        assert _spool_files()
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):  # --allow-partial: a pre-pass first, so the reader is spooled
        release(as_input(df, "reader"), pol, tmp_path, "mem/out.parquet", ledger_path=tmp_path / "mem.ledger",
                on_progress=stop, allow_partial=True)
    assert _spool_files() == [] and os.listdir(tmp_path / "mem") == []
    assert not (tmp_path / "mem.ledger").exists() and not nonces.state_path().exists()
    with pytest.raises(KeyboardInterrupt):
        privatize_to_memory(as_input(df, "reader"), pol, KEY, ledger_path=tmp_path / "mem.ledger", on_progress=stop,
                            allow_partial=True)
    assert os.listdir(nonces.state_path().parent) == []


@pytest.mark.parametrize("unlisted", [False, True], ids=["type: drop", "unlisted: drop"])
def test_a_dropped_column_is_never_read(tmp_path: Path, unlisted: bool) -> None:
    """A DataFrame column the policy drops (by name, or as an unlisted column under unlisted: drop)
    may hold anything (mixed types, dictionaries): it is never converted, it is not digested, and
    the extract is that of the frame without it (or with other values in it), bit for bit; the
    nonce record sees the same input,
    so giving the nonce again with the other frame is a true reproduction, not a reuse."""
    df = rows()
    messy = df.assign(notes=pd.Series([1 if i % 2 else "free text" for i in range(len(df))], dtype=object),
                      blob=pd.Series([{"k": i} for i in range(len(df))], dtype=object))
    pol_d = policy_dict()
    if unlisted:
        pol_d["unlisted"] = "drop"
    else:
        pol_d["columns"].update({"notes": {"type": "drop"}, "blob": {"type": "drop"}})
    pol = parse_policy(pol_d, "memory-io.yaml")
    other = df if unlisted else messy.assign(notes=pd.Series([[i] for i in range(len(df))], dtype=object), blob=None)
    first = release(messy, pol, tmp_path, "a/out.parquet")
    again = release(other, pol, tmp_path, "b/out.parquet")  # the same nonce: allowed, the same input
    assert extract_bytes(first.extract_path) == extract_bytes(again.extract_path)
    records = [json.loads(line) for line in nonces.state_path().read_text().splitlines()]
    assert len({r["input"]["sha256"] for r in records}) == 1
    pol_d["columns"]["notes"] = {"type": "public"}
    with pytest.raises(DataError, match="'notes'.*several types"):  # read when released: refused
        release(messy, parse_policy(pol_d, "memory-io.yaml"), tmp_path, "c/out.parquet")


def test_a_public_column_of_lists_is_released_as_from_arrow(tmp_path: Path) -> None:
    """pandas calls an object column of lists "mixed", but it has one type (a list of text): a
    public column of lists in a DataFrame is released as the Arrow Table of the same rows is."""
    df = rows()
    pol_d = policy_dict()
    pol_d["columns"]["tags"] = {"type": "public"}
    pol = parse_policy(pol_d, "memory-io.yaml")
    framed = df.assign(tags=pd.Series([["a", "b"][: i % 3] for i in range(len(df))], dtype=object))
    a = release(framed, pol, tmp_path, "a/out.parquet")
    with nonces.rederiving():
        b = release(pa.Table.from_pandas(framed, preserve_index=False), pol, tmp_path, "b/out.parquet")
    assert a.extract_path.read_bytes() == b.extract_path.read_bytes()
    assert pq.read_schema(a.extract_path).field("tags").type == pa.list_(pa.string())
