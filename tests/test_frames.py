"""Results as frames: every result's ``to_frame()`` holds everything its ``to_dict()`` (the JSON
of ``--format json``) holds, and reads back into the same JSON; ``ldpt estimate --format csv`` is
``to_frame()`` written out.  The estimates come from real releases of generated data (fixed key
and nonces) with every analysis: frequencies, means, quantiles, range shares, cross-tabs, grouped
means, ``missing: as-answer`` columns, square-wave columns (no intervals), binned columns, a
sampled release and two merged releases."""

from __future__ import annotations

import dataclasses
import io
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import (DEMO_CSV, FIXED_KEY_BYTES, FIXED_NONCE, module_private_dir, survey_policy, write_fixed_key,
                      write_policy)
from typer.testing import CliRunner

from ldptransform import estimate, parse_policy, privatize, validate
from ldptransform.cli import app, json_text
from ldptransform.keys import SecretKey
from ldptransform.plan import PLAN_FRAME_COLUMNS, PlanResult, plan
from ldptransform.results import (FRAME_COLUMNS, VALIDATION_FRAME_COLUMNS, Check, EstimateResult, ValidationReport,
                                  frame_csv)

KEY = SecretKey(FIXED_KEY_BYTES)
ROWS = 4000

FULL = {
    "budget": {"epsilon_per_row": 8.0}, "unlisted": "drop",
    "columns": {
        "site": {"type": "categorical", "categories": ["north", "south", "east"], "missing": "as-category",
                 "unknown": "as-category", "epsilon": 1.0},
        "grade": {"type": "categorical", "categories": ["a", "b"], "epsilon": 1.0, "mechanism": "grr"},
        "pay": {"type": "numeric", "bounds": [0, 100], "missing": "as-answer", "epsilon": 1.0},
        "age": {"type": "numeric", "bins": [18, 30, 45, 60, 70], "missing": "as-answer", "epsilon": 1.0,
                "needs": ["frequencies", "quantiles"]},
        "hours": {"type": "numeric", "bounds": [0, 60], "missing": "as-answer", "epsilon": 1.0,
                  "needs": ["mean", "quantiles"]},
        "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": "square-wave"},
        "tenure": {"type": "numeric", "bins": [0, 2, 5, 10, 40], "epsilon": 1.0},
        "level": {"type": "numeric", "bounds": [0, 10], "missing": {"fill": 5}, "epsilon": 1.0},
        "wave": {"type": "public"},
    },
}
FULL_ANALYSES: dict[str, Any] = {"crosstabs": [("site", "grade"), ("tenure", "grade")],
                                 "mean_by": [("level", "site"), ("level", "grade")],
                                 "quantiles": [0.1, 0.5, 0.9], "ranges": [("hours", 10.0, 20.0), ("score", 20.0, 40.0),
                                                                         ("age", 30.0, 45.0)]}
SAMPLED = {
    "budget": {"epsilon_per_row": 5.0, "strategy": "sample"},
    "columns": {"pay": {"type": "numeric", "bounds": [-1, 1]},
                "site": {"type": "categorical", "categories": ["n", "s", "e", "w"], "mechanism": "oue"},
                "team": {"type": "categorical", "categories": [f"t{i}" for i in range(6)], "mechanism": "olh"},
                "years": {"type": "numeric", "bins": [0, 2, 5, 10, 40]},
                "wave": {"type": "public"}},
}
MERGED = {"budget": {"epsilon_per_row": 2.0},
          "columns": {"site": {"type": "categorical", "categories": ["n", "s"], "epsilon": 1.0},
                      "pay": {"type": "numeric", "bounds": [0, 10], "epsilon": 1.0}}}


def _table(rng: np.random.Generator, n: int) -> pd.DataFrame:
    """Synthetic input data only (a few missing values where the policy handles them)."""
    def gaps(x: np.ndarray, share: float) -> np.ndarray:
        return np.where(rng.random(n) < share, np.nan, x)

    return pd.DataFrame({
        "site": rng.choice(np.array(["north", "south", "east", "west", None], dtype=object), n,
                           p=[0.4, 0.3, 0.2, 0.05, 0.05]),
        "grade": rng.choice(np.array(["a", "b"], dtype=object), n, p=[0.6, 0.4]),
        "pay": gaps(rng.uniform(10, 90, n), 0.1), "age": gaps(rng.uniform(18, 70, n), 0.1),
        "hours": gaps(rng.uniform(5, 55, n), 0.1), "score": rng.beta(2, 5, n) * 100,
        "tenure": rng.gamma(2.0, 4.0, n), "level": gaps(rng.uniform(0, 10, n), 0.05),
        "wave": rng.choice(np.array(["w1", "w2"], dtype=object), n),
        "team": rng.choice(np.array([f"t{i}" for i in range(6)], dtype=object), n),
        "years": rng.gamma(2.0, 4.0, n)})


