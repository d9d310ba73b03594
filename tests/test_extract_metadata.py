"""Extracts that explain themselves: every Parquet extract field carries, in its Arrow field
metadata, the text of its manifest column entry (ldptransform/manifest.py ``field_metadata``;
docs/extract-format.md), and nothing that depends on the data.

Checked here: the keys and their text against the manifest (one file and dataset parts, shuffled
and in input order); the same metadata whatever the data (other values, another row count);
nothing of the input's own metadata passed on; older extracts without field metadata still
estimate and validate; ``entries_from_fields`` reads the entries back and refuses partial
metadata.  Byte identity across engines, batch sizes and part layouts is pinned by
tests/test_engines.py and tests/test_shuffle.py (they write this schema on every route).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import DEMO_CSV, survey_policy
from ldptransform.errors import DataError, ManifestError
from ldptransform.estimate import estimate
from ldptransform.keys import SecretKey
from ldptransform.manifest import FIELD_KEYS, FIELD_PREFIX, entries_from_fields, field_metadata, load_manifest
from ldptransform.perrow import read_estimates
from ldptransform.policy import parse_policy
from ldptransform.release import privatize
from ldptransform.validate import validate

KEY = SecretKey(bytes(range(90, 122)))
NONCES = [f"{0xE0 + i:032x}" for i in range(8)]


def _policy() -> Any:
    """The tests' survey policy with a missing-as-answer column and a distribution column too."""
    pol = survey_policy()
    pol["budget"]["epsilon_per_row"] = 9.0
    pol["columns"]["weekly_hours"] = {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "missing": "as-answer"}
    pol["columns"]["pay"] = {"type": "numeric", "bounds": [24000, 140000], "epsilon": 1.0, "mechanism": "hierarchy"}
    return parse_policy(pol, "test")


def _ldpt(field: pa.Field) -> dict[str, str]:
    md = field.metadata or {}
    return {k.decode()[len(FIELD_PREFIX):]: v.decode() for k, v in md.items()}


def _schemas(extract: Path) -> list[pa.Schema]:
    files = sorted(extract.glob("*.parquet")) if extract.is_dir() else [extract]
    assert files
    return [pq.ParquetFile(f).schema_arrow for f in files]


def _check_against_manifest(extract: Path, manifest: Path) -> None:
    m = load_manifest(manifest)
    by_output = {o.name: (c, o) for c in m.columns for o in c.outputs}
    for schema in _schemas(extract):
        assert schema.metadata is None or set(schema.metadata) == set()  # no table-level metadata of ours
        assert schema.names == m.extract.columns
        for f in schema:
            entry, out = by_output[f.name]
            md = _ldpt(f)
            assert set(f.metadata or {}) == {(FIELD_PREFIX + k).encode() for k in md}
            assert set(md) <= set(FIELD_KEYS)
            assert md["format"] == "1" and md["column"] == entry.name and md["type"] == entry.type
            assert md["meaning"] == out.meaning
            if entry.type == "public":
                assert md["privatized"] == "false" and md["mechanism"] == "none" and "spec" not in md
                assert "in the clear" in md["note"] and "does not protect" in md["note"]
            else:
                assert md["privatized"] == "true" and entry.mechanism is not None
                assert md["mechanism"] == entry.mechanism["mechanism"]
                assert json.loads(md["spec"]) == entry.mechanism
                assert (json.loads(md["bins"]) if "bins" in md else None) == entry.bins
                assert (json.loads(md["labels"]) if "labels" in md else None) == entry.labels
            assert md.get("note") == entry.note
            assert f.metadata == field_metadata(entry, out)


@pytest.mark.parametrize("layout", ["file", "dataset", "as-input-dataset"])
def test_every_field_carries_its_manifest_entry(layout: str, tmp_path: Path) -> None:
    lp = _policy()
    if layout == "as-input-dataset":
        raw = survey_policy()
        raw["budget"]["epsilon_per_row"] = 9.0
        raw["output"] = {"row_order": "as-input"}
        lp = parse_policy(raw, "test")
    out = tmp_path / ("e.parquet" if layout == "file" else "parts")
    res = privatize(DEMO_CSV, lp, KEY, out, nonce=NONCES[0], fragment_rows=None if layout == "file" else 3000)
    _check_against_manifest(res.extract_path, res.manifest_path)
    if layout != "file":
        assert len(_schemas(res.extract_path)) > 1
        first = _schemas(res.extract_path)[0]
        assert all(s.equals(first, check_metadata=True) for s in _schemas(res.extract_path))


def test_the_metadata_does_not_depend_on_the_data(tmp_path: Path) -> None:
    """Two inputs with other values and another row count give the same field metadata, byte for
    byte, and the Parquet footer's key-value metadata holds only Arrow's own schema."""
    lp = _policy()
    df = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False)
    other = df.sample(frac=0.37, random_state=3).reset_index(drop=True)
    other["pay"] = (pd.to_numeric(other["pay"]) * 1.1).round(2).astype(str)
    other["site"] = other["site"].iloc[::-1].to_numpy()
    raw = tmp_path / "other.csv"
    other.to_csv(raw, index=False)
    a = privatize(DEMO_CSV, lp, KEY, tmp_path / "a.parquet", nonce=NONCES[1])
    b = privatize(raw, lp, KEY, tmp_path / "b.parquet", nonce=NONCES[2])
    sa, sb = _schemas(a.extract_path)[0], _schemas(b.extract_path)[0]
    assert sa.equals(sb, check_metadata=True)
    for path in (a.extract_path, b.extract_path):
        assert set(pq.ParquetFile(path).metadata.metadata) == {b"ARROW:schema"}
    text = b"".join(k + v for f in sa for k, v in (f.metadata or {}).items())
    for figure in (str(len(df)), str(len(other)), a.manifest.extract.sha256, b.manifest.extract.sha256):
        assert figure.encode() not in text


