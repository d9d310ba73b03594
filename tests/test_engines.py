"""Parquet datasets and the distributed engine: the same release, bit for bit.

A dask ``LocalCluster`` of 2 worker processes (started once for the module, reached through
its loopback address as `--scheduler` would reach it) writes the parts of a release in
parallel; every test compares with the local engine on the same key, nonce and input order.
Input data: the invented staff survey of the demo scenario, split into Parquet files with
row groups of several sizes.  Keys and nonces are fixed.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import assert_close_nested, DEMO_CSV, FIXED_KEY_BYTES, survey_policy, write_fixed_key, write_policy
from ldptransform import estimate, privatize, validate
from ldptransform.errors import InputFileError, LdptError, UsageError
from ldptransform.keys import SecretKey
from ldptransform.ledger import Ledger
from ldptransform.policy import parse_policy

distributed = pytest.importorskip("distributed")

KEY = SecretKey(FIXED_KEY_BYTES)
NONCE = "00112233445566778899aabbccddeeff"


@pytest.fixture(scope="module")
def cluster():
    from distributed import LocalCluster

    import logging

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                      silence_logs=logging.ERROR) as c:
        yield c.scheduler_address


@pytest.fixture(scope="module")
def survey() -> pd.DataFrame:
    return pd.read_csv(DEMO_CSV, dtype={"staff_id": str, "site": str, "role": str, "would_recommend": str,
                                        "survey_wave": str})


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory, survey: pd.DataFrame) -> Path:
    """The survey as a dataset of three files (row groups of 1000, 700 and 2500 rows; read in the
    order of their paths: a.parquet, b-2026/b.parquet, c.parquet), plus a _SUCCESS marker and a
    hidden file that must be skipped."""
    d = tmp_path_factory.mktemp("data") / "survey"
    (d / "b-2026").mkdir(parents=True)
    t = pa.Table.from_pandas(survey, preserve_index=False)
    pq.write_table(t.slice(0, 3000), d / "a.parquet", row_group_size=1000)
    pq.write_table(t.slice(3000, 4000), d / "b-2026" / "b.parquet", row_group_size=700)
    pq.write_table(t.slice(7000), d / "c.parquet", row_group_size=2500)
    (d / "_SUCCESS").write_text("")
    (d / ".c.parquet.crc").write_bytes(b"\0\1")
    pq.write_table(t, d.parent / "whole.parquet", row_group_size=4096)
    return d


def memo_policy() -> dict:
    p = survey_policy()
    p["subject_key"] = "staff_id"
    p["columns"]["site"]["memoize"] = True
    p["columns"]["pay"]["memoize"] = True
    p["columns"]["weekly_hours"]["mechanism"] = "discrete-laplace"  # a variable number of draws per row
    p["columns"]["weekly_hours"]["grid"] = 70
    return p


def sample_policy() -> dict:
    p = survey_policy()
    p["budget"] = {"epsilon_per_row": 3.0, "strategy": "sample"}
    for c in p["columns"].values():
        c.pop("epsilon", None)
    return p


def as_input_policy() -> dict:
    p = survey_policy()
    p["output"] = {"row_order": "as-input"}
    return p


def parts_of(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


# -- reading datasets -------------------------------------------------------------------------

def test_a_dataset_reads_as_one_table_in_path_order(dataset: Path, tmp_path: Path, other_steward) -> None:
    """A folder of Parquet files releases exactly as the same rows in one file: same extract bytes."""
    pol = parse_policy(survey_policy(), "survey.yaml")
    a = privatize(dataset, pol, KEY, tmp_path / "from_dataset.parquet", nonce=NONCE)
    # the same dataset named by a URI (the path object stores take: pyarrow's filesystem layer); its
    # files digest as the folder's, so the nonce again is a reproduction
    c = privatize(f"file://{dataset}", pol, KEY, tmp_path / "from_uri.parquet", nonce=NONCE)
    assert c.manifest.extract.sha256 == a.manifest.extract.sha256
    other_steward()  # the nonce again on another input (the same rows, other bytes): refused by one steward state
    b = privatize(dataset.parent / "whole.parquet", pol, KEY, tmp_path / "from_file.parquet", nonce=NONCE)
    assert a.manifest.rows == 12000
    assert a.manifest.extract.sha256 == b.manifest.extract.sha256
    with pytest.raises(InputFileError, match="does not exist"):
        privatize(f"file://{dataset}-missing", pol, KEY, tmp_path / "x.parquet", nonce=NONCE)


@pytest.mark.parametrize("policy_fn", [survey_policy, memo_policy, sample_policy, as_input_policy],
                         ids=["survey", "memoized+discrete-laplace", "strategy-sample", "rows-as-input"])
def test_dask_engine_writes_the_local_engines_parts_bit_for_bit(policy_fn, dataset: Path, tmp_path: Path,
                                                                cluster: str) -> None:
    pol = parse_policy(policy_fn(), "survey.yaml")
    loc = privatize(dataset, pol, KEY, tmp_path / "local", nonce=NONCE, fragment_rows=2000)
    dsk = privatize(dataset, pol, KEY, tmp_path / "dask", nonce=NONCE, fragment_rows=2000, engine="dask",
                    scheduler=cluster)
    assert loc.manifest.extract.parts is not None
    rows = [p.rows for p in loc.manifest.extract.parts]
    if pol.policy.output.row_order == "as-input":
        # fragments: runs of whole row groups of at most 2000 rows (a.parquet: 1000-row groups; b: 700; c: 2500)
        assert rows == [2000, 1000, 1400, 1400, 1200] + [2500, 2500]
    else:  # shuffled across all parts: parts of 2000 rows by rank in the keyed order
        assert rows == [2000] * 6
    assert parts_of(tmp_path / "local") == parts_of(tmp_path / "dask")
    assert loc.manifest.extract.sha256 == dsk.manifest.extract.sha256
    one = privatize(dataset, pol, KEY, tmp_path / "one.parquet", nonce=NONCE)
    assert pq.read_table(tmp_path / "dask").equals(pq.read_table(tmp_path / "one.parquet"))
    assert one.manifest.columns == dsk.manifest.columns
    # the steward's diagnostics add up over the parts
    d_loc = json.loads(loc.diagnostics_path.read_text())
    d_dsk = json.loads(dsk.diagnostics_path.read_text())
    d_one = json.loads(one.diagnostics_path.read_text())
    assert d_loc["columns"] == d_dsk["columns"] == d_one["columns"]
    assert d_dsk["engine"] == "dask"


@pytest.mark.parametrize("policy_fn", [survey_policy, as_input_policy], ids=["shuffled", "rows-as-input"])
def test_csv_input_with_the_dask_engine(policy_fn, tmp_path: Path, cluster: str) -> None:
    """CSV: read in order by the client (its counting pass), parts of --part-rows rows written
    by the workers (shuffled: the rows' sorted runs spilled by the workers, then the parts merged
    from them); the same parts as the local engine's."""
    pol = parse_policy(policy_fn(), "survey.yaml")
    privatize(DEMO_CSV, pol, KEY, tmp_path / "local", nonce=NONCE, fragment_rows=5000)
    dsk = privatize(DEMO_CSV, pol, KEY, tmp_path / "dask", nonce=NONCE, fragment_rows=5000, engine="dask",
                    scheduler=cluster)
    assert dsk.manifest.extract.parts is not None
    assert [p.rows for p in dsk.manifest.extract.parts] == [5000, 5000, 2000]
    assert parts_of(tmp_path / "local") == parts_of(tmp_path / "dask")
    privatize(DEMO_CSV, pol, KEY, tmp_path / "one.parquet", nonce=NONCE)
    assert pq.read_table(tmp_path / "dask").equals(pq.read_table(tmp_path / "one.parquet"))


