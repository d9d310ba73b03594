"""The release planner (`ldpt plan`) and the lower bounds it compares against.

Monte Carlo checks use fixed keys (one nonce per simulated release) and data drawn from a
seeded generator; tolerances are stated in each test.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import FIXED_KEY_BYTES, keyed_words, mechanism_of, write_fixed_key

from ldptransform import estimate, load_key, parse_policy, privatize
from ldptransform.estimate import CategoricalStats, NumericStats
from ldptransform.keys import SecretKey
from ldptransform.random import KeyedStream
from ldptransform.mechanisms import (
    GRR,
    OUE,
    DiscreteLaplace,
    HadamardResponse,
    Hybrid,
    Matrix,
    MeanMechanism,
    SubsetSelection,
    TwoPoint,
    bounds,
)
from ldptransform.mechanisms.matrix import grr_matrix
from ldptransform.plan import (
    frequency_row_variance,
    frequency_row_variance_bound,
    mean_row_variance,
    mean_row_variance_bound,
    plan,
    suggest,
)

KEY = SecretKey(FIXED_KEY_BYTES)


def _words(m, n, r, label):
    return keyed_words(label, n, m.words_per_row, key=KEY, nonce=f"{r:032x}", stream="plan-test")


@pytest.mark.parametrize("m", [GRR(1.0, list("abcde")), OUE(0.7, [f"v{i}" for i in range(8)]),
                               HadamardResponse(0.5, [f"v{i}" for i in range(6)]),
                               SubsetSelection(1.0, [f"v{i}" for i in range(12)]),
                               Matrix(1.0, list("abcde"), grr_matrix(1.0, 5).tolist())],
                         ids=lambda m: m.name)
def test_predicted_frequency_se_matches_monte_carlo(m):
    """The planner's frequency SE (root mean square over values, equal shares, rows drawn
    afresh: docs/formulas.md sections 0.3 [M+D] and 0.4 [D]) agrees with the spread of the
    estimates over 400 simulated releases within 10%.  With 400 releases and k >= 5 values
    the measured RMS has a relative SE of about 1.6%, so 10% is over 6 SE."""
    n, R, k = 2000, 400, m.k
    rng = np.random.default_rng(11)
    est = np.empty((R, k))
    for r in range(R):
        x = rng.integers(0, k, n)
        st = CategoricalStats(m)
        st.add(m.randomize(x, _words(m, n, r, m.name)))
        est[r] = st.estimates()[0]
    measured = math.sqrt(np.mean(np.var(est, axis=0, ddof=1)))
    predicted = math.sqrt(frequency_row_variance(m) / n)
    assert abs(measured / predicted - 1) < 0.10, (measured, predicted)


@pytest.mark.parametrize("m", [TwoPoint(1.0, (0, 100)), Hybrid(2.0, (0, 100), 64),
                               DiscreteLaplace(2.0, (0, 100), 50)], ids=lambda m: m.name)
def test_predicted_mean_se_matches_monte_carlo(m):
    """The planner's mean SE is the worst case over data: values split evenly between the
    bounds.  Measured over 600 simulated releases (relative SE of the SD about 2.9%):
    within 10%."""
    n, R = 1000, 600
    rng = np.random.default_rng(12)
    means = np.empty(R)
    for r in range(R):
        x = np.where(rng.random(n) < 0.5, m.lo, m.hi)
        st = NumericStats(m)
        if getattr(m, "variable_draws", False):
            ds = KeyedStream(KEY, f"{r:032x}", "plan-test-draws", m.name)
            st.add(m.randomize_with(x, _words(m, n, r, m.name), ds.words_at))
        else:
            st.add(m.randomize(x, _words(m, n, r, m.name)))
        means[r] = st.mean(1.96).estimate
    measured = float(np.std(means, ddof=1))
    predicted = math.sqrt(mean_row_variance(m) / n)
    assert abs(measured / predicted - 1) < 0.10, (measured, predicted)


def test_two_point_attains_the_mean_bound():
    """[D] The worst case (as estimate reports it) of two-point, ((E+1)/(E-1))^2 (hi-lo)^2/4,
    equals the bound (hi-lo)^2 (E/(E-1)^2 + 1/4) for every eps; other mechanisms are above it."""
    for eps in (0.3, 1.0, 2.5, 6.0):
        tp = TwoPoint(eps, (0, 10))
        assert mean_row_variance(tp) == pytest.approx(mean_row_variance_bound(eps, 0, 10), rel=1e-6)
        assert mean_row_variance(Hybrid(eps, (0, 10), 64)) >= mean_row_variance_bound(eps, 0, 10) * (1 - 1e-9)


@pytest.mark.parametrize("eps,k", [(0.5, 8), (1.0, 32), (2.0, 32), (4.0, 256), (0.5, 256)])
def test_frequency_bound_matches_reference_table(eps, k):
    """docs/formulas.md section 4 table [D] (n * minimal total L2 over m) and the rule that no
    frequency oracle of the tool goes below the bound."""
    table = {(0.5, 8): (3, 95.111), (1.0, 32): (9, 109.733), (2.0, 32): (4, 20.792), (4.0, 256): (5, 18.348),
             (0.5, 256): (97, 3979.480)}
    m_star, value = table[(eps, k)]
    assert bounds.best_subset_size(eps, k) == m_star
    assert bounds.frequency_lower_bound(eps, k) == pytest.approx(value, abs=1e-3)
    cats = [f"c{i}" for i in range(k)]
    for mech in (GRR(eps, cats), OUE(eps, cats)):
        assert mech.total_variance() >= bounds.frequency_lower_bound(eps, k) * (1 - 1e-9)
    assert frequency_row_variance(GRR(eps, cats)) >= frequency_row_variance_bound(eps, k) * (1 - 1e-9)


POLICY: dict[str, Any] = {
    "budget": {"epsilon_per_row": 6.0},
    "quality": {"max_se": 0.02, "max_relative_se": 0.02},
    "columns": {
        "site": {"type": "categorical", "categories": ["North", "South", "East", "West", "Hub"], "epsilon": 1.0},
        "team": {"type": "categorical", "categories": [f"T{i}" for i in range(12)], "epsilon": 1.0},
        "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0},
        "wave": {"type": "public"},
    },
}


def test_plan_reports_targets_rows_needed_and_impossible():
    lp = parse_policy(POLICY, "test")
    res = plan(lp, 20000)
    by = {c["name"]: c for c in res["columns"]}
    site = by["site"]["statistics"][0]
    assert site["statistic"] == "frequencies" and site["meets_target"] is True
    # rows needed is the smallest N at which the predicted SE meets the target
    need = site["rows_needed"]
    assert plan(lp, need)["columns"][0]["statistics"][0]["meets_target"] is True
    assert plan(lp, need - 1)["columns"][0]["statistics"][0]["meets_target"] is False
    assert by["hours"]["statistics"][0]["relative_se"] == pytest.approx(by["hours"]["statistics"][0]["se"] / 60)
    assert by["wave"]["type"] == "public"
    # At 300 rows even the best possible mechanism cannot reach SE 0.02 on 12 values at eps 1.
    small = plan(lp, 300)
    assert "team: frequencies" in small["impossible"]
    team = [c for c in small["columns"] if c["name"] == "team"][0]["statistics"][0]
    assert team["best_possible_se"] > 0.02 and team["rows_needed_best_possible"] > 300


def test_plan_is_typed_with_a_stable_dict_and_a_long_frame():
    from ldptransform.plan import PlanResult, PlanStatistic

    lp = parse_policy(POLICY, "test")
    res = plan(lp, 20000, simulate=False)
    assert isinstance(res, PlanResult)
    d = res.to_dict()
    assert list(d) == ["rows", "strategy", "epsilon_per_row", "epsilon_per_row_budget", "report_rate", "columns",
                       "targets_missed", "impossible"]
    assert json.loads(json.dumps(d)) == d  # plain JSON values
    hours = next(c for c in res.columns if c.name == "hours")
    assert hours.statistics is not None
    st = hours.statistics[0]
    assert isinstance(st, PlanStatistic) and st.statistic == "mean" and st.se == d["columns"][2]["statistics"][0]["se"]
    assert list(st.to_dict())[:4] == ["statistic", "se", "relative_se", "efficiency"]
    assert res["columns"][2]["statistics"][0] == st.to_dict()  # read access by key, as the dict was read
    frame = res.to_frame()
    assert list(frame["column"]) == ["site", "team", "hours", "wave"]
    assert list(frame["statistic"][:3]) == ["frequencies", "frequencies", "mean"]
    assert frame.loc[2, "se"] == pytest.approx(st.se) and frame.loc[2, "rows_needed"] == st.rows_needed
    assert str(frame.loc[3, "note"]).startswith("released in the clear")


def test_suggested_split_meets_the_targets_when_privatized(tmp_path):
    """Privatize with the suggested eps and decode: every reported SE meets its target."""
    lp = parse_policy(POLICY, "test")
    rows = 20000
    sug = suggest(lp, rows)
    cols = sug["split"]["columns"]
    assert sug["split"]["epsilon_per_row"] == pytest.approx(sum(v["epsilon"] for v in cols.values()))
    assert sug["split"]["epsilon_per_row"] < 3.0  # targets are loose enough to need less than the policy's eps
    pol = json.loads(json.dumps(POLICY))
    for name, v in cols.items():
        pol["columns"][name]["epsilon"] = v["epsilon"]
    rng = np.random.default_rng(5)
    df = pd.DataFrame({"site": rng.choice(POLICY["columns"]["site"]["categories"], rows),
                       "team": rng.choice(POLICY["columns"]["team"]["categories"], rows),
                       "hours": rng.uniform(0, 60, rows).round(1), "wave": 3})
    src = tmp_path / "in.csv"
    df.to_csv(src, index=False)
    key = load_key(write_fixed_key(tmp_path / "k.key"))
    out = tmp_path / "out.parquet"
    privatize(src, parse_policy(pol, "suggested"), key, out)
    res = estimate(out)
    for name in ("site", "team"):
        ses = [f["se"] for f in res["columns"][name]["frequencies"]]
        assert math.sqrt(np.mean(np.square(ses))) <= 0.02, name
    assert res["columns"]["hours"]["mean"]["se"] / 60 <= 0.02
    # one step (0.01) below the suggestion, the prediction misses the target
    for name, v in cols.items():
        lower = parse_policy({**POLICY, "columns": {**POLICY["columns"], name: {**POLICY["columns"][name],
                                                                               "epsilon": v["epsilon"] - 0.01}}}, "x")
        stat = [c for c in plan(lower, rows)["columns"] if c["name"] == name][0]["statistics"][0]
        assert stat["meets_target"] is False, name


def test_suggest_compares_strategy_sample():
    lp = parse_policy(POLICY, "test")
    sug = suggest(lp, 20000)
    opts = sug["sample"]["options"]
    assert [o["sample_columns"] for o in opts] == [1, 2, 3]
    best = sug["sample"]["best"]
    assert best["epsilon_per_row"] == min(o["epsilon_per_row"] for o in opts if o["epsilon_per_row"] is not None)
    better = best["epsilon_per_row"] < sug["split"]["epsilon_per_row"]
    assert ("would meet every target" in sug["sample"]["verdict"]) == better
    # m = d reports every column at eps_row / d: it needs d times the largest column eps of split
    split_max = max(v["epsilon"] for v in sug["split"]["columns"].values())
    assert opts[-1]["epsilon_per_row"] == pytest.approx(3 * split_max)


def test_suggest_says_when_targets_cannot_be_met():
    pol = json.loads(json.dumps(POLICY))
    pol["quality"] = {"max_se": 0.0001}
    sug = suggest(parse_policy(pol, "test"), 100)
    assert sug["split"]["epsilon_per_row"] is None and "cannot meet" in sug["split"]["verdict"]


def test_plan_cli(tmp_path, ldpt):
    p = tmp_path / "policy.yaml"
    p.write_text(yaml.safe_dump(POLICY), encoding="utf-8")
    r = ldpt("plan", "--policy", p, "--rows", 300)
    assert r.returncode == 0, r.stderr
    assert "no eps-LDP mechanism can meet" in r.stderr and "privacy officer" in r.stdout
    r = ldpt("plan", "--policy", p, "--rows", 20000, "--format", "json", "--suggest")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    assert data["rows"] == 20000 and "suggestion" in data
    r = ldpt("plan", "--policy", p, "--rows", 0)
    assert r.returncode == 2 and "--rows" in r.stderr and "Traceback" not in r.stderr


def test_validate_quality_section(tmp_path, ldpt):
    """validate predicts each targeted statistic's SE at the extract's row count: pass when
    the targets are met, fail (exit 1) when one is missed, naming column and statistic."""
    rows = 3000
    rng = np.random.default_rng(8)
    df = pd.DataFrame({"site": rng.choice(POLICY["columns"]["site"]["categories"], rows),
                       "team": rng.choice(POLICY["columns"]["team"]["categories"], rows),
                       "hours": rng.uniform(0, 60, rows).round(1), "wave": 1})
    src = tmp_path / "in.csv"
    df.to_csv(src, index=False)
    key = write_fixed_key(tmp_path / "k.key")
    loose = json.loads(json.dumps(POLICY))
    loose["quality"] = {"max_se": 0.1, "max_relative_se": 0.1}
    tight = json.loads(json.dumps(POLICY))
    tight["columns"]["team"]["quality"] = {"max_se": 0.01}
    for name, pol, code in (("loose", loose, 0), ("tight", tight, 1)):
        p = tmp_path / f"{name}.yaml"
        p.write_text(yaml.safe_dump(pol), encoding="utf-8")
        out = tmp_path / f"{name}.parquet"
        r = ldpt("privatize", src, "--policy", p, "--key", key, "--out", out, "--quiet")
        assert r.returncode == 0, r.stderr
        r = ldpt("validate", out, "--format", "json")
        assert r.returncode == code, r.stdout + r.stderr
        checks = {c["check"]: c for c in json.loads(r.stdout)["checks"]}
        q = checks["quality"]
        if code == 0:
            assert q["status"] == "pass" and "team frequencies" in q["detail"]
        else:
            assert q["status"] == "fail" and "team frequencies" in q["detail"] and "rows" in q["detail"]


def test_suggest_handles_a_fixed_matrix_and_an_exact_sampler(tmp_path):
    """A matrix fixes the noise, so its smallest eps is the one it gives (ln 2 for this matrix,
    rounded up to the planner's 0.01 steps) and more eps cannot rescue a missed target; the
    discrete-laplace column gets a short decimal eps its exact sampler accepts."""
    pol = {"budget": {"epsilon_per_row": 6}, "quality": {"max_se": 0.02, "max_relative_se": 0.05},
           "columns": {
               "c": {"type": "categorical", "categories": ["x", "y", "z"], "epsilon": 1, "mechanism": "matrix",
                     "matrix": [[0.5, 0.25, 0.25], [0.25, 0.5, 0.25], [0.25, 0.25, 0.5]]},
               "d": {"type": "numeric", "bounds": [0, 100], "epsilon": 1, "mechanism": "discrete-laplace",
                     "grid": 100}}}
    lp = parse_policy(pol, "test")
    sug = suggest(lp, 20000)
    cols = sug["split"]["columns"]
    assert cols["c"]["epsilon"] == pytest.approx(0.70) and cols["c"]["mechanism"] == "matrix"
    assert cols["d"]["mechanism"] == "discrete-laplace" and cols["d"]["epsilon"] == round(cols["d"]["epsilon"], 2)
    few = suggest(lp, 2000)["split"]
    assert few["columns"]["c"]["epsilon"] is None and "matrix fixes the noise" in few["columns"]["c"]["note"]
    assert few["epsilon_per_row"] is None


def test_median_prediction_counts_the_pull_toward_the_middle():
    """At a tiny eps a smoothing decoder returns nearly the middle of the range whatever the
    data, so the spread of its medians is small while its error is not.  The prediction is the
    root mean squared error around the reference data's true median (Beta(2, 5) shape, median
    at about 26% of the width, scipy.stats.beta), so at eps 0.01 it must be at least half the
    distance from that median to the middle, and larger than at eps 1."""
    from scipy.stats import beta

    from ldptransform.plan import simulated_median_se

    pol = {"budget": {"epsilon_per_row": 2}, "columns": {
        "pay": {"type": "numeric", "bounds": [0, 100], "epsilon": 1, "needs": ["quantiles"]}}}
    lp = parse_policy(pol, "test")
    rc = lp.by_name["pay"]
    from ldptransform.plan import _with_eps

    tiny = simulated_median_se(mechanism_of(_with_eps(rc, 0.01)), _with_eps(rc, 0.01), 5000)
    one = simulated_median_se(mechanism_of(rc), rc, 5000)
    assert tiny is not None and one is not None
    gap = (0.5 - beta.median(2, 5)) * 100
    assert tiny >= 0.5 * gap, (tiny, gap)
    assert tiny > one


def test_memoized_mean_adds_the_grid_rounding_and_stays_an_upper_bound():
    """A memoized numeric column's planned mean SE is sqrt((worst-case mechanism variance +
    step^2/4) / n) (alpha-point rounding, Ding, Kulkarni, Yekhanin 2017).  Monte Carlo over
    300 simulated releases (relative SE of the SD about 4%) of data at the middle of grid steps
    (where the rounding variance is step^2/4), rounded with offsets from the keyed stream and
    randomized by two-point: the measured SD is within 10% of sqrt((Var_mech(x) + step^2/4) / n),
    which is itself within the plan's worst case."""
    from ldptransform.random.variates import to_unit
    from ldptransform.plan import memo_rounding_variance

    pol = parse_policy({"budget": {"epsilon_per_row": 1.0}, "subject_key": "id",
                        "columns": {"id": {"type": "drop"},
                                    "x": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0,
                                          "mechanism": "two-point", "memoize": True, "memo_grid": 10}}},
                       "memo-plan.yaml")
    rc = pol.by_name["x"]
    m = mechanism_of(rc)
    assert isinstance(m, MeanMechanism)
    step = 10.0
    assert memo_rounding_variance(rc) == pytest.approx(step * step / 4)
    n = 2000
    (stat,) = [s for s in plan(pol, n, simulate=False)["columns"][0]["statistics"] if s["statistic"] == "mean"]
    assert stat["se"] == pytest.approx(math.sqrt((mean_row_variance(m) + step * step / 4) / n))
    x = np.full(n, 45.0)  # the middle of the step [40, 50]
    means = np.empty(300)
    for r in range(300):
        u = to_unit(KeyedStream(KEY, f"{r:032x}", "memo-offset").words(0, n, 1)[:, 0])
        rounded = np.floor(x / step + u) * step
        st = NumericStats(m)
        st.add(m.randomize(rounded, _words(m, n, r, "memo")))
        means[r] = st.mean(1.96).estimate
    # two-point's report variance at value v: ((hi-lo)/2)^2 c^2 - (v - mid)^2, c = (e+1)/(e-1)
    c = (math.e + 1) / (math.e - 1)
    v_mech = np.mean([2500 * c * c - (v - 50) ** 2 for v in (40.0, 50.0)])
    expected = math.sqrt((v_mech + step * step / 4) / n)
    measured = float(np.std(means, ddof=1))
    assert abs(measured / expected - 1) < 0.10, (measured, expected)
    assert expected <= stat["se"]  # this data's exact SE is within the planned worst case