def test_the_inputs_own_metadata_never_reaches_the_extract(tmp_path: Path) -> None:
    """A Parquet input's table metadata (pandas' index record) and a public column's field metadata are
    not copied: only the release's own keys are written."""
    df = pd.read_csv(DEMO_CSV)
    df.index = pd.Index(np.arange(len(df)) * 7 + 11, name="secret_index")
    table = pa.Table.from_pandas(df, preserve_index=True)
    i = table.schema.get_field_index("survey_wave")
    table = table.set_column(i, table.schema.field(i).with_metadata({b"origin": b"hr-system-export-4711"}),
                             table.column(i))
    raw = tmp_path / "raw.parquet"
    pq.write_table(table, raw)
    pol = survey_policy()
    pol["columns"]["secret_index"] = {"type": "drop"}
    res = privatize(raw, parse_policy(pol, "test"), KEY, tmp_path / "e.parquet", nonce=NONCES[3])
    blob = res.extract_path.read_bytes()
    assert b"hr-system-export-4711" not in blob and b"secret_index" not in blob and b"pandas" not in blob
    for f in _schemas(res.extract_path)[0]:
        assert all(k.startswith(FIELD_PREFIX.encode()) for k in (f.metadata or {}))
    _check_against_manifest(res.extract_path, res.manifest_path)


def test_extracts_without_field_metadata_still_estimate_and_validate(tmp_path: Path,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """An extract written before fields carried metadata (the same release without it) decodes to the
    same estimates, validates, and reads per row with its manifest; without one the reader says what to
    give (exit code 2)."""
    from ldptransform.release import columns

    lp = _policy()
    new = privatize(DEMO_CSV, lp, KEY, tmp_path / "new.parquet", nonce=NONCES[4])
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(tmp_path / "older-steward"))   # the same nonce: another steward
    (tmp_path / "older-steward").mkdir(mode=0o700)
    monkeypatch.setattr(columns, "described_fields", lambda plans: [f for p in plans for f in p.fields])
    old = privatize(DEMO_CSV, lp, KEY, tmp_path / "old.parquet", nonce=NONCES[4])
    assert all(f.metadata is None for f in _schemas(old.extract_path)[0])
    assert old.extract_path.read_bytes() != new.extract_path.read_bytes()
    assert pq.read_table(old.extract_path).equals(pq.read_table(new.extract_path))   # the same values
    e_new, e_old = estimate(new.extract_path).to_dict(), estimate(old.extract_path).to_dict()
    e_new.pop("extracts", None)
    e_old.pop("extracts", None)
    assert e_new == e_old
    for res in (new, old):
        report = validate(res.extract_path)
        assert report.ok, [c for c in report.checks if c.status == "fail"]
    pd.testing.assert_frame_equal(read_estimates(old.extract_path), read_estimates(new.extract_path))
    alone = tmp_path / "alone"
    alone.mkdir()
    (alone / "old.parquet").write_bytes(old.extract_path.read_bytes())
    with pytest.raises(ManifestError, match="carries no ldptransform metadata|carry no ldptransform metadata") as err:
        read_estimates(alone / "old.parquet")
    assert err.value.exit_code == 2 and "manifest=" in str(err.value)


def test_entries_read_back_from_the_fields(tmp_path: Path) -> None:
    res = privatize(DEMO_CSV, _policy(), KEY, tmp_path / "e.parquet", nonce=NONCES[5])
    schema = _schemas(res.extract_path)[0]
    entries = entries_from_fields(list(schema), "extract e.parquet")
    assert entries is not None
    for got, want in zip(entries, res.manifest.columns, strict=True):
        assert got.name == want.name and got.type == want.type and got.mechanism == want.mechanism
        assert got.outputs == want.outputs and got.labels == want.labels and got.bins == want.bins
        assert got.note == want.note
    assert entries_from_fields([pa.field("x", pa.int64())], "extract x") is None
    # a field without the keys beside fields with them: refused, naming the field and the fix
    partial = [*list(schema)[:-1], pa.field(schema.names[-1], schema.field(schema.names[-1]).type)]
    with pytest.raises(DataError, match=repr(schema.names[-1])) as err:
        entries_from_fields(partial, "extract e.parquet")
    assert "manifest=" in str(err.value)
    broken = list(schema)
    md = dict(broken[0].metadata)
    md[b"ldpt.spec"] = b"{not json"
    broken[0] = broken[0].with_metadata(md)
    with pytest.raises(DataError, match="cannot be read"):
        entries_from_fields(broken, "extract e.parquet")