def test_a_dask_dataframe_is_released_like_its_rows(dataset: Path, tmp_path: Path, cluster: str,
                                                    other_steward) -> None:
    """The Python API takes a dask DataFrame: a counting pass numbers its rows; one part per
    partition; values equal to the local engine's on the same rows."""
    import dask.dataframe as dd

    from ldptransform.engine_dask import privatize_frame

    frame = dd.read_parquet(str(dataset / "a.parquet")).repartition(npartitions=3)
    pol = parse_policy(as_input_policy(), "survey.yaml")
    res = privatize_frame(frame, pol, KEY, tmp_path / "frame", nonce=NONCE, scheduler=cluster)
    assert [p.rows for p in res.manifest.extract.parts] == [int(n) for n in frame.map_partitions(len).compute()]
    other_steward()  # a dask DataFrame cannot be digested: the nonce again on its file needs another state
    privatize(dataset / "a.parquet", pol, KEY, tmp_path / "a.parquet", nonce=NONCE)
    assert pq.read_table(tmp_path / "frame").equals(pq.read_table(tmp_path / "a.parquet"))
    # shuffled (the default): parts of fragment_rows rows by rank, the local engine's bytes
    pol = parse_policy(survey_policy(), "survey.yaml")
    other_steward()
    res = privatize_frame(frame, pol, KEY, tmp_path / "frame2", nonce=NONCE, scheduler=cluster, fragment_rows=1000)
    other_steward()
    privatize(dataset / "a.parquet", pol, KEY, tmp_path / "a2", nonce=NONCE, fragment_rows=1000)
    assert [p.rows for p in res.manifest.extract.parts] == [1000] * 3
    assert parts_of(tmp_path / "frame2") == parts_of(tmp_path / "a2")
    with pytest.raises(UsageError, match="engine='dask'"):
        privatize_frame(frame, pol, KEY, tmp_path / "x", nonce=NONCE, engine="local")


