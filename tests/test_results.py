"""Typed results: estimate() and validate() return frozen dataclasses whose to_dict() is the
JSON shape and whose to_frame() is one row per statistic, each saying what it estimates."""

from __future__ import annotations

import dataclasses
import io
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import FIXED_KEY_BYTES, module_private_dir, write_fixed_key
from typer.testing import CliRunner

from ldptransform import estimate, parse_policy, privatize, validate
from ldptransform.cli import app
from ldptransform.keys import SecretKey
from ldptransform.results import (FRAME_COLUMNS, VALIDATION_FRAME_COLUMNS, ColumnResult, CrossTabResult,
                                  DistributionResult, EstimateResult, FrequencyResult, GroupedMeanResult, MeanResult,
                                  ValidationReport, frame_csv, spreadsheet_safe)

KEY = SecretKey(FIXED_KEY_BYTES)
ROWS = 3000
POLICY = {
    "budget": {"epsilon_per_row": 8.0}, "unlisted": "drop",
    "columns": {
        "site": {"type": "categorical", "categories": ["a", "b", "c"], "missing": "as-category", "epsilon": 2.0},
        "pay": {"type": "numeric", "bounds": [0, 100], "missing": {"fill": 50}, "epsilon": 2.0},
        "years": {"type": "numeric", "bins": [0, 2, 5, 10, 40], "epsilon": 2.0},
        "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 2.0, "mechanism": "hierarchy"},
    },
}