def _distribution_policy(mechanism: str, quality: dict[str, Any] | None = None) -> Any:
    col: dict[str, Any] = {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": mechanism,
                           "needs": ["mean", "quantiles"]}
    if quality:
        col["quality"] = quality
    return parse_policy({"budget": {"epsilon_per_row": 1.0}, "columns": {"pay": col}}, "test")


def _reference_means(m: Any, n: int, releases: int) -> np.ndarray:
    """The mean read off the decoded distribution in ``releases`` releases of the planner's
    reference data (the Beta(2, 5) shape on the bounds), under this file's fixed key (not the
    planner's), each with its own nonce."""
    from scipy.stats import beta

    x = beta.ppf((np.arange(n) + 0.5) / n, 2, 5) * 100
    return np.array([m.decoder().add(m.randomize(x, _words(m, n, r, "dist-mean"))).distribution().mean()
                     for r in range(releases)])


def test_a_hierarchy_mean_has_an_exact_predicted_se():
    """needs: [mean, quantiles] on a distribution mechanism whose decoder gives the covariance of
    its bucket estimates: the mean's SE is exact.  Against the spread of 100 releases at 5000 rows
    (fixed keys): the sample SD of 100 draws is within about 7% of the truth (one SD), so 20%."""
    from ldptransform.plan import distribution_mean_se

    lp = _distribution_policy("hierarchy")
    rc = lp.by_name["pay"]
    pred = distribution_mean_se(mechanism_of(rc), rc, 5000)
    assert pred is not None and pred.exact
    measured = float(np.std(_reference_means(mechanism_of(rc), 5000, 100), ddof=1))
    assert pred.se == pytest.approx(measured, rel=0.20), (pred.se, measured)
    (mean,) = [s for s in plan(lp, 5000)["columns"][0]["statistics"] if s["statistic"] == "mean"]
    assert mean["se"] == pytest.approx(pred.se) and "exact" in mean["se_meaning"]
    assert mean["best_possible_se"] is not None and mean["efficiency"] is None  # se is not a worst case