def _typed_survey(survey: pd.DataFrame, rows: int) -> pd.DataFrame:
    """The first ``rows`` rows of the survey with pandas' own dtypes: categorical columns (their
    categories in another order than the policy's, plus a category no row has), nullable string,
    Int64 and Float64 columns with pd.NA, and an index that is not 0..n-1 (never released)."""
    df = survey.iloc[:rows].copy()
    sites = sorted(df["site"].unique(), reverse=True) + ["Unused Site"]
    df["site"] = df["site"].astype(pd.CategoricalDtype(sites))
    df["would_recommend"] = df["would_recommend"].astype("category")
    df["survey_wave"] = df["survey_wave"].astype("category")
    df["role"] = df["role"].astype("string")
    df["staff_id"] = df["staff_id"].astype("string")
    df["satisfaction"] = df["satisfaction"].astype("Int64")  # whole numbers with pd.NA where missing
    df["weekly_hours"] = df["weekly_hours"].astype("Float64")
    df["tenure_years"] = df["tenure_years"].astype("Float64")
    return df.set_axis(pd.RangeIndex(5000, 5000 + rows))


def _text_as_string(t: pa.Table) -> pa.Table:
    """``t`` with its large_string columns as string (field metadata kept)."""
    return t.cast(pa.schema([f.with_type(pa.string()) if pa.types.is_large_string(f.type) else f for f in t.schema],
                            metadata=t.schema.metadata))


