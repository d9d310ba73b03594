"""A CSV extract decodes to exactly what the Parquet extract of the same release decodes to, for
every registered mechanism (and the missing-as-answer pairs): a CSV cell is read back as text and
converted to the type the manifest records, so every output type a mechanism writes (int8 levels,
int32 reports, bit strings, doubles) must be read back as that type."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from conftest import FIXED_NONCE, write_fixed_key
from ldptransform import estimate, privatize, validate
from ldptransform.mechanisms import registry
from ldptransform.policy import parse_policy

CATS = ["c0", "c1", "c2", "c3", "c4"]
ROWS = 2000


def _column(name: str) -> dict[str, Any]:
    cls = registry()[name]
    if cls.family == "frequency":
        col: dict[str, Any] = {"type": "categorical", "categories": list(CATS), "epsilon": 1.0, "mechanism": name}
        if name == "matrix":  # keep 4 in 10 answers, the rest spread evenly (ratio 0.4 / 0.15 < e)
            k = len(CATS)
            col["matrix"] = (np.full((k, k), 0.6 / (k - 1)) + np.eye(k) * (0.4 - 0.6 / (k - 1))).tolist()
        return col
    col = {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": name}
    if cls.family == "distribution":
        col["needs"] = ["quantiles"]
    return col


def _data(tmp_path: Path) -> Path:
    rng = np.random.default_rng(16)  # generated input rows for this test only
    raw = tmp_path / "raw.parquet"
    pd.DataFrame({"cat": rng.choice(CATS, ROWS, p=[0.4, 0.3, 0.15, 0.1, 0.05]),
                  "num": np.round(rng.gamma(2.0, 12.0, ROWS).clip(0, 100), 1)}).to_parquet(raw, index=False)
    return raw


def _figures(result: Any) -> dict[str, Any]:
    d = json.loads(json.dumps(result.to_dict()))
    d.pop("extract", None)
    d.pop("extracts", None)
    return d


@pytest.mark.parametrize("name", sorted(registry()))
def test_csv_extract_decodes_as_the_parquet_one(name: str, tmp_path: Path, private_dir: Path) -> None:
    col = _column(name)
    column = "cat" if col["type"] == "categorical" else "num"
    policy = parse_policy({"budget": {"epsilon_per_row": 1.0}, "unlisted": "drop", "columns": {column: col}},
                          f"{name}-policy")
    key = write_fixed_key(tmp_path / "release.key")
    from ldptransform import load_key

    k = load_key(key)
    raw = _data(tmp_path)
    out = {}
    for fmt in ("parquet", "csv"):
        res = privatize(raw, policy, k, tmp_path / f"extract_{fmt}.{fmt}", nonce=FIXED_NONCE)
        out[fmt] = res.extract_path
    pq_est, csv_est = estimate(out["parquet"]), estimate(out["csv"])
    assert _figures(csv_est) == _figures(pq_est)
    report = validate(out["csv"])
    assert report.ok, [c.to_dict() for c in report.checks if c.status == "fail"]


def test_missing_as_answer_csv_extract_decodes_as_the_parquet_one(tmp_path: Path, private_dir: Path) -> None:
    """The missing flag beside a value (a bool-like flag column and the value's own report)."""
    from ldptransform import load_key

    rng = np.random.default_rng(17)  # generated input rows for this test only
    raw = tmp_path / "raw.parquet"
    num = rng.uniform(0, 100, ROWS)
    num[rng.random(ROWS) < 0.2] = np.nan
    pd.DataFrame({"num": num}).to_parquet(raw, index=False)
    policy = parse_policy({"budget": {"epsilon_per_row": 2.0}, "columns": {"num": {
        "type": "numeric", "bounds": [0, 100], "epsilon": 2.0, "missing": "as-answer", "needs": ["quantiles"]}}},
        "missing-policy")
    k = load_key(write_fixed_key(tmp_path / "release.key"))
    est = {fmt: estimate(privatize(raw, policy, k, tmp_path / f"extract_{fmt}.{fmt}", nonce=FIXED_NONCE).extract_path)
           for fmt in ("parquet", "csv")}
    assert _figures(est["csv"]) == _figures(est["parquet"])