@pytest.fixture(scope="module")
def releases(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    d = tmp_path_factory.mktemp("frames")
    rng = np.random.default_rng(16)
    out: dict[str, Any] = {"dir": d}
    with module_private_dir(tmp_path_factory):
        df = _table(rng, ROWS)
        raw = d / "full.parquet"
        df[list(FULL["columns"])].to_parquet(raw, index=False)
        out["full_raw"] = raw
        out["full"] = privatize(raw, parse_policy(FULL, "full policy"), KEY, d / "full-x.parquet",
                                nonce=FIXED_NONCE).extract_path
        sampled = d / "sampled.csv"
        sdf = _table(rng, 3000)[list(SAMPLED["columns"])]
        sdf["pay"] = rng.uniform(-1, 1, len(sdf))
        sdf["site"] = rng.choice(np.array(["n", "s", "e", "w"], dtype=object), len(sdf))
        sdf.to_csv(sampled, index=False)
        out["sampled"] = privatize(sampled, parse_policy(SAMPLED, "sampled policy"), KEY, d / "sampled-x.parquet",
                                   nonce="5" * 32).extract_path
        parts = []
        for i, nonce in enumerate(("1" * 32, "2" * 32)):
            part = d / f"part{i}.parquet"
            pd.DataFrame({"site": rng.choice(np.array(["n", "s"], dtype=object), 1500),
                          "pay": rng.uniform(0, 10, 1500)}).to_parquet(part, index=False)
            parts.append(privatize(part, parse_policy(MERGED, "merged policy"), KEY, d / f"part{i}-x.parquet",
                                   nonce=nonce).extract_path)
        out["merged"] = parts
        out["survey"] = privatize(DEMO_CSV, parse_policy(survey_policy(), "survey policy"), KEY,
                                  d / "survey-x.parquet", nonce="9" * 32).extract_path
    return out


def _estimate(releases: dict[str, Any], which: str) -> EstimateResult:
    if which == "full":
        return estimate(releases["full"], **FULL_ANALYSES)
    if which == "survey":
        return estimate(releases["survey"], crosstabs=[("site", "role")], mean_by=[("pay", "site")],
                        quantiles=[0.25, 0.75])
    return estimate(releases[which])


def strict(d: dict[str, Any]) -> dict[str, Any]:
    """The JSON ``--format json`` writes (a non-finite figure as null), read back."""
    out: dict[str, Any] = json.loads(json_text(d))
    return out


@pytest.mark.parametrize("which", ["full", "sampled", "merged", "survey"])
def test_the_frame_reads_back_into_the_json(releases: dict[str, Any], which: str) -> None:
    res = _estimate(releases, which)
    frame = res.to_frame()
    assert tuple(frame.columns) == FRAME_COLUMNS
    back = EstimateResult.from_frame(frame)
    assert back.to_dict() == strict(res.to_dict())
    assert json_text(back.to_dict()) == json_text(res.to_dict())   # the same JSON text, number for number
    pd.testing.assert_frame_equal(back.to_frame(), frame)          # and the same frame, estimands included
    # the frame is a copy of the figures: changing one changes what is read back
    changed = frame.copy()
    at = changed.index[changed["statistic"].isin(["frequency", "mean"])][0]
    changed.loc[at, "estimate"] = 0.123456789
    assert EstimateResult.from_frame(changed).to_dict() != back.to_dict()


def test_every_part_of_the_json_has_its_rows(releases: dict[str, Any]) -> None:
    res = _estimate(releases, "full")
    d, f = strict(res.to_dict()), res.to_frame()
    kinds = set(zip(f["type"].fillna(""), f["statistic"]))
    for k in [("", "rows"), ("categorical", "column"), ("categorical", "frequency"), ("numeric", "mean"),
              ("numeric", "distribution"), ("numeric", "quantile"), ("numeric", "range share"),
              ("numeric", "histogram"), ("numeric", "cdf"), ("binned", "frequency"), ("binned", "quantile"),
              ("binned", "range share"), ("crosstab", "joint share"), ("crosstab", "share within row"),
              ("grouped mean", "mean"), ("public", "public column")]:
        assert k in kinds, k

    def rows(column: str, statistic: str) -> pd.DataFrame:
        return f[(f["column"] == column) & (f["statistic"] == statistic)]

    # missing: as-answer: the share missing beside the mean (pay), the bins (age) or the distribution (hours)
    for name in ("pay", "age", "hours"):
        freq = d["columns"][name]["frequencies"]
        got = rows(name, "frequency")
        assert list(got["value"]) == [x["value"] for x in freq] and "<missing>" in list(got["value"])
        assert list(got["count_estimate"]) == [x["count_estimate"] for x in freq]
    assert "among rows with a value" in rows("hours", "distribution")["estimand"].iloc[0]
    # square-wave: no interval, null in the JSON and NaN in the frame, with the reason in the method
    sw = d["columns"]["score"]["distribution"]
    assert all(q["se"] is None and q["ci_low"] is None for q in sw["quantiles"])
    assert rows("score", "quantile")[["se", "ci_low", "ci_high"]].isna().all().all()
    assert list(rows("score", "quantile")["method"]) == [q["method"] for q in sw["quantiles"]]
    assert rows("score", "distribution")["method"].iloc[0] == sw["method"]
    # histograms and CDFs, number for number
    for name in ("score", "hours", "tenure", "age"):
        dist = d["columns"][name]["distribution"]
        h, c = rows(name, "histogram"), rows(name, "cdf")
        assert list(h["estimate"]) == dist["histogram"]["mass"]
        assert list(h["low"]) + [h["high"].iloc[-1]] == dist["histogram"]["edges"] == list(c["high"])
        assert list(c["estimate"]) == dist["cdf"]["F"]
        assert h["estimand"].str.contains("bucket").all() and c["estimand"].str.contains("CDF").all()
    # bounds and the consistent method on the column rows
    assert tuple(rows("pay", "column")[["low", "high"]].iloc[0]) == (0.0, 100.0)
    assert rows("site", "column")["method"].iloc[0] == d["columns"]["site"]["consistent_method"]
    # grouped means: the group's share and note; cross-tabs: both labels, rows used, method
    g = f[(f["type"] == "grouped mean") & (f["column"] == "level:site")]
    groups = d["grouped_means"][0]["groups"]
    assert list(g["second_value"]) == [x["group"] for x in groups] and list(g["share"]) == [x["share"] for x in groups]
    assert list(g["note"].fillna("-")) == [x.get("note", "-") for x in groups]
    assert (g["rows_used"] == d["grouped_means"][0]["rows_used"]).all() and (g["first"] == "level").all()
    x = f[(f["type"] == "crosstab") & (f["column"] == "tenure:grade") & (f["statistic"] == "joint share")]
    cells = d["crosstabs"][1]["cells"]
    assert list(zip(x["first_value"], x["second_value"])) == [(c["row"], c["column"]) for c in cells]
    assert (x["method"] == d["crosstabs"][1]["consistent_method"]).all()
    # the table's own figures
    head = f[f["statistic"] == "rows"].iloc[0]
    assert (head["rows_used"], head["method"], head["confidence"]) == (ROWS, d["se_method"], d["confidence"])
    # every figure has its estimand; descriptor rows have no figure
    figures = f["estimate"].notna()
    assert f.loc[figures, "estimand"].str.len().min() > 20
    assert f.loc[f["statistic"].isin(["rows", "column", "distribution", "public column"]), "estimate"].isna().all()


def test_a_sampled_release_shows_the_rows_that_reported(releases: dict[str, Any]) -> None:
    res = _estimate(releases, "sampled")
    d, f = res.to_dict(), res.to_frame()
    for name, col in d["columns"].items():
        assert 0 < col["rows_reported"] < d["rows"]
        assert (f.loc[f["column"] == name, "rows_used"] == col["rows_reported"]).all()


def test_merged_extracts_are_named_in_the_frame(releases: dict[str, Any]) -> None:
    res = _estimate(releases, "merged")
    f = res.to_frame()
    assert list(f.loc[f["statistic"] == "extract", "value"]) == res.to_dict()["extracts"] == \
        [str(p) for p in releases["merged"]]
    assert f.loc[f["statistic"] == "rows", "rows_used"].iloc[0] == 3000


def _frame_from_csv(text: str) -> pd.DataFrame:
    """A CSV of ``--format csv`` read back as the frame: empty cells as NaN / None."""
    raw = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)
    frame = raw.astype(object).where(raw != "", None)
    floats = ("epsilon", "estimate", "se", "ci_low", "ci_high", "consistent", "confidence", "count_estimate",
              "share", "low", "high")
    for c in floats:
        frame[c] = pd.to_numeric(frame[c]).astype("float64")
    frame["rows_used"] = pd.array([None if v is None else int(v) for v in frame["rows_used"]], dtype="Int64")
    return frame


