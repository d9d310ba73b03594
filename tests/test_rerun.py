"""The idempotent rerun of a nightly job (``privatize(..., idempotent=True)``, release/rerun.py):
an identical release already published is a no-op (nothing written, charged or recorded: the
ledger and the nonce record keep their bytes), anything else published there is refused with
``OutputExistsError`` (exit code 5) saying what differs, and leaves everything as it was."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from ldptransform.errors import OptionError, OutputExistsError
from ldptransform.keys import SecretKey
from ldptransform.policy import LoadedPolicy, parse_policy
from ldptransform.release import nonces, privatize

KEY = SecretKey(bytes(range(7, 39)))
OTHER_KEY = SecretKey(bytes(range(8, 40)))
NONCE = "00112233445566778899aabbccddeeff"
N = 600


def rows(n: int = N, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # invented input data only, never release noise
    return pd.DataFrame({"person": [f"person-{i:05d}" for i in range(n)],
                         "team": rng.choice(["a", "b", "c"], size=n),
                         "hours": np.round(rng.uniform(0, 60, size=n), 1)})


def policy(eps: float = 1.0, cap: float | None = 20.0) -> LoadedPolicy:
    budget: dict[str, Any] = {"epsilon_per_row": 2.0}
    if cap is not None:
        budget["lifetime_epsilon"] = cap
    return parse_policy({
        "budget": budget, "subject_key": "person",
        "columns": {"team": {"type": "categorical", "categories": ["a", "b", "c"], "epsilon": eps},
                    "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0}},
    }, "rerun.yaml")


def steward(tmp: Path) -> Path:
    d = tmp / "steward"
    d.mkdir(mode=0o700, exist_ok=True)
    return d


def run(inp: Any, tmp: Path, out: str = "night.parquet", pol: LoadedPolicy | None = None, key: SecretKey = KEY,
        **kw: Any) -> Any:
    kw.setdefault("idempotent", True)
    return privatize(inp, pol or policy(), key, tmp / "out" / out, ledger_path=tmp / "steward" / "ledger.sqlite3",
                     diagnostics_path=steward(tmp) / f"diag-{len(os.listdir(steward(tmp)))}.json", **kw)


def snapshot(tmp: Path) -> dict[str, str]:
    """Every file of the outputs, the steward's folder (ledger, diagnostics) and the nonce record,
    with its bytes' digest and its modification time."""
    out = {}
    for folder in (tmp / "out", tmp / "steward", nonces.state_path().parent):
        for root, _, files in os.walk(folder):
            for name in files:
                p = Path(root) / name
                out[str(p)] = f"{hashlib.sha256(p.read_bytes()).hexdigest()} {p.stat().st_mtime_ns}"
    return out


@pytest.fixture
def published(tmp_path: Path) -> tuple[Path, pd.DataFrame, Any]:
    df = rows()
    csv = tmp_path / "night.csv"
    df.to_csv(csv, index=False)
    (tmp_path / "out").mkdir()
    first = run(csv, tmp_path)
    assert not first.already_published and first.ledger_release_id == 1
    return csv, df, first


def test_an_identical_rerun_is_a_no_op(tmp_path: Path, published: tuple[Path, pd.DataFrame, Any]) -> None:
    csv, _, first = published
    before = snapshot(tmp_path)
    again = run(csv, tmp_path)
    assert again.already_published and again.ledger_release_id is None
    assert again.manifest == first.manifest
    assert again.extract_path == first.extract_path and again.manifest_path == first.manifest_path
    assert snapshot(tmp_path) == before  # the ledger, the nonce record and the outputs keep their bytes
    # without idempotent mode the same rerun is refused as an existing output, as before
    with pytest.raises(OutputExistsError, match="already exists"):
        run(csv, tmp_path, idempotent=False)
    assert snapshot(tmp_path) == before


@pytest.mark.parametrize("kind", ["pandas", "table", "reader", "nonce"])
def test_an_identical_rerun_from_memory_is_a_no_op(tmp_path: Path, kind: str) -> None:
    df = rows()
    (tmp_path / "out").mkdir()

    def inp() -> Any:
        if kind in ("pandas", "nonce"):
            return df.copy()
        table = pa.Table.from_pandas(df, preserve_index=False)
        return table if kind == "table" else pa.RecordBatchReader.from_batches(table.schema, table.to_batches(50))

    nonce = NONCE if kind == "nonce" else None
    first = run(inp(), tmp_path, "night", nonce=nonce, fragment_rows=250)  # a dataset folder of three parts
    before = snapshot(tmp_path)
    again = run(inp(), tmp_path, "night", nonce=nonce, fragment_rows=250)
    assert again.already_published and again.manifest == first.manifest
    assert snapshot(tmp_path) == before