@pytest.mark.parametrize("policy_fn", [survey_policy, as_input_policy], ids=["shuffled", "rows-as-input"])
def test_a_dask_dataframe_made_from_pandas_releases_the_pandas_frames_rows(policy_fn, survey: pd.DataFrame,
                                                                           tmp_path: Path, cluster: str,
                                                                           other_steward) -> None:
    """dd.from_pandas of a frame with categorical and nullable dtypes, in 3 partitions of 1000
    rows, through engine_dask.privatize_frame, against the local engine releasing the pandas
    DataFrame itself with fragment_rows 1000 (the partition size), in both row orders (shuffled:
    parts by rank in the keyed order; as-input: one part per partition, the local engine's
    1000-row fragments).  Part by part, the privatized columns are identical (Arrow types, field
    metadata, values) and so are their manifest entries.  The part files are not compared byte
    for byte: dask holds text columns as Arrow large_string (its string[pyarrow] dtype; a
    categorical's values too) and the dask engine writes a public text column with the type of the
    frame it is given, while the local engine reads a pandas DataFrame's text as string; so a
    public text column may differ in its Arrow type only (in the parts and in the manifest's
    dtype), and with text read as string the parts and manifest columns are equal, value for
    value and with the same metadata."""
    import dask.dataframe as dd

    from ldptransform.engine_dask import privatize_frame

    df = _typed_survey(survey, 3000)
    assert df["satisfaction"].isna().any() and df["weekly_hours"].isna().any()
    frame = dd.from_pandas(df, npartitions=3)
    assert [int(n) for n in frame.map_partitions(len).compute()] == [1000] * 3
    assert isinstance(frame.dtypes["site"], pd.CategoricalDtype) and str(frame.dtypes["satisfaction"]) == "Int64"
    pol = parse_policy(policy_fn(), "survey.yaml")
    other_steward()  # a dask DataFrame cannot be digested: each release under this nonce in a state of its own
    dsk = privatize_frame(frame, pol, KEY, tmp_path / "dask", nonce=NONCE, scheduler=cluster, fragment_rows=1000)
    other_steward()
    loc = privatize(df, pol, KEY, tmp_path / "local", nonce=NONCE, fragment_rows=1000)
    assert loc.manifest.extract.parts is not None and dsk.manifest.extract.parts is not None
    assert [p.file for p in dsk.manifest.extract.parts] == [p.file for p in loc.manifest.extract.parts]
    assert [p.rows for p in dsk.manifest.extract.parts] == [p.rows for p in loc.manifest.extract.parts] == [1000] * 3
    public = {c.name for c in pol.columns if c.mechanism is None}

    def text_as_string(entry: Any) -> dict[str, Any]:
        d = entry.model_dump()
        for o in d["outputs"]:
            o["dtype"] = "string" if o["dtype"] == "large_string" else o["dtype"]
        return d

    assert [c for c in dsk.manifest.columns if c.name not in public] == [
        c for c in loc.manifest.columns if c.name not in public]
    assert [text_as_string(c) for c in dsk.manifest.columns] == [text_as_string(c) for c in loc.manifest.columns]
    privatized = [c.name for c in pol.columns if c.mechanism is not None]
    for part in loc.manifest.extract.parts:
        a, b = pq.read_table(tmp_path / "dask" / part.file), pq.read_table(tmp_path / "local" / part.file)
        assert a.column_names == b.column_names and "__index_level_0__" not in a.column_names
        assert a.select(privatized).equals(b.select(privatized), check_metadata=True), part.file
        differ = {f.name for f in a.schema if f.type != b.schema.field(f.name).type}
        assert differ <= public, differ
        assert _text_as_string(a).equals(b, check_metadata=True), part.file
    # a category no row has (a pandas category list) never reaches the extract
    assert "Unused Site" not in str(pq.read_table(tmp_path / "dask").schema)


def test_ledger_charges_are_the_same_with_either_engine(dataset: Path, tmp_path: Path, cluster: str) -> None:
    pol = parse_policy(memo_policy(), "survey.yaml")
    spends = []
    for engine in ("local", "dask"):
        led = tmp_path / f"{engine}.sqlite3"
        kw: dict[str, Any] = {"scheduler": cluster} if engine == "dask" else {}
        r = privatize(dataset, pol, KEY, tmp_path / engine, nonce=NONCE, ledger_path=led, engine=engine, **kw)
        assert r.ledger_release_id == 1
        with Ledger.open(led, create=False) as lg:
            h, e = lg.release_spend(1)
            spends.append((h.tobytes(), e.tobytes()))
    assert spends[0] == spends[1]


# -- estimating and validating a dataset extract ----------------------------------------------------

def test_estimate_merges_the_parts_with_either_engine(dataset: Path, tmp_path: Path, cluster: str) -> None:
    pol = parse_policy(survey_policy(), "survey.yaml")
    privatize(dataset, pol, KEY, tmp_path / "ds", nonce=NONCE, fragment_rows=2000)
    privatize(dataset, pol, KEY, tmp_path / "one.parquet", nonce=NONCE)
    kw: dict[str, Any] = dict(crosstabs=[("site", "role")], mean_by=[("pay", "site")])
    local = estimate(tmp_path / "ds", **kw).to_dict()
    dsk = estimate(tmp_path / "ds", engine="dask", scheduler=cluster, **kw).to_dict()
    single = estimate(tmp_path / "one.parquet", **kw).to_dict()
    for d in (local, dsk, single):
        d.pop("extract", None)
        d.pop("extracts", None)
    assert_close_nested(single, local)
    assert_close_nested(single, dsk)
    with pytest.raises(UsageError, match="reads a Parquet dataset extract"):
        estimate(tmp_path / "one.parquet", engine="dask", scheduler=cluster)