FULL_ARGS = ["--quantiles", "0.1,0.5,0.9", "--crosstab", "site:grade", "--crosstab", "tenure:grade",
             "--mean-by", "level:site", "--mean-by", "level:grade", "--range", "hours:10..20", "--range",
             "score:20..40", "--range", "age:30..45"]


@pytest.mark.parametrize("which", ["full", "sampled", "merged"])
def test_the_csv_is_the_frame_written_out(releases: dict[str, Any], which: str) -> None:
    """``--format csv`` is ``to_frame()`` (through frame_csv), and reading it back gives the JSON:
    nothing in the JSON is left out of the CSV."""
    res = _estimate(releases, which)
    extracts = [str(p) for p in releases[which]] if which == "merged" else [str(releases[which])]
    args = ["estimate", *extracts, *(FULL_ARGS if which == "full" else [])]
    r = CliRunner().invoke(app, [*args, "--format", "csv"])
    assert r.exit_code == 0, r.output
    assert r.stdout == frame_csv(res.to_frame())
    js = CliRunner().invoke(app, [*args, "--format", "json"])
    assert js.exit_code == 0, js.output
    back = EstimateResult.from_frame(_frame_from_csv(r.stdout))
    assert back.to_dict() == json.loads(js.stdout)


def test_analyses_without_cells_and_columns_without_figures_read_back(releases: dict[str, Any]) -> None:
    """What too few rows give (estimate.py: fewer than two reports): a cross-tab without cells, a
    grouped mean without groups, a distribution column without its distribution and mean."""
    res = _estimate(releases, "full")
    bare = dataclasses.replace(
        res, crosstabs=(dataclasses.replace(res.crosstabs[0], rows_used=1, cells=()),),
        grouped_means=(dataclasses.replace(res.grouped_means[0], rows_used=0, groups=()),),
        columns={**res.columns, "score": dataclasses.replace(res.columns["score"], mean=None, distribution=None)})
    f = bare.to_frame()
    assert list(f.loc[f["type"] == "crosstab", "statistic"]) == ["joint share"]
    assert f.loc[f["type"] == "grouped mean", "estimate"].isna().all() and (f["type"] == "grouped mean").sum() == 1
    assert list(f.loc[f["column"] == "score", "statistic"]) == ["column"]
    assert EstimateResult.from_frame(f).to_dict() == strict(bare.to_dict())
    assert strict(bare.to_dict())["crosstabs"][0]["cells"] == []