def _refused(tmp: Path, before: dict[str, str], *args: Any, match: str, **kw: Any) -> str:
    with pytest.raises(OutputExistsError, match=match) as err:
        run(*args, **kw)
    text = str(err.value)
    assert err.value.exit_code == 5 and "\n" not in text
    assert "--overwrite" in text and "another --out" in text and "nothing was written, charged or recorded" in text
    assert snapshot(tmp) == before
    return text


def test_a_rerun_with_changed_input_is_refused(tmp_path: Path, published: tuple[Path, pd.DataFrame, Any]) -> None:
    csv, df, _ = published
    changed = df.copy()
    changed.loc[5, "hours"] = 0.5 if changed.loc[5, "hours"] != 0.5 else 1.5
    csv2 = tmp_path / "changed.csv"
    changed.to_csv(csv2, index=False)
    before = snapshot(tmp_path)
    _refused(tmp_path, before, csv2, tmp_path, match="other input data")
    _refused(tmp_path, before, changed, tmp_path, match="other input data than the pandas DataFrame given")
    digest = hashlib.sha256(csv2.read_bytes()).hexdigest()
    assert digest not in _refused(tmp_path, before, csv2, tmp_path, match="other input")


def test_a_rerun_with_another_policy_key_or_nonce_is_refused(tmp_path: Path,
                                                             published: tuple[Path, pd.DataFrame, Any]) -> None:
    csv, _, first = published
    before = snapshot(tmp_path)
    _refused(tmp_path, before, csv, tmp_path, pol=policy(eps=0.5), match="different policy")
    _refused(tmp_path, before, csv, tmp_path, key=OTHER_KEY, match="another key")
    _refused(tmp_path, before, csv, tmp_path, nonce="ff" * 16, match=f"nonce {first.manifest.nonce}")
    # the nonce the release has, given explicitly: the identical release
    assert run(csv, tmp_path, nonce=first.manifest.nonce).already_published
    assert snapshot(tmp_path) == before


def test_a_damaged_or_partial_release_is_refused(tmp_path: Path, published: tuple[Path, pd.DataFrame, Any]) -> None:
    csv, _, first = published
    data = first.extract_path.read_bytes()
    first.extract_path.write_bytes(data[:100] + bytes([data[100] ^ 1]) + data[101:])
    _refused(tmp_path, snapshot(tmp_path), csv, tmp_path, match="extract is damaged or is not its manifest's")
    first.extract_path.unlink()
    _refused(tmp_path, snapshot(tmp_path), csv, tmp_path, match="extract .* is missing")
    first.extract_path.write_bytes(data)
    text = first.manifest_path.read_text()
    first.manifest_path.write_text(text[:-20])
    _refused(tmp_path, snapshot(tmp_path), csv, tmp_path, match="manifest .* is damaged")
    first.manifest_path.unlink()
    _refused(tmp_path, snapshot(tmp_path), csv, tmp_path, match="manifest .* is missing")
    first.manifest_path.write_text(text)
    assert run(csv, tmp_path).already_published  # restored: the identical release again


def test_a_release_the_nonce_record_does_not_hold_is_refused(tmp_path: Path,
                                                             published: tuple[Path, pd.DataFrame, Any]) -> None:
    csv, _, _ = published
    nonces.state_path().write_text("")  # another steward's release, or a lost record
    _refused(tmp_path, snapshot(tmp_path), csv, tmp_path, match="holds no release of its nonce")


def test_without_a_published_release_it_is_an_ordinary_release(tmp_path: Path) -> None:
    (tmp_path / "out").mkdir()
    res = privatize(rows(), policy(cap=None), KEY, tmp_path / "out" / "a.csv", idempotent=True, nonce=NONCE,
                    diagnostics_path=steward(tmp_path) / "d.json")
    with nonces.rederiving():
        plain = privatize(rows(), policy(cap=None), KEY, tmp_path / "out" / "b.csv", nonce=NONCE,
                          diagnostics_path=steward(tmp_path) / "e.json")
    assert not res.already_published and res.extract_path.read_bytes() == plain.extract_path.read_bytes()
    assert [line for line in nonces.state_path().read_text().splitlines() if NONCE in line]


def test_idempotent_and_overwrite_together_is_a_usage_error(tmp_path: Path) -> None:
    (tmp_path / "out").mkdir()
    with pytest.raises(OptionError, match="idempotent and overwrite ask for opposite things") as err:
        run(rows(), tmp_path, overwrite=True)
    assert err.value.exit_code == 2
    assert os.listdir(tmp_path / "out") == []