@pytest.fixture(scope="module")
def release(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("results")
    rng = np.random.default_rng(3)  # synthetic input data only
    df = pd.DataFrame({"site": rng.choice(np.array(["a", "b", "c", None], dtype=object), ROWS,
                                          p=[0.5, 0.3, 0.15, 0.05]),
                       "pay": np.where(rng.random(ROWS) < 0.05, np.nan, rng.normal(60, 30, ROWS)),
                       "years": rng.gamma(2.0, 4.0, ROWS), "hours": rng.uniform(10, 50, ROWS)})
    raw = d / "raw.parquet"
    df.to_parquet(raw, index=False)
    out = d / "x.parquet"
    with module_private_dir(tmp_path_factory):
        privatize(raw, parse_policy(POLICY, "results policy"), KEY, out, nonce="7" * 32)
    return {"raw": raw, "out": out, "dir": d}


def _estimate(release: dict[str, Path]) -> EstimateResult:
    return estimate(release["out"], crosstabs=[("site", "years")], mean_by=[("pay", "site")],
                    quantiles=[0.25, 0.5], ranges=[("hours", 20.0, 30.0)])


def test_estimate_is_typed_and_frozen(release: dict[str, Path]) -> None:
    res = _estimate(release)
    assert isinstance(res, EstimateResult)
    site, pay, years, hours = (res.columns[n] for n in ("site", "pay", "years", "hours"))
    assert all(isinstance(c, ColumnResult) for c in (site, pay, years, hours))
    assert (site.family, pay.family, years.family, hours.family) == ("frequency", "mean", "frequency", "distribution")
    assert [f.value for f in site.frequencies] == ["a", "b", "c", "<missing>"]
    assert all(isinstance(f, FrequencyResult) for f in site.frequencies)
    assert isinstance(pay.mean, MeanResult) and pay.mean.se is not None and pay.mean.se > 0
    assert pay.distribution is None
    assert isinstance(years.distribution, DistributionResult) and len(years.distribution.quantiles) == 2
    # a distribution column's mean has its SE and interval (Distribution.mean_ci)
    assert hours.mean is not None and hours.mean.se is not None and hours.mean.se > 0
    lo, est, hi = hours.mean.ci_low, hours.mean.estimate, hours.mean.ci_high
    assert lo is not None and est is not None and hi is not None
    assert lo < est < hi and hours.distribution is not None
    assert [r.low for r in hours.distribution.ranges] == [20.0]
    assert isinstance(res.crosstabs[0], CrossTabResult) and isinstance(res.grouped_means[0], GroupedMeanResult)
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.rows = 1  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        pay.mean.estimate = 0.0  # type: ignore[misc]


def test_to_dict_is_the_json_shape(release: dict[str, Path]) -> None:
    res = _estimate(release)
    d = res.to_dict()
    assert json.loads(json.dumps(d)) == d
    assert list(d) == ["rows", "confidence", "columns", "crosstabs", "grouped_means", "se_method"]
    assert list(d["columns"]["site"]) == ["type", "mechanism", "epsilon", "frequencies", "consistent_method",
                                          "estimand"]
    assert list(d["columns"]["pay"]) == ["type", "mechanism", "epsilon", "bounds", "mean", "estimand"]
    assert list(d["columns"]["years"]) == ["type", "mechanism", "epsilon", "frequencies", "consistent_method",
                                           "distribution", "estimand"]
    assert list(d["columns"]["hours"]) == ["type", "mechanism", "epsilon", "bounds", "mean", "distribution",
                                           "estimand"]
    assert d["columns"]["pay"]["estimand"] == "pay clipped to [0, 100]; missing pay replaced by 50"
    assert list(d["columns"]["hours"]["distribution"]) == ["method", "quantiles", "ranges", "histogram", "cdf"]
    assert set(d["columns"]["site"]["frequencies"][0]) == {"value", "estimate", "se", "ci_low", "ci_high",
                                                          "count_estimate", "consistent"}
    assert set(d["crosstabs"][0]) == {"rows", "columns", "rows_used", "cells", "row_shares", "consistent_method"}
    assert set(d["crosstabs"][0]["row_shares"][0]) == {"row", "column", "estimate", "se", "ci_low", "ci_high",
                                                       "consistent"}
    assert set(d["grouped_means"][0]["groups"][0]) >= {"group", "mean", "share", "consistent"}
    # the typed fields and the dict agree, and the dict view reads like the dict
    pay_mean = res.columns["pay"].mean
    assert pay_mean is not None and d["columns"]["pay"]["mean"]["estimate"] == pay_mean.estimate
    assert res["columns"] == d["columns"] and res.columns["pay"]["mean"] == d["columns"]["pay"]["mean"]
    assert _estimate(release) == res


def test_to_frame_has_one_row_per_statistic_with_its_estimand(release: dict[str, Path]) -> None:
    res = _estimate(release)
    f = res.to_frame()
    assert tuple(f.columns) == FRAME_COLUMNS
    assert tuple(f.columns[:12]) == ("column", "type", "mechanism", "epsilon", "statistic", "value", "estimate", "se",
                                     "ci_low", "ci_high", "consistent", "estimand")
    counts = f.groupby(["column", "statistic"]).size().to_dict()
    hours = res.columns["hours"].distribution
    assert hours is not None
    buckets = len(hours.mass)
    assert counts == {("site", "column"): 1, ("site", "frequency"): 4, ("pay", "column"): 1, ("pay", "mean"): 1,
                      ("years", "column"): 1, ("years", "frequency"): 4, ("years", "distribution"): 1,
                      ("years", "quantile"): 2, ("years", "histogram"): 4, ("years", "cdf"): 5,
                      ("hours", "column"): 1, ("hours", "mean"): 1, ("hours", "distribution"): 1,
                      ("hours", "quantile"): 2, ("hours", "range share"): 1, ("hours", "histogram"): buckets,
                      ("hours", "cdf"): buckets + 1, ("site:years", "joint share"): 16,
                      ("site:years", "share within row"): 16, ("pay:site", "mean"): 4}
    table = f[f["column"].isna()]
    assert list(table["statistic"]) == ["rows"] and table["rows_used"].iloc[0] == ROWS
    assert table["method"].iloc[0] == res.se_method and (f["confidence"] == 0.95).all()
    est = dict(zip(zip(f["column"], f["statistic"], f["value"].fillna("")), f["estimand"]))
    site_enc = "missing site counted as <missing>; every site among its listed categories (the release refuses others)"
    years_enc = ("years clipped to [0, 40]; years in 4 bins with edges 0, 2, 5, 10, 40 (the last bin includes its "
                 "upper edge); no years missing (the release refuses missing values)")
    pay_enc = "pay clipped to [0, 100]; missing pay replaced by 50"
    assert est[("site", "frequency", "a")] == f"share of rows with site = a among all rows; {site_enc}"
    assert est[("site", "frequency", "<missing>")] == f"share of rows with site missing among all rows; {site_enc}"
    assert est[("years", "frequency", "[2, 5)")] == \
        f"share of rows with years in bin [2, 5) among all rows; {years_enc}"
    assert est[("pay", "mean", "")] == f"mean of pay among all rows; {pay_enc}"
    assert est[("pay:site", "mean", "b")] == f"mean of pay among rows with site = b; {pay_enc}; {site_enc}"
    assert est[("site:years", "share within row", "a|[2, 5)")] == \
        f"share of rows with years = [2, 5) among rows with site = a; {site_enc}; {years_enc}"
    assert est[("years", "quantile", "0.25")].startswith("0.25-quantile of years among all rows (")
    assert est[("years", "quantile", "0.25")].endswith(years_enc)
    assert "from the estimated distribution" in est[("hours", "mean", "")]
    assert est[("hours", "range share", "20..30")].startswith("share of rows with hours in [20, 30) among all rows")
    row = f[(f["column"] == "pay") & (f["statistic"] == "mean")].iloc[0]
    m = res.columns["pay"].mean
    assert m is not None
    assert (row["estimate"], row["se"], row["ci_low"], row["ci_high"]) == (m.estimate, m.se, m.ci_low, m.ci_high)
    assert f["estimate"].dtype == np.float64 and f["se"].dtype == np.float64


def test_cli_csv_is_the_frame(release: dict[str, Path]) -> None:
    res = _estimate(release)
    r = CliRunner().invoke(app, ["estimate", str(release["out"]), "--format", "csv", "--crosstab", "site:years",
                                 "--mean-by", "pay:site", "--quantiles", "0.25,0.5", "--range", "hours:20..30"])
    assert r.exit_code == 0, r.output
    assert r.stdout == res.to_csv() == frame_csv(res.to_frame())
    got = pd.read_csv(io.StringIO(r.stdout), keep_default_na=False, dtype=str)
    want = res.to_frame()
    assert list(got.columns) == list(want.columns) and len(got) == len(want)
    for c in ("estimate", "se", "ci_low", "ci_high", "consistent", "count_estimate", "low", "high", "share"):
        g = pd.to_numeric(got[c].replace("", np.nan))
        assert np.array_equal(g.to_numpy(float), want[c].to_numpy(float), equal_nan=True), c  # exact: repr floats
    assert list(got["rows_used"]) == ["" if pd.isna(v) else str(v) for v in want["rows_used"]]
    for c in ("column", "statistic", "value", "estimand", "method", "note", "first_value", "second_value"):
        assert list(got[c]) == ["" if v is None else spreadsheet_safe(v) for v in want[c]], c
    js = CliRunner().invoke(app, ["estimate", str(release["out"]), "--format", "json"])
    assert json.loads(js.stdout) == estimate(release["out"]).to_dict()


def test_validation_report_is_typed(release: dict[str, Path], tmp_path: Path) -> None:
    rep = validate(release["out"], raw=release["raw"], key=KEY)
    assert isinstance(rep, ValidationReport) and rep.ok
    d = rep.to_dict()
    assert list(d) == ["extract", "manifest", "ok", "checks", "calibration"]
    assert d["checks"] == [{"check": c.name, "status": c.status, "detail": c.detail} for c in rep.checks]
    check = rep.check("calibration")
    assert check is not None and check.ok is True and rep.check("no such check") is None
    frame = rep.to_frame()
    assert list(frame.columns) == list(VALIDATION_FRAME_COLUMNS) and len(frame) == len(rep.checks)
    assert list(frame["check"]) == [c.name for c in rep.checks] and list(frame["ok"]) == [c.ok for c in rep.checks]
    assert rep.calibration is not None
    cal = rep.calibration.to_frame()
    # 4 + 4 frequencies, 1 mean; years: 3 quantiles and 4 ranges; hours: the same, and its mean (with an interval)
    assert cal.groupby("statistic").size().to_dict() == {"frequency": 8, "mean": 2, "quantile": 6, "range share": 8}
    assert cal["score"].isna().sum() == 0 and rep.calibration.statistics == 24
    key = write_fixed_key(tmp_path / "k.key")
    r = CliRunner().invoke(app, ["validate", str(release["out"]), "--raw", str(release["raw"]), "--key", str(key),
                                 "--format", "json"])
    assert r.exit_code == 0 and json.loads(r.stdout)["calibration"] == rep.calibration.to_dict()