def test_non_finite_figures_are_nan_in_the_frame_and_null_in_the_json(releases: dict[str, Any]) -> None:
    res = _estimate(releases, "full")
    pay = res.columns["pay"]
    assert pay.mean is not None
    odd_mean = dataclasses.replace(pay.mean, estimate=math.inf, se=math.nan)
    odd_freq = dataclasses.replace(pay.frequencies[0], count_estimate=-math.inf, consistent=math.nan)
    odd = dataclasses.replace(res, columns={**res.columns, "pay": dataclasses.replace(
        pay, mean=odd_mean, frequencies=(odd_freq,))})
    f = odd.to_frame()
    mean = f[(f["column"] == "pay") & (f["statistic"] == "mean")].iloc[0]
    assert math.isnan(mean["estimate"]) and math.isnan(mean["se"])
    freq = f[(f["column"] == "pay") & (f["statistic"] == "frequency")].iloc[0]
    assert math.isnan(freq["count_estimate"]) and math.isnan(freq["consistent"])
    for c in ("estimate", "se", "ci_low", "ci_high", "count_estimate", "low", "high", "share"):
        assert np.isfinite(f[c].dropna().to_numpy()).all(), c
    want = strict(odd.to_dict())
    assert want["columns"]["pay"]["mean"]["estimate"] is None and want["columns"]["pay"]["mean"]["se"] is None
    assert EstimateResult.from_frame(f).to_dict() == want
    # a missing text is None, never NaN
    assert all(v is None or isinstance(v, str) for c in ("value", "method", "note", "estimand") for v in f[c])


