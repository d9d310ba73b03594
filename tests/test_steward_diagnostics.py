"""The steward's summary line and diagnostics file: per column, how many values were clipped
(low, high), missing and filled, unknown (released as <other>) or missing (released as
<missing>), and a warning saying what to do for each above columns.WARN_SHARE (1%) of the rows.
Only counts and the policy's own values are shown, never a value of the data; the diagnostics
stay in the private folder, never beside the partner's files."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from conftest import listing, write_fixed_key, write_policy

ROWS = 2000
ODD_AGE = 987.25          # a raw value that must never be shown
ODD_SITE = "Zanzibar Depot"  # a raw category that must never be shown


def _raw(path: Path) -> Path:
    rng = np.random.default_rng(3)  # invented test data
    age = rng.uniform(20, 60, ROWS).round(1)
    age[:100] = 70.0          # 5% above the bounds [18, 65]
    age[100] = ODD_AGE
    age[101:110] = 10.0       # 9 below: 0.45%, counted but under the warning share
    pay = rng.uniform(30000, 90000, ROWS).round(-2)
    site = rng.choice(["North", "South"], ROWS).astype(object)
    site[200:260] = ODD_SITE  # 3% not among the declared categories
    frame = pd.DataFrame({"age": age, "pay": pay, "site": site,
                          "satisfaction": pd.array(rng.integers(1, 6, ROWS), dtype="Int64")})
    frame.loc[300:699, "pay"] = np.nan            # 20% missing, filled with 0
    frame.loc[700:709, "satisfaction"] = np.nan   # 0.5% missing, released as <missing>
    frame.to_csv(path, index=False)
    return path


AGE: dict[str, Any] = {"type": "numeric", "bounds": [18, 65], "epsilon": 1.0}
POLICY: dict[str, Any] = {"budget": {"epsilon_per_row": 4.0}, "unlisted": "drop",
          "columns": {"age": AGE,
                      "pay": {"type": "numeric", "bounds": [0, 100000], "epsilon": 1.0, "missing": {"fill": 0}},
                      "site": {"type": "categorical", "categories": ["North", "South"], "epsilon": 1.0,
                               "unknown": "as-category"},
                      "satisfaction": {"type": "categorical", "categories": [1, 2, 3, 4, 5], "epsilon": 1.0,
                                       "missing": "as-category"}}}


def test_summary_and_diagnostics_count_and_warn(tmp_path: Path, private_dir: Path, ldpt) -> None:
    key = write_fixed_key(tmp_path / "k.key")
    raw = _raw(tmp_path / "raw.csv")
    pol = write_policy(tmp_path / "p.yaml", POLICY)
    pub = tmp_path / "pub"
    pub.mkdir()
    res = ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", pub / "x.parquet")
    assert res.returncode == 0, res.stdout + res.stderr
    err = res.stderr
    summary = err.splitlines()[0]
    assert summary.startswith("privatized 2000 rows into ")
    counts = summary.split("; values changed before randomizing (steward-only): ")[1]
    assert "age: 9 clipped low (0.4%), 101 clipped high (5.1%)" in counts
    assert "pay: 400 missing and filled (20.0%)" in counts
    assert "site: 60 unknown (3.0%, released as <other>)" in counts
    assert "satisfaction: 10 missing (0.5%, released as <missing>)" in counts
    warnings = [line for line in err.splitlines() if line.startswith("WARNING: ")]
    assert len(warnings) == 3, warnings  # age high, pay filled, site unknown; not age low nor satisfaction
    assert any("'age'" in w and "101 of 2000 rows (5.1%)" in w and "above its bounds [18, 65]" in w
               and "widen" in w for w in warnings)
    assert any("'pay'" in w and "400 of 2000 rows (20.0%)" in w and "fill: 0" in w and "missing: as-answer" in w
               for w in warnings)
    assert any("'site'" in w and "60 of 2000 rows (3.0%)" in w and "declare them" in w for w in warnings)
    assert not any("below its bounds" in w or "'satisfaction'" in w for w in warnings)
    diag_files = [p for p in private_dir.iterdir() if p.name.endswith(".PRIVATE-diagnostics.json")]
    assert len(diag_files) == 1
    diag = json.loads(diag_files[0].read_text())
    assert [f"WARNING: {w}" for w in diag["warnings"]] == warnings
    assert diag["columns"]["age"] == {"missing": 0, "filled": 0, "unknown_as_other": 0, "missing_as_category": 0,
                                      "clipped_low": 9, "clipped_high": 101}
    assert diag["columns"]["pay"]["filled"] == 400 and diag["columns"]["site"]["unknown_as_other"] == 60
    # never a value of the data; never beside the partner's files
    text = err + diag_files[0].read_text()
    assert f"{ODD_AGE:g}" not in text and ODD_SITE not in text
    assert listing(pub) == ["x.manifest.json", "x.parquet"]


def test_no_counts_line_for_clean_data(tmp_path: Path, ldpt) -> None:
    key = write_fixed_key(tmp_path / "k.key")
    raw = tmp_path / "raw.csv"
    pd.DataFrame({"age": np.linspace(20, 60, 500)}).to_csv(raw, index=False)
    pol = write_policy(tmp_path / "p.yaml", {"budget": {"epsilon_per_row": 1.0}, "unlisted": "drop",
                                             "columns": {"age": AGE}})
    res = ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", tmp_path / "x.parquet")
    assert res.returncode == 0, res.stderr
    assert "values changed before randomizing" not in res.stderr and "WARNING" not in res.stderr


def test_the_api_result_carries_them(tmp_path: Path) -> None:
    from ldptransform import parse_policy, privatize
    from ldptransform.keys import load_key

    raw = _raw(tmp_path / "raw.csv")
    res = privatize(raw, parse_policy(POLICY, "p"), load_key(write_fixed_key(tmp_path / "k.key")),
                    tmp_path / "x.parquet")
    assert len(res.warnings) == 3 and any(t.startswith("pay: 400 missing and filled") for t in res.column_counts)