def test_a_square_wave_mean_is_simulated_and_says_so():
    """A smoothing decoder (no bucket covariance): the mean's SE is the simulated root mean squared
    error, bias kept.  Against 30 releases under another key at 5000 rows: within a factor 1.5
    (the planner's own estimate rests on 24 releases)."""
    from ldptransform.plan import distribution_mean_se

    lp = _distribution_policy("square-wave")
    rc = lp.by_name["pay"]
    pred = distribution_mean_se(mechanism_of(rc), rc, 5000)
    assert pred is not None and not pred.exact and "no exact formula" in pred.meaning
    from scipy.stats import beta

    truth = float(beta.mean(2, 5) * 100)
    means = _reference_means(mechanism_of(rc), 5000, 30)
    measured = math.sqrt(float(np.mean((means - truth) ** 2)))
    assert measured / 1.5 <= pred.se <= measured * 1.5, (pred.se, measured)


def test_plan_says_before_a_release_when_a_column_will_state_no_interval():
    """A distribution route whose decoder states no interval (its bias has no bound): plan's
    quantile row says so and why, for the steward to choose another route before releasing; a
    route whose intervals hold carries no such note."""
    (med,) = [s for s in plan(_distribution_policy("square-wave"), 5000, simulate=False)["columns"][0]["statistics"]
              if s["statistic"] == "median"]
    assert "will state no interval" in med["note"] and "cannot be bounded" in med["note"], med["note"]
    (med,) = [s for s in plan(_distribution_policy("hierarchy"), 5000, simulate=False)["columns"][0]["statistics"]
              if s["statistic"] == "median"]
    assert "no interval" not in med["note"], med["note"]