def test_from_frame_refuses_a_frame_it_did_not_make(releases: dict[str, Any]) -> None:
    f = _estimate(releases, "merged").to_frame()
    with pytest.raises(ValueError, match="no column se"):
        EstimateResult.from_frame(f.drop(columns=["se"]))
    with pytest.raises(ValueError, match="statistic 'rows'"):
        EstimateResult.from_frame(f[f["statistic"] != "rows"])
    with pytest.raises(ValueError, match="before the column's 'column' row"):
        EstimateResult.from_frame(f[f["statistic"] != "column"])


def test_parts_of_an_estimate_have_frames_too(releases: dict[str, Any]) -> None:
    res = _estimate(releases, "full")
    site = res.columns["site"]
    f = site.to_frame()
    assert len(site.frequencies) == 5  # three categories, <missing> and <other>
    assert tuple(f.columns) == FRAME_COLUMNS and list(f["statistic"]) == ["column"] + ["frequency"] * 5
    assert list(site.frequencies[0].to_frame()["value"]) == [site.frequencies[0].value]
    cell = res.crosstabs[0].cells[0]
    assert list(cell.to_frame()["statistic"]) == ["joint share", "share within row"]
    assert cell.to_dict()["joint"]["estimate"] == cell.joint.estimate
    assert len(res.grouped_means[0].to_frame()) == len(res.grouped_means[0].groups)
    hours = res.columns["hours"].distribution
    assert hours is not None and (hours.to_frame()["statistic"] == "histogram").sum() == len(hours.mass)


# -- validate ---------------------------------------------------------------------------------

def test_the_validation_frame_reads_back(releases: dict[str, Any], tmp_path: Path) -> None:
    full = validate(releases["full"], raw=releases["full_raw"], key=KEY)
    alone = validate(releases["sampled"])
    for rep in (full, alone):
        frame = rep.to_frame()
        assert tuple(frame.columns) == VALIDATION_FRAME_COLUMNS and len(frame) == len(rep.checks)
        back = ValidationReport.from_frame(frame)
        assert back.to_dict() == strict(rep.to_dict())
        pd.testing.assert_frame_equal(back.to_frame(), frame)
    assert full.calibration is not None and alone.calibration is None
    frame = full.to_frame()
    cal = frame[frame["statistics"].notna()]
    assert list(cal["check"]) == ["calibration"]
    assert cal["statistics"].iloc[0] == full.calibration.statistics
    assert cal["z_limit"].iloc[0] == full.calibration.z_limit
    # the CLI's JSON says the same
    key = write_fixed_key(tmp_path / "k.key")
    r = CliRunner().invoke(app, ["validate", str(releases["full"]), "--raw", str(releases["full_raw"]), "--key",
                                 str(key), "--format", "json"])
    assert json.loads(r.stdout)["calibration"] == ValidationReport.from_frame(frame).to_dict()["calibration"]


def test_a_validation_frame_keeps_a_failed_check_and_a_missing_share(releases: dict[str, Any]) -> None:
    rep = validate(releases["full"], raw=releases["full_raw"], key=KEY)
    assert rep.calibration is not None
    cal = dataclasses.replace(rep.calibration, share_inside=math.nan)
    odd = dataclasses.replace(rep, checks=rep.checks + (Check("made up", False, "failed on purpose"),),
                              calibration=cal)
    frame = odd.to_frame()
    assert frame["ok"].iloc[-1] is False and frame["status"].iloc[-1] == "fail"
    back = ValidationReport.from_frame(frame)
    assert back.ok is False and back.to_dict() == strict(odd.to_dict())
    assert back.to_dict()["calibration"]["share_inside"] is None
    entries = rep.calibration.to_frame()
    assert len(entries) == len(rep.calibration.entries) and entries["truth"].dtype == np.float64
    one = rep.checks[0].to_frame()
    assert list(one.columns) == ["check", "status", "ok", "detail"] and one["check"].iloc[0] == rep.checks[0].name


