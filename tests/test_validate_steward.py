"""Steward-side validation (raw data and key): every example policy and one release per
mechanism pass every check, the calibration included, and the calibration covers every
statistic a column gives (frequencies, means, quantiles, range shares).

Fixed key and nonces: every outcome here is deterministic.  A correct release fails the
calibration with probability about validate.FAMILY_ALPHA (0.001) over all its statistics, so a
failure here is a defect, not bad luck.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import FIXED_KEY_BYTES, write_fixed_key
from typer.testing import CliRunner

from ldptransform import load_policy, parse_policy, privatize, validate
from ldptransform.cli import app
from ldptransform.keys import SecretKey
from ldptransform.results import CalibrationResult, Check, ValidationReport

ROOT = Path(__file__).resolve().parent.parent
POLICIES = sorted((ROOT / "policies").glob("*.y*ml")) + sorted((ROOT / "policies").glob("*.json"))
DEMO_CSV = ROOT / "demo_data" / "staff_survey.csv"
KEY = SecretKey(FIXED_KEY_BYTES)
NONCE = "5" * 32
ROWS = 6000
SITES = ["North", "South", "East", "West", "Harbour"]


def _assert_passes(rep: ValidationReport, judged: bool = True) -> CalibrationResult:
    assert isinstance(rep, ValidationReport) and all(isinstance(c, Check) for c in rep.checks)
    assert rep.ok, [c.to_dict() for c in rep.checks if c.ok is not True]
    status = {c.name: c.status for c in rep.checks}
    assert status["reproduced"] == "pass" and status["key matches"] == "pass", status
    cal = rep.calibration
    assert cal is not None
    if not judged:  # no statistic with an interval: reported, not judged (never a pass on nothing)
        calibration = rep.check("calibration")
        assert calibration is not None and calibration.ok is None and cal.statistics == 0, calibration
        assert "not judged" in calibration.detail, calibration.detail
        return cal
    assert status["calibration"] == "pass", rep.check("calibration")
    assert cal.max_abs_z <= cal.z_limit and cal.statistics >= 1
    scores = [e.score for e in cal.entries if e.score is not None]
    assert max(scores) == pytest.approx(cal.max_abs_z)
    assert cal.inside == sum(bool(e.inside) for e in cal.entries)
    # the JSON shape is unchanged: the same seven figures
    assert set(cal.to_dict()) == {"statistics", "inside", "share_inside", "confidence", "max_abs_z",
                                  "max_abs_z_at", "z_limit"}
    return cal


@pytest.mark.parametrize("path", POLICIES, ids=lambda p: p.name)
def test_every_example_policy_passes_steward_validation(path: Path, tmp_path: Path) -> None:
    lp = load_policy(path)
    out = tmp_path / "extract.parquet"
    privatize(DEMO_CSV, lp, KEY, out, nonce=NONCE)
    cal = _assert_passes(validate(out, raw=DEMO_CSV, key=KEY))
    kinds = {e.statistic for e in cal.entries if e.inside is not None}
    assert "frequency" in kinds
    if path.name == "staff_survey_planned.yaml":  # hierarchy pay and binned tenure: their quantiles and ranges
        cols = {(e.column, e.statistic) for e in cal.entries if e.inside is not None}
        assert {("pay", "mean"), ("pay", "quantile"), ("pay", "range share"), ("tenure_years", "quantile"),
                ("tenure_years", "range share"), ("weekly_hours", "mean")} <= cols


def _data(n: int, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # synthetic input data only
    site = rng.choice(SITES, size=n, p=[0.35, 0.25, 0.2, 0.15, 0.05])
    pay = np.round(np.clip(rng.lognormal(np.log(52000), 0.35, n), 20000, 150000), -2)
    hours = np.round(np.clip(rng.normal(38, 7, n), 0, 70), 1)
    return pd.DataFrame({"site": site, "pay": pay, "hours": hours})


CAT = {"type": "categorical", "categories": SITES, "epsilon": 1.5}
PAY = {"type": "numeric", "bounds": [20000, 150000], "epsilon": 1.5}
MECHANISMS: dict[str, tuple[str, dict[str, Any]]] = {
    "grr": ("site", {**CAT, "mechanism": "grr"}),
    "oue": ("site", {**CAT, "mechanism": "oue"}),
    "sue": ("site", {**CAT, "mechanism": "sue"}),
    "olh": ("site", {**CAT, "mechanism": "olh"}),
    "hadamard": ("site", {**CAT, "mechanism": "hadamard"}),
    "subset": ("site", {**CAT, "mechanism": "subset", "subset_size": 2}),
    "matrix": ("site", {**CAT, "epsilon": 2.0, "mechanism": "matrix",
                        "matrix": [[0.6 if i == j else 0.1 for j in range(5)] for i in range(5)]}),
    "two-point": ("pay", {**PAY, "mechanism": "two-point"}),
    "piecewise": ("pay", {**PAY, "mechanism": "piecewise"}),
    "hybrid": ("pay", {**PAY, "mechanism": "hybrid"}),
    "discrete-laplace": ("hours", {"type": "numeric", "bounds": [0, 70], "epsilon": 1.5,
                                   "mechanism": "discrete-laplace", "grid": 70}),
    "square-wave": ("pay", {**PAY, "mechanism": "square-wave"}),
    "hierarchy": ("pay", {**PAY, "mechanism": "hierarchy"}),
    "sequential-quantile": ("pay", {**PAY, "mechanism": "sequential-quantile", "quantile": 0.5}),
    "bins": ("hours", {"type": "numeric", "bins": [0, 30, 36, 40, 45, 70], "epsilon": 1.5}),
}
EXPECTED = {"frequency": {"frequency"}, "mean": {"mean"}, "distribution": {"mean", "quantile", "range share"},
            "binned": {"frequency", "quantile", "range share"},
            "quantile": set()}  # the tracked quantile is not calibrated yet (no truth computed for it)
NO_INTERVAL: dict[str, set[str]] = {"square-wave": set()}  # a smoothed decoder with no bound on its bias
FAMILY = {**{m: "frequency" for m in ("grr", "oue", "sue", "olh", "hadamard", "subset", "matrix")},
          **{m: "mean" for m in ("two-point", "piecewise", "hybrid", "discrete-laplace")},
          "square-wave": "distribution", "hierarchy": "distribution", "bins": "binned",
          "sequential-quantile": "quantile"}


def test_every_registered_mechanism_has_a_steward_release_here() -> None:
    """The per-mechanism test below covers the registry: a mechanism added to it without a
    steward-side release here fails this test."""
    from ldptransform import mechanisms as mech

    assert set(mech.registry()) <= set(MECHANISMS), sorted(set(mech.registry()) - set(MECHANISMS))


@pytest.fixture(scope="module")
def raw(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("raw") / "raw.parquet"
    _data(ROWS).to_parquet(path, index=False)
    return path


@pytest.mark.parametrize("mechanism", list(MECHANISMS))
def test_one_release_per_mechanism_passes_steward_validation(mechanism: str, raw: Path, tmp_path: Path) -> None:
    column, pol = MECHANISMS[mechanism]
    lp = parse_policy({"budget": {"epsilon_per_row": pol["epsilon"]}, "unlisted": "drop", "columns": {column: pol}},
                      f"{mechanism} policy")
    out = tmp_path / "extract.parquet"
    privatize(raw, lp, KEY, out, nonce=NONCE)
    expected = NO_INTERVAL.get(mechanism, EXPECTED[FAMILY[mechanism]])
    cal = _assert_passes(validate(out, raw=raw, key=KEY), judged=bool(expected))
    judged = {e.statistic for e in cal.entries if e.score is not None}
    assert judged == expected, judged
    n_freq = sum(e.statistic == "frequency" for e in cal.entries)
    assert n_freq in (0, len(pol.get("categories", pol.get("bins", [0])[1:])))
    for e in cal.entries:
        assert e.estimand and math.isfinite(e.truth)


def test_the_calibration_fails_on_a_release_of_other_data(raw: Path, tmp_path: Path) -> None:
    """Calibrated against raw data that is not the release's, the truths move far outside the
    intervals: the check can fail (reproduction fails as well)."""
    column, pol = MECHANISMS["hierarchy"]
    lp = parse_policy({"budget": {"epsilon_per_row": 1.5}, "unlisted": "drop", "columns": {column: pol}}, "p")
    out = tmp_path / "extract.parquet"
    privatize(raw, lp, KEY, out, nonce=NONCE)
    other = _data(ROWS, seed=12)
    other["pay"] = np.clip(other["pay"] * 1.3, 20000, 150000)
    other_path = tmp_path / "other.parquet"
    other.to_parquet(other_path, index=False)
    rep = validate(out, raw=other_path, key=KEY)
    calibration, reproduced = rep.check("calibration"), rep.check("reproduced")
    assert calibration is not None and calibration.ok is False
    assert reproduced is not None and reproduced.ok is False and not rep.ok


def _planned_release(tmp_path: Path) -> tuple[Path, Path]:
    """A release of the first 6000 demo rows under staff_survey_planned.yaml (hierarchy pay,
    binned tenure, hadamard, subset, matrix, discrete-laplace): (raw, extract)."""
    raw = tmp_path / "raw.csv"
    pd.read_csv(DEMO_CSV).head(6000).to_csv(raw, index=False)  # its quality targets need 5200
    out = tmp_path / "x.parquet"
    privatize(raw, load_policy(ROOT / "policies" / "staff_survey_planned.yaml"), KEY, out, nonce=NONCE)
    return raw, out


def test_steward_validation_through_the_cli(tmp_path: Path) -> None:
    """The release that once ended in a traceback (distribution and binned columns), through the CLI:
    exit 0, the table says so, and --format json gives the calibration figures."""
    key = write_fixed_key(tmp_path / "k.key")
    raw, out = _planned_release(tmp_path)
    runner = CliRunner()
    res = runner.invoke(app, ["validate", str(out), "--raw", str(raw), "--key", str(key), "--format", "json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["ok"] is True and data["calibration"]["max_abs_z"] <= data["calibration"]["z_limit"]
    checks = {c["check"]: c for c in data["checks"]}
    assert checks["calibration"]["status"] == "pass" and "quantiles" in checks["calibration"]["detail"]
    table = runner.invoke(app, ["validate", str(out), "--raw", str(raw), "--key", str(key)])
    assert table.exit_code == 0 and "all checks passed" in table.stdout


def test_the_calibration_checks_the_quantiles_and_ranges_asked_for(tmp_path: Path) -> None:
    raw, out = _planned_release(tmp_path)
    rep = validate(out, raw=raw, key=KEY, quantiles=[0.1, 0.9], ranges=[("pay", 30000.0, 45000.0)])
    cal = _assert_passes(rep)
    got = {(e.column, e.statistic, e.value) for e in cal.entries if e.statistic in ("quantile", "range share")}
    # pay: the range asked for; tenure_years (binned): its default four ranges
    assert got == {("pay", "quantile", "0.1"), ("pay", "quantile", "0.9"), ("pay", "range share", "30000..45000"),
                   ("tenure_years", "quantile", "0.1"), ("tenure_years", "quantile", "0.9"),
                   *(("tenure_years", "range share", v) for v in ("0..11.25", "11.25..22.5", "22.5..33.75",
                                                                  "33.75..45"))}
    key = write_fixed_key(tmp_path / "k.key")
    runner = CliRunner()
    base = ["validate", str(out), "--raw", str(raw), "--key", str(key)]
    res = runner.invoke(app, [*base, "--quantiles", "0.1,0.9", "--range", "pay:30000..45000", "--format", "json"])
    assert res.exit_code == 0 and json.loads(res.stdout)["calibration"] == cal.to_dict()
    bad = runner.invoke(app, [*base, "--range", "site:1..2"])
    assert bad.exit_code == 2 and "'site' has no distribution" in bad.output and "Traceback" not in bad.output
    no_raw = runner.invoke(app, ["validate", str(out), "--quantiles", "0.5"])
    assert no_raw.exit_code == 2 and "--raw" in no_raw.output


def test_a_target_without_a_prediction_is_not_passed(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """validate's quality check never passes a target it could not check: a targeted statistic
    without a predicted SE makes the check a warning that names it and says why."""
    import ldptransform.plan as plan_module
    from ldptransform.plan import PlanStatistic

    raw, out = _planned_release(tmp_path)
    assert validate(out).check("quality").ok is True  # type: ignore[union-attr]
    real = plan_module.column_statistics

    def without_mean_prediction(rc: Any, *args: Any, **kw: Any) -> list[PlanStatistic]:
        stats = real(rc, *args, **kw)
        if rc.name != "pay":
            return stats
        return [PlanStatistic.from_dict({"statistic": "mean", "se": None, "target_se": None,
                                         "target_relative_se": 0.05, "note": "the reason given"})
                if s.statistic == "mean" else s for s in stats]

    monkeypatch.setattr(plan_module, "column_statistics", without_mean_prediction)
    quality = validate(out).check("quality")
    assert quality is not None and quality.ok is None, quality
    assert "pay mean: target SE/width <= 0.05 not checked (the reason given)" in quality.detail