def test_a_distribution_mean_target_is_checked_by_plan_and_validate(tmp_path):
    """A target on a distribution column's mean: plan predicts it and says whether it is met (not
    "-"), and validate's quality check judges it; without the simulation (plan(simulate=False))
    the target is marked unchecked, never met."""
    lp = _distribution_policy("hierarchy", {"max_se": 0.5})
    (mean,) = [s for s in plan(lp, 5000)["columns"][0]["statistics"] if s["statistic"] == "mean"]
    assert mean["se"] > 0.5 and mean["meets_target"] is False and mean["rows_needed"] > 5000
    lp_ok = _distribution_policy("hierarchy", {"max_relative_se": 0.05})
    (ok,) = [s for s in plan(lp_ok, 5000)["columns"][0]["statistics"] if s["statistic"] == "mean"]
    assert ok["meets_target"] is True and ok["target_relative_se"] == 0.05
    (skipped,) = [s for s in plan(lp, 5000, simulate=False)["columns"][0]["statistics"] if s["statistic"] == "mean"]
    assert skipped["se"] is None and skipped.get("meets_target") is None and skipped["target_se"] == 0.5

    from ldptransform import validate

    rng = np.random.default_rng(8)  # invented test data
    raw = tmp_path / "raw.parquet"
    pd.DataFrame({"pay": rng.beta(2, 5, 5000) * 100}).to_parquet(raw, index=False)
    for policy, status in ((lp, False), (lp_ok, True)):
        out = tmp_path / f"x{status}.parquet"
        privatize(raw, policy, KEY, out)
        quality = validate(out).check("quality")
        assert quality is not None and quality.ok is status and "pay mean" in quality.detail, quality