# -- plan -------------------------------------------------------------------------------------

def test_the_plan_frame_reads_back(tmp_path: Path) -> None:
    policy = json.loads(json.dumps(FULL))
    policy["columns"]["level"]["quality"] = {"max_se": 0.01}             # missed at these rows
    policy["columns"]["pay"]["quality"] = {"max_relative_se": 0.5}
    lp = parse_policy(policy, "plan policy")
    for rows in (3000, 200000):
        res = plan(lp, rows)
        frame = res.to_frame()
        assert tuple(frame.columns) == PLAN_FRAME_COLUMNS
        back = PlanResult.from_frame(frame)
        assert back.to_dict() == strict(res.to_dict())
        pd.testing.assert_frame_equal(back.to_frame(), frame)
    res = plan(lp, 3000)
    assert "level: mean" in res.targets_missed
    frame = res.to_frame()
    # a field the JSON leaves out is left out when read back (not the same as present and null)
    stats = [st for c in res.columns for st in c.statistics or ()]
    assert list(frame["fields"].dropna()) == [",".join(st.to_dict()) for st in stats]
    assert len({tuple(st.to_dict()) for st in stats}) > 1       # statistics with different fields
    assert frame.loc[frame["type"] == "public", "fields"].isna().all()
    assert (frame["rows"] == 3000).all() and (frame["strategy"] == res.strategy).all()
    # the plan the command line writes is the same
    path = write_policy(tmp_path / "p.yaml", policy)
    r = CliRunner().invoke(app, ["plan", "--policy", str(path), "--rows", "3000", "--format", "json"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout) == PlanResult.from_frame(frame).to_dict()


# -- fit tests and audits ----------------------------------------------------------------------

def test_fit_and_audit_frames_hold_their_figures() -> None:
    from ldptransform.audit import AUDIT_TEST_COLUMNS, audit
    from ldptransform.gof import FitResult

    hull = FitResult("hull fit", "hull-lr", 3.5, 4, "chi-square with 4 df", 0.48, 0.01, True, 900, 0, "fits",
                     {"cells": 5, "fit_gap": 0.002})
    bad = FitResult("valid reports", "support-bounds", math.inf, None, "exact", 0.0, 0.01, False, 900, 3,
                    "3 impossible reports", {"level": 2})
    verdict = dataclasses.replace(hull, tests=(hull, bad))
    f = verdict.to_frame()
    assert list(f.columns) == ["test", "kind", "statistic", "df", "p_value", "alpha", "passed", "tested", "rows",
                               "impossible", "detail", "reference", "cells", "fit_gap", "level"]
    assert list(f["reference"]) == ["chi-square with 4 df", "exact"] and f["cells"].iloc[0] == 5
    assert f["level"].iloc[1] == 2 and pd.isna(f["level"].iloc[0])
    assert f["statistic"].iloc[0] == 3.5 and math.isnan(f["statistic"].iloc[1])   # inf: null in the JSON
    assert strict(bad.to_dict())["statistic"] is None
    lp = parse_policy({"budget": {"epsilon_per_row": 1.0},
                       "columns": {"x": {"type": "categorical", "categories": ["a", "b"], "epsilon": 1.0}}}, "t")
    a = audit(lp, rows=2000, key=KEY, seed="frames")
    frame = a.to_frame()
    assert len(frame) == len(a.columns[0].tests) == 2
    assert list(frame.columns[:len(AUDIT_TEST_COLUMNS)]) == list(AUDIT_TEST_COLUMNS)
    assert (frame["channel_epsilon"] == a.columns[0].channel_epsilon).all()
    assert (frame["column_epsilon_lower"] == a.columns[0].epsilon_lower).all()
    assert (frame["rows_per_side"] == a.to_dict()["rows_per_side"]).all() and (frame["policy"] == "t").all()
    pd.testing.assert_frame_equal(a.columns[0].to_frame(), frame[list(AUDIT_TEST_COLUMNS)])