def test_validate_checks_every_part_and_reproduces_a_dataset(dataset: Path, tmp_path: Path) -> None:
    pol = parse_policy(survey_policy(), "survey.yaml")
    privatize(dataset, pol, KEY, tmp_path / "ds", nonce=NONCE, fragment_rows=2000)
    rep = validate(tmp_path / "ds", raw=dataset, key=KEY)
    status = {c.name: c.status for c in rep.checks}
    assert rep.ok and status["extract hash"] == "pass" and status["reproduced"] == "pass", rep.as_dict()
    part = tmp_path / "ds" / "part-00003.parquet"
    part.write_bytes(part.read_bytes()[:-20] + bytes(20))
    (tmp_path / "ds" / "part-00099.parquet").write_bytes(b"")
    rep = validate(tmp_path / "ds")
    check = {c.name: c for c in rep.checks}["extract hash"]
    assert check.status == "fail" and "part-00003.parquet differs" in check.detail
    assert "part-00099.parquet" in check.detail


# -- bad inputs -----------------------------------------------------------------------------------

def test_bad_datasets_and_engine_options_exit_2(dataset: Path, tmp_path: Path, ldpt, private_dir: Path) -> None:
    key = write_fixed_key(tmp_path / "k.key")
    pol = write_policy(tmp_path / "p.yaml", survey_policy())

    def run(*args):
        res = ldpt("privatize", *args, "--policy", pol, "--key", key)
        assert res.returncode == 2 and "Traceback" not in res.stderr, res.stderr
        return res.stderr

    mixed = tmp_path / "mixed"
    mixed.mkdir()
    pq.write_table(pq.read_table(dataset / "a.parquet"), mixed / "1.parquet")
    pq.write_table(pq.read_table(dataset / "a.parquet").drop(["pay"]), mixed / "2.parquet")
    err = run(mixed, "--out", tmp_path / "o.parquet")
    assert "2.parquet" in err and "missing column(s) ['pay']" in err
    empty = tmp_path / "empty"
    empty.mkdir()
    assert "holds no Parquet files" in run(empty, "--out", tmp_path / "o.parquet")
    assert "writes a Parquet dataset" in run(dataset, "--out", tmp_path / "o.parquet", "--engine", "dask")
    err = run(dataset, "--out", tmp_path / "o", "--engine", "dask", "--scheduler", "tcp://10.1.2.3:8786")
    assert "not encrypted" in err and "tls://" in err
    assert "--scheduler applies only with --engine dask" in run(dataset, "--out", tmp_path / "o", "--scheduler",
                                                                "tls://10.1.2.3:8786")
    other = tmp_path / "notes"
    other.mkdir()
    (other / "readme.txt").write_text("keep me")
    err = run(dataset, "--out", other, "--overwrite")
    assert "not parts of a release" in err and (other / "readme.txt").read_text() == "keep me"
    assert not (tmp_path / "o").exists() and not (tmp_path / "o.parquet").exists()


def test_overwrite_replaces_a_dataset_folder(dataset: Path, tmp_path: Path) -> None:
    pol = parse_policy(survey_policy(), "survey.yaml")
    privatize(dataset, pol, KEY, tmp_path / "ds", nonce=NONCE, fragment_rows=1000)
    assert len(list((tmp_path / "ds").iterdir())) > 7
    with pytest.raises(LdptError, match="already exists"):
        privatize(dataset, pol, KEY, tmp_path / "ds", nonce=NONCE)
    r = privatize(dataset, pol, KEY, tmp_path / "ds", nonce=NONCE, overwrite=True)
    assert r.manifest.extract.parts is not None
    assert sorted(p.name for p in (tmp_path / "ds").iterdir()) == [p.file for p in r.manifest.extract.parts]
    assert [p.name for p in tmp_path.iterdir() if "partial" in p.name] == []


def test_the_core_does_not_import_dask() -> None:
    code = ("import sys, ldptransform, ldptransform.cli, ldptransform.release, ldptransform.estimate, "
            "ldptransform.validate, ldptransform.dataset; "
            "bad = [m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')]; "
            "assert not bad, bad")
    subprocess.run([sys.executable, "-c", code], check=True, timeout=120)