@pytest.mark.parametrize("rows, quality", [(20000, None), (100, {"max_se": 0.0001, "max_relative_se": 0.0001})],
                         ids=["targets met", "targets unmet"])
def test_suggest_progress_counts_steps_to_a_known_total(tmp_path, ldpt, monkeypatch, rows, quality):
    """suggest's on_progress: done 0 first, then one call per step with done increasing to a total
    fixed from the first call (3 privatized columns: 3 split searches + 3 x 3 for strategy sample;
    with unmet targets the columns a sample option skips are counted at once); the result is the
    same with and without the callback.  `plan --suggest --log-format json` tells the same
    sequence as `progress` records (every step here: the records' rate limit is lifted)."""
    pol = json.loads(json.dumps(POLICY))
    if quality is not None:
        pol["quality"] = quality
    lp = parse_policy(pol, "test")
    calls: list[tuple[int, int | None]] = []
    got = suggest(lp, rows, on_progress=lambda done, total: calls.append((done, total)))
    assert got == suggest(lp, rows)
    done = [d for d, _ in calls]
    assert {t for _, t in calls} == {12} and done[0] == 0 and done[-1] == 12
    assert all(a < b for a, b in zip(done, done[1:])), done
    assert len(calls) == (13 if quality is None else 7), calls   # unmet: each sample option skips 3 columns at once

    import ldptransform.cli as cli

    monkeypatch.setattr(cli._Progress, "EVERY", 0.0)
    p = tmp_path / "policy.yaml"
    p.write_text(yaml.safe_dump(pol, sort_keys=False), encoding="utf-8")   # the columns in the same order
    r = ldpt("plan", "--policy", p, "--rows", rows, "--format", "json", "--suggest", "--log-format", "json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["suggestion"] == got
    recs = [json.loads(line) for line in r.stderr.splitlines()]
    prog = [x for x in recs if x["event"] == "progress"]
    assert [(x["done"], x["total"]) for x in prog] == calls
    assert {(x["stage"], x["unit"]) for x in prog} == {("suggesting an eps split", "steps")}
    assert set(prog[-1]) >= {"seconds", "eta_seconds"} and prog[-1]["eta_seconds"] == 0.0
    assert all(a["seconds"] <= b["seconds"] for a, b in zip(prog, prog[1:]))
    assert recs[-1]["event"] == "result" and recs[-1]["exit_code"] == 0


def test_suggest_progress_without_strategy_sample_has_one_step_per_column():
    """One privatized column: strategy sample is not compared, so the search is one step."""
    lp = parse_policy({**POLICY, "columns": {"site": POLICY["columns"]["site"]}}, "test")
    calls: list[tuple[int, int | None]] = []
    sug = suggest(lp, 20000, on_progress=lambda done, total: calls.append((done, total)))
    assert "not compared" in sug["sample"]["verdict"] and calls == [(0, 1), (1, 1)]