@pytest.mark.slow
def test_cli_dask_engine_on_a_local_cluster(dataset: Path, tmp_path: Path, ldpt_process, private_dir: Path) -> None:
    """`ldpt privatize --engine dask` with no --scheduler starts its own local cluster; `ldpt
    estimate --engine dask` decodes the parts; `ldpt validate` passes.  In real processes: the
    cluster's worker processes and its logging belong to the program, not to the test run."""
    ldpt = ldpt_process
    key = write_fixed_key(tmp_path / "k.key")
    pol = write_policy(tmp_path / "p.yaml", survey_policy())
    res = ldpt("privatize", dataset, "--policy", pol, "--key", key, "--out", tmp_path / "ext", "--engine", "dask",
               "--nonce", NONCE, "--part-rows", "3000")
    assert res.returncode == 0, res.stderr
    man = json.loads((tmp_path / "ext.manifest.json").read_text())
    assert man["extract"]["format"] == "parquet-dataset" and man["extract"]["part_rows"] == 3000
    res = ldpt("estimate", tmp_path / "ext", "--engine", "dask", "--format", "json")
    assert res.returncode == 0, res.stderr
    assert json.loads(res.stdout)["rows"] == 12000
    res = ldpt("validate", tmp_path / "ext")
    assert res.returncode == 0, res.stdout + res.stderr
    # a bad value found by a worker: the same one-paragraph error as locally (global row number),
    # exit 2, no traceback (not even a worker's log), nothing written
    bad = tmp_path / "bad"
    bad.mkdir()
    t = pq.read_table(dataset / "c.parquet").to_pandas()
    t.loc[100, "role"] = "Astronaut"
    pq.write_table(pq.read_table(dataset / "a.parquet"), bad / "a.parquet")
    pq.write_table(pa.Table.from_pandas(t, preserve_index=False), bad / "b.parquet")
    res = ldpt("privatize", bad, "--policy", pol, "--key", key, "--out", tmp_path / "bad_out", "--engine", "dask")
    assert res.returncode == 2, res.stderr
    assert "Traceback" not in res.stderr and "ERROR" not in res.stderr, res.stderr
    assert "'role'" in res.stderr and "data row 3101" in res.stderr
    assert not (tmp_path / "bad_out").exists() and not (tmp_path / "bad_out.manifest.json").exists()
    assert [p.name for p in tmp_path.iterdir() if "partial" in p.name] == []


def test_allow_partial_with_held_back_rows_writes_a_dataset_extract_of_every_row(dataset: Path,
                                                                                  tmp_path: Path) -> None:
    """Held-back people stay as placeholder rows, so a dataset extract shows nothing through its
    parts' row counts: every part has fragment_rows rows, and the values equal the single-file
    release's."""
    pol_d = memo_policy()
    pol_d["budget"]["lifetime_epsilon"] = 7.5  # one release costs 7 per row; a repeated staff_id costs more
    pol = parse_policy(pol_d, "survey.yaml")
    led, led2 = tmp_path / "ledger.sqlite3", tmp_path / "ledger2.sqlite3"
    privatize(dataset / "a.parquet", pol, KEY, tmp_path / "n1.parquet", nonce=NONCE, ledger_path=led)
    privatize(dataset / "a.parquet", pol, KEY, tmp_path / "m1.parquet", nonce=NONCE, ledger_path=led2)
    night2 = "0" * 31 + "2"  # the people of a.parquet are now past the budget, the others are not
    r = privatize(dataset, pol, KEY, tmp_path / "ds", nonce=night2, ledger_path=led, allow_partial=True,
                  fragment_rows=5000)
    assert r.held_back_subjects > 0 and r.manifest.rows == 12000 and r.manifest.extract.parts is not None
    assert [p.rows for p in r.manifest.extract.parts] == [5000, 5000, 2000]
    one = privatize(dataset, pol, KEY, tmp_path / "n2.parquet", nonce=night2, ledger_path=led2, allow_partial=True)
    assert one.held_back_subjects == r.held_back_subjects and one.manifest.rows == 12000
    assert pq.read_table(tmp_path / "ds").equals(pq.read_table(tmp_path / "n2.parquet"))
