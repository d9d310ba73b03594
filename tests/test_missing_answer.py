"""missing: as-answer on numeric columns: the share missing, and the mean and distribution among
rows with a value, with honest SEs (mechanisms/missing.py, decoders.MissingAnswerDecoder,
decoders.shares_without).

Statistical checks use fixed keys (conftest.keyed_words: one label per simulated release), so
they cannot flake; tolerances are stated where they are used."""

from __future__ import annotations

import functools
import io
import json
import pickle
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from conftest import (assert_policy_refused, assert_user_error, keyed_words, sha256, write_fixed_key,
                      write_policy)
from ldptransform import mechanisms as mech
from ldptransform.errors import PolicyError
from ldptransform.mechanisms.decoders import FrequencyDecoder, MissingAnswerDecoder, shares_without
from ldptransform.policy import MISSING_LABEL, parse_policy
from ldptransform.random.variates import exp_lower_bound

words = functools.partial(keyed_words, stream="missing-answer-tests")
Z95 = 1.959963984540054


def _policy(col: dict[str, Any], budget: float | None = None) -> dict[str, Any]:
    return {"budget": {"epsilon_per_row": budget or float(col.get("epsilon", 1.0))}, "columns": {"pay": col}}


def _resolve(col: dict[str, Any]) -> Any:
    return parse_policy(_policy(col), "test-policy").columns[0]


def _numeric(eps: float = 1.0, **extra: Any) -> dict[str, Any]:
    return {"type": "numeric", "bounds": [0, 100], "epsilon": eps, "missing": "as-answer", **extra}


# -- the policy -------------------------------------------------------------------------------

def test_policy_accepts_as_answer_with_and_without_bins() -> None:
    rc = _resolve(_numeric(1.0))
    m = rc.mechanism
    assert isinstance(m, mech.MissingFlag)
    assert m.epsilon == 1.0 and m.flag.epsilon == pytest.approx(mech.DEFAULT_FLAG_SHARE)
    assert m.value.epsilon == pytest.approx(1.0 - mech.DEFAULT_FLAG_SHARE) and m.fill == 50.0
    assert _resolve(_numeric(2.0, missing_epsilon=0.3)).mechanism.flag.epsilon == 0.3
    named = _resolve(_numeric(2.0, mechanism="two-point")).mechanism
    assert named.value.name == "two-point" and named.value.epsilon == pytest.approx(1.5, abs=1e-11)
    dist = _resolve(_numeric(2.0, needs=["mean", "quantiles"])).mechanism
    assert isinstance(dist, mech.MissingFlagDistribution) and dist.family == "distribution"
    assert dist.value.name == mech.DEFAULT_DISTRIBUTION and dist.fill_bucket() == 32   # [50, 51.5625) of 64
    binned = _resolve({"type": "numeric", "bins": [0, 10, 50, 100], "epsilon": 1.0, "missing": "as-answer"})
    assert binned.mechanism.categories == ["[0, 10)", "[10, 50)", "[50, 100]", MISSING_LABEL]
    assert binned.missing_code == 3 and binned.mechanism.epsilon == 1.0


@pytest.mark.parametrize(("col", "words_in_message"), [
    (_numeric(1.0, missing_epsilon=1.0), ["missing_epsilon", "must be below", "epsilon"]),
    (_numeric(1.0, missing_epsilon=1.5), ["missing_epsilon", "must be below"]),
    ({"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "missing": {"fill": 0}, "missing_epsilon": 0.2},
     ["missing_epsilon applies only with missing: as-answer"]),
    ({"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "missing": {"fill": 0, "as-answer": True}},
     ["pay", "missing"]),
    ({"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "missing": ["as-answer", {"fill": 0}]},
     ["pay", "missing"]),
    ({"type": "numeric", "bins": [0, 10, 100], "epsilon": 1.0, "missing": "as-answer", "missing_epsilon": 0.2},
     ["missing_epsilon does not apply to a column released as bins"]),
    (_numeric(1.0, mechanism="square-wave"), ["square-wave cannot", "hierarchy", "bins"]),
    (_numeric(1.0, mechanism="discrete-laplace"), ["fixed number of random words"]),
])
def test_policy_refuses_what_cannot_be_released(col: dict[str, Any], words_in_message: list[str]) -> None:
    with pytest.raises(PolicyError) as err:
        parse_policy(_policy(col), "test-policy")
    text = str(err.value)
    assert "pay" in text and "\n" not in text
    for w in words_in_message:
        assert w in text, text


def test_missing_epsilon_checked_against_the_sampled_epsilon() -> None:
    pol: dict[str, Any] = {"budget": {"epsilon_per_row": 1.0, "strategy": "sample", "sample_columns": 2},
           "columns": {"pay": {"type": "numeric", "bounds": [0, 100], "missing": "as-answer", "missing_epsilon": 0.5},
                       "grade": {"type": "categorical", "categories": ["a", "b"]}}}
    with pytest.raises(PolicyError, match=r"column 'pay', field 'missing_epsilon'.*must be below"):
        parse_policy(pol, "test-policy")
    pol["columns"]["pay"]["missing_epsilon"] = 0.1
    m = parse_policy(pol, "test-policy").by_name["pay"].mechanism
    assert isinstance(m, mech.MissingFlag) and m.epsilon == 0.5 and m.flag.epsilon == 0.1


def test_cli_refuses_missing_epsilon_at_the_column_epsilon(ldpt, tmp_path: Path, private_dir: Path) -> None:
    raw = pd.DataFrame({"pay": [1.0, None, 3.0]})
    assert_policy_refused(ldpt, tmp_path, private_dir, _policy(_numeric(1.0, missing_epsilon=1.0)), raw,
                          ["pay", "missing_epsilon"])


# -- the channel and the spec -------------------------------------------------------------------

@pytest.mark.parametrize("eps", [0.1, 0.5, 1.0, 2.0, 4.0, 8.0])
@pytest.mark.parametrize("flag_eps", [None, 0.05, 0.3])
@pytest.mark.parametrize("needs", [["mean"], ["quantiles"]])
def test_channel_within_eps_exactly_and_spec_round_trip(eps: float, flag_eps: float | None, needs: list[str]) -> None:
    if flag_eps is not None and flag_eps >= eps:
        flag_eps = eps / 2
    col = _numeric(eps, needs=needs) if flag_eps is None else _numeric(eps, missing_epsilon=flag_eps, needs=needs)
    m = _resolve(col).mechanism
    ratio = m.realized_ratio()
    assert ratio is not None and ratio == m.value.realized_ratio() * m.flag.realized_ratio()
    assert ratio <= exp_lower_bound(eps)          # exact rational comparison
    assert m.max_log_ratio() <= eps + 1e-9
    spec = m.to_spec()
    assert spec["epsilon"] == eps and set(spec["missing_answer"]) == {"value_epsilon", "flag_epsilon", "fill"}
    again = mech.build(json.loads(json.dumps(spec)))
    assert type(again) is type(m) and again.to_spec() == spec


def test_spec_with_a_wrong_sum_or_fill_is_refused() -> None:
    spec = _resolve(_numeric(1.0)).mechanism.to_spec()
    with pytest.raises(PolicyError, match="not the sum"):
        mech.build({**spec, "epsilon": 1.5})
    with pytest.raises(PolicyError, match="middle of the bounds"):
        mech.build({**spec, "missing_answer": {**spec["missing_answer"], "fill": 10.0}})


def test_flag_channel_and_value_of_missing_rows() -> None:
    """The flag keeps the true answer with probability p* = e^eps_f / (e^eps_f + 1) (within 1e-12), and a
    missing row's value is randomized exactly as the middle of the bounds (same words, same report)."""
    m = _resolve(_numeric(1.0)).mechanism
    ef = m.flag.epsilon
    assert m.flag.p_star == pytest.approx(np.exp(ef) / (np.exp(ef) + 1), abs=1e-12)
    n = 2000
    w = words("flag-channel", n, m.words_per_row)
    x = np.full(n, np.nan)
    arrays = m.randomize(x, w)
    mid = m.randomize(np.full(n, 50.0), w)
    assert arrays[0].equals(mid[0])
    assert [f.name for f in m.output_fields("pay")] == ["pay", "pay__missing"]
    assert m.count_invalid(arrays) == 0
    assert all(m.output_meaning(f.name) for f in m.output_fields("pay"))


# -- unbiasedness and coverage over repeated releases ----------------------------------------------

def _skewed_pay(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Invented values on [0, 100] (right-skewed) and a missingness that depends on the value (low values
    are missing more often), so the mean among rows with a value differs from any fill's."""
    rng = np.random.default_rng(seed)
    x = np.clip(rng.gamma(2.0, 12.0, n), 0, 100)
    missing = rng.random(n) < np.where(x < 20, 0.5, 0.15)
    return x, missing


def _coverage(est: np.ndarray, se: np.ndarray, truth: float | np.ndarray, z: float) -> float:
    return float(np.mean(np.abs(est - truth) <= z * se))


RELEASES = 400


def test_share_missing_and_mean_among_present_unbiased_with_covering_intervals() -> None:
    """400 releases of 5,000 rows at eps 1 (flag 0.25, value 0.75).  Tolerances: the average estimate
    within 4 standard errors of the average (sd / sqrt(400)) of the truth; coverage of the 95% intervals in
    [0.90, 0.99] (binomial sd about 0.011 at 400 releases); the half-width intervals (z = 0.98, about 68%
    expected) cover in fewer than 85%.  Measured: see the assertion messages."""
    n = 5000
    x, missing = _skewed_pay(n, seed=11)
    truth_share, truth_mean = float(missing.mean()), float(x[~missing].mean())
    filled_mean = float(np.where(missing, 50.0, x).mean())
    assert abs(truth_mean - filled_mean) > 5   # the estimand matters here
    m = _resolve(_numeric(1.0)).mechanism
    xin = np.where(missing, np.nan, x)
    share, share_se, mean, mean_se = (np.empty(RELEASES) for _ in range(4))
    for r in range(RELEASES):
        dec = m.decoder().add(m.randomize(xin, words(f"release-{r}", n, m.words_per_row)))
        f = dec.missing_share(Z95)
        mr = dec.mean(Z95)
        share[r], share_se[r], mean[r], mean_se[r] = f.estimate, f.se, mr.estimate, mr.se
    for est, se, truth, what in ((share, share_se, truth_share, "share missing"),
                                 (mean, mean_se, truth_mean, "mean among present")):
        sd = est.std(ddof=1)
        assert abs(est.mean() - truth) <= 4 * sd / np.sqrt(RELEASES), (what, est.mean(), truth, sd)
        assert abs(se.mean() / sd - 1) < 0.15, (what, se.mean(), sd)        # the SE is the spread (within 15%)
        cov95 = _coverage(est, se, truth, Z95)
        half = _coverage(est, se, truth, Z95 / 2)
        assert 0.90 <= cov95 <= 0.99, (what, cov95)
        assert half < 0.85, (what, half)


def test_distribution_among_present_of_a_binned_column() -> None:
    """Bins with a <missing> bin, 400 releases of 5,000 rows at eps 1: the bin shares among rows with a
    value (shares_without: the bins divided by their sum, delta-method covariance) average to the truth
    within 4 standard errors of the average plus 0.002 (the ratio's O(1/n) bias), and their 95% intervals
    cover in [0.90, 0.99] of the releases, pooled over bins; so do the share missing's."""
    n = 5000
    x, missing = _skewed_pay(n, seed=12)
    edges = np.array([0, 10, 20, 40, 100.0])
    rc = _resolve({"type": "numeric", "bins": edges.tolist(), "epsilon": 1.0, "missing": "as-answer"})
    m = rc.mechanism
    codes = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, len(edges) - 2)
    codes[missing] = rc.missing_code
    truth = np.bincount(codes[~missing], minlength=4) / (~missing).sum()
    g, g_se, miss, miss_se = np.empty((RELEASES, 4)), np.empty((RELEASES, 4)), np.empty(RELEASES), np.empty(RELEASES)
    for r in range(RELEASES):
        dec = m.decoder(joint=True).add(m.randomize(codes, words(f"binned-{r}", n, m.words_per_row)))
        assert isinstance(dec, FrequencyDecoder)
        est, se = dec.estimates()
        assert est is not None and se is not None
        kept, cov = shares_without(est, dec.covariance(), rc.missing_code)
        assert kept is not None and cov is not None and abs(kept.sum() - 1) < 1e-12
        g[r], g_se[r] = kept, np.sqrt(np.diag(cov))
        miss[r], miss_se[r] = est[rc.missing_code], se[rc.missing_code]
    sd = g.std(axis=0, ddof=1)
    assert np.all(np.abs(g.mean(axis=0) - truth) <= 4 * sd / np.sqrt(RELEASES) + 0.002), (g.mean(axis=0), truth)
    assert np.all(np.abs(g_se.mean(axis=0) / sd - 1) < 0.15), (g_se.mean(axis=0), sd)
    cov95 = _coverage(g, g_se, truth, Z95)
    assert 0.90 <= cov95 <= 0.99, cov95
    assert _coverage(g, g_se, truth, Z95 / 2) < 0.85
    assert 0.90 <= _coverage(miss, miss_se, float(missing.mean()), Z95) <= 0.99


def test_distribution_among_present_through_a_distribution_mechanism() -> None:
    """needs: [quantiles] without bins (the default distribution mechanism, eps 2 split 0.5 / 1.5), 400
    releases of 5,000 rows: range shares among rows with a value (ends on bucket edges, one range holding
    the bucket where missing rows' values are randomized) average to the truth within 4 standard errors
    of the average plus 0.003, their SE is the spread within 0.85-1.3 (it also counts the spread of the
    true values, as every SE of the tool), and their 95% intervals cover in [0.90, 0.99] of the releases
    pooled over ranges, the half-width ones in fewer than 85%; the share missing's cover in [0.90, 0.99]."""
    m = _resolve(_numeric(2.0, needs=["quantiles"])).mechanism
    n = 5000
    x, missing = _skewed_pay(n, seed=21)
    xin, xp = np.where(missing, np.nan, x), x[~missing]
    ranges = [(0, 25), (25, 50), (50, 75), (0, 12.5)]
    truth = np.array([np.mean((xp >= a) & (xp < b)) for a, b in ranges])
    est, se = np.empty((RELEASES, len(ranges))), np.empty((RELEASES, len(ranges)))
    miss, miss_se = np.empty(RELEASES), np.empty(RELEASES)
    for r in range(RELEASES):
        dec = m.decoder().add(m.randomize(xin, words(f"hierarchy-{r}", n, m.words_per_row)))
        dist = dec.distribution()
        assert abs(dist.mass.sum() - 1) < 1e-9 and "among rows with a value" in dist.method
        ivs = [dist.range_ci(a, b, 0.95) for a, b in ranges]
        est[r], se[r] = [iv.estimate for iv in ivs], [iv.se for iv in ivs]
        f = dec.missing_share(Z95)
        miss[r], miss_se[r] = f.estimate, f.se
    sd = est.std(axis=0, ddof=1)
    assert np.all(np.abs(est.mean(axis=0) - truth) <= 4 * sd / np.sqrt(RELEASES) + 0.003), (est.mean(axis=0), truth)
    ratio = se.mean(axis=0) / sd
    assert np.all((ratio > 0.85) & (ratio < 1.3)), ratio
    assert 0.90 <= _coverage(est, se, truth, Z95) <= 0.99
    assert _coverage(est, se, truth, Z95 / 2) < 0.85
    assert 0.90 <= _coverage(miss, miss_se, float(missing.mean()), Z95) <= 0.99


def test_decoders_merge_by_addition() -> None:
    m = _resolve(_numeric(2.0)).mechanism
    x, missing = _skewed_pay(3000, seed=13)
    arrays = m.randomize(np.where(missing, np.nan, x), words("merge", 3000, m.words_per_row))
    whole = m.decoder().add(arrays)
    parts = m.decoder().add([a.slice(0, 1234) for a in arrays]).merge(
        m.decoder().add([a.slice(1234) for a in arrays]))
    assert isinstance(whole, MissingAnswerDecoder) and parts.n == whole.n
    for k in ("sa", "saa", "su", "suu", "sau"):
        assert getattr(parts, k) == pytest.approx(getattr(whole, k), rel=1e-12, abs=1e-9)
    # a distribution mechanism's value: the count statistics split by the flag merge exactly, and the
    # decoders and mechanisms pickle (the dask engine ships them)
    md = _resolve(_numeric(2.0, needs=["quantiles"])).mechanism
    arrays = md.randomize(np.where(missing, np.nan, x), words("merge-distribution", 3000, md.words_per_row))
    whole_d = md.decoder().add(arrays)
    parts_d = pickle.loads(pickle.dumps(md.decoder().add([a.slice(0, 999) for a in arrays]))).merge(
        md.decoder().add([a.slice(999) for a in arrays]))
    assert np.array_equal(parts_d.stats_present, whole_d.stats_present)
    assert np.array_equal(parts_d.stats_missing, whole_d.stats_missing)
    assert np.allclose(parts_d.distribution().mass, whole_d.distribution().mass, rtol=0, atol=1e-12)
    assert pickle.loads(pickle.dumps(md)).to_spec() == md.to_spec()


# -- end to end through the command line ---------------------------------------------------------

def _raw_with_blanks(path: Path, n: int = 4000) -> tuple[Path, np.ndarray, np.ndarray, np.ndarray]:
    x, missing = _skewed_pay(n, seed=14)
    rng = np.random.default_rng(15)
    age = rng.integers(18, 70, n).astype(float)
    age_missing = rng.random(n) < 0.2
    hours = np.round(rng.uniform(0, 60, n), 1)
    df = pd.DataFrame({"pay": np.where(missing, np.nan, np.round(x, 2)), "age": np.where(age_missing, np.nan, age),
                       "site": rng.choice(["north", "south"], n),
                       "hours": np.where(rng.random(n) < 0.1, np.nan, hours)})
    df.to_csv(path, index=False)   # missing values are blank cells
    assert ",," in path.read_text() or "\n," in path.read_text()
    return path, np.round(x, 2), missing, age_missing


CLI_POLICY = {"budget": {"epsilon_per_row": 6.5},
              "columns": {"pay": {"type": "numeric", "bounds": [0, 100], "epsilon": 2.0, "missing": "as-answer",
                                  "missing_epsilon": 0.5},
                          "age": {"type": "numeric", "bins": [18, 30, 45, 60, 70], "epsilon": 2.0,
                                  "missing": "as-answer", "needs": ["frequencies", "quantiles"]},
                          "site": {"type": "categorical", "categories": ["north", "south"], "epsilon": 0.5},
                          "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 2.0, "missing": "as-answer",
                                    "needs": ["mean", "quantiles"]}}}


def test_privatize_and_estimate_through_the_cli(ldpt, tmp_path: Path) -> None:
    raw, x, missing, age_missing = _raw_with_blanks(tmp_path / "people.csv")
    pol = write_policy(tmp_path / "policy.yaml", CLI_POLICY)
    key = write_fixed_key(tmp_path / "release.key")
    nonce = "0123456789abcdef0123456789abcdef"
    digests = []
    for b in ("7", "1000"):
        out = tmp_path / f"b{b}" / "extract.parquet"
        out.parent.mkdir()
        res = ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", out, "--nonce", nonce,
                   "--batch-rows", b)
        assert res.returncode == 0, res.stderr
        digests.append(sha256(out))
    assert digests[0] == digests[1]   # the batch size never changes a byte
    assert f"pay: {int(missing.sum())} missing" in res.stderr   # the steward's summary line counts them
    manifest = json.loads((out.parent / "extract.manifest.json").read_text())
    pay_entry = next(c for c in manifest["columns"] if c["name"] == "pay")
    assert pay_entry["mechanism"]["missing_answer"]["flag_epsilon"] == 0.5
    assert [o["name"] for o in pay_entry["outputs"]] == ["pay", "pay__missing"]

    res = ldpt("estimate", out, "--format", "json", "--quantiles", "0.5", "--range", "hours:0..30")
    assert res.returncode == 0, res.stderr
    cols = json.loads(res.stdout)["columns"]
    pay = cols["pay"]
    share = pay["frequencies"][0]
    assert share["value"] == MISSING_LABEL
    assert abs(share["estimate"] - missing.mean()) <= 4 * share["se"]
    assert abs(pay["mean"]["estimate"] - x[~missing].mean()) <= 4 * pay["mean"]["se"]
    assert "missing pay kept as its own answer" in pay["estimand"]
    age = cols["age"]
    age_share = next(f for f in age["frequencies"] if f["value"] == MISSING_LABEL)
    assert abs(age_share["estimate"] - age_missing.mean()) <= 4 * age_share["se"]
    assert abs(sum(age["distribution"]["histogram"]["mass"]) - 1) < 1e-9
    assert "among rows with a value" in age["distribution"]["method"]
    hours = cols["hours"]
    assert hours["frequencies"][0]["value"] == MISSING_LABEL and hours["mean"]["se"] > 0
    assert abs(sum(hours["distribution"]["histogram"]["mass"]) - 1) < 1e-9
    assert "among rows with a value" in hours["distribution"]["method"]
    assert len(hours["distribution"]["ranges"]) == 1

    csv_out = ldpt("estimate", out, "--format", "csv", "--range", "hours:0..30")
    assert csv_out.returncode == 0, csv_out.stderr
    frame = pd.read_csv(io.StringIO(csv_out.stdout))
    texts = " | ".join(frame["estimand"].dropna().astype(str))
    assert "share of rows with pay missing among all rows" in texts
    assert "mean of pay among rows with a value; pay clipped to [0, 100]" in texts
    assert "0.5-quantile of age among rows with a value" in texts
    assert "share of rows with age missing among all rows" in texts
    assert "mean of hours among rows with a value (from the estimated distribution)" in texts
    assert "share of rows with hours in [0, 30) among rows with a value" in texts

    refused = ldpt("estimate", out, "--mean-by", "pay:site")
    assert_user_error(refused, ["--mean-by", "pay", "middle of the bounds"])

    table = ldpt("estimate", out)
    assert table.returncode == 0 and MISSING_LABEL in table.stdout.split("pay: numeric")[1].split("estimand")[0]

    checked = ldpt("validate", out, "--raw", raw, "--key", key, "--format", "json")
    assert checked.returncode == 0, checked.stdout + checked.stderr
    report = json.loads(checked.stdout)
    assert report["ok"] and report["calibration"]["share_inside"] >= 0.8, report["calibration"]
    status = {c["check"]: c["status"] for c in report["checks"]}
    assert status["calibration"] == "pass" and status["reproduced"] == "pass" and status["privacy budget"] == "pass"

    plan = ldpt("plan", "--policy", pol, "--rows", "4000", "--format", "json")
    assert plan.returncode == 0, plan.stderr
    stats = {c["name"]: {s["statistic"]: s for s in c["statistics"]} for c in json.loads(plan.stdout)["columns"]}
    assert stats["pay"]["share missing"]["se"] >= share["se"] * 0.9      # worst case over data
    assert stats["pay"]["mean"]["se"] > 0 and stats["age"]["share missing"]["se"] > 0
    # plan and policy check name the value's mechanism, as the manifest and estimate do, with the flag
    value_mech = pay_entry["mechanism"]["mechanism"]
    plan_cols = {c["name"]: c for c in json.loads(plan.stdout)["columns"]}
    assert plan_cols["pay"]["mechanism"] == f"{value_mech} + missing flag"
    check = ldpt("policy", "check", pol)
    assert check.returncode == 0 and f"{value_mech} + missing flag" in check.stdout, check.stdout


def test_blank_refused_under_missing_error_names_as_answer(ldpt, tmp_path: Path) -> None:
    raw, *_ = _raw_with_blanks(tmp_path / "people.csv", 200)
    pol = write_policy(tmp_path / "policy.yaml", {"budget": {"epsilon_per_row": 2.0},
                                                 "columns": {"pay": {"type": "numeric", "bounds": [0, 100],
                                                                     "epsilon": 1.0},
                                                             "age": {"type": "drop"}, "site": {"type": "drop"},
                                                             "hours": {"type": "drop"}}})
    key = write_fixed_key(tmp_path / "release.key")
    res = ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", tmp_path / "x.parquet")
    assert_user_error(res, ["pay", "missing: as-answer", "{fill: VALUE}"])


def test_empirical_audit_finds_no_violation() -> None:
    """`ldpt audit` through the real release path (20,000 rows per side, fixed key and seed): every
    as-answer column's lower bound on eps stays at or below its eps, and the flag's pair (a value
    against a missing one) is among the pairs audited."""
    from ldptransform.audit import audit
    from ldptransform.keys import SecretKey

    pol = parse_policy({"budget": {"epsilon_per_row": 3.0}, "columns": {
        "pay": _numeric(1.0),
        "age": {"type": "numeric", "bins": [18, 30, 45, 70], "epsilon": 1.0, "missing": "as-answer"},
        "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0, "missing": "as-answer",
                  "needs": ["quantiles"]}}}, "audit-policy")
    res = audit(pol, rows=20000, key=SecretKey(bytes(range(100, 132))), seed="missing-answer").to_dict()
    by = {c["column"]: c for c in res["columns"]}
    assert set(by) == {"pay", "age", "hours"}
    for c in by.values():
        assert c["status"] == "pass" and 0 < c["epsilon_lower"] <= c["epsilon"], c
    assert by["hours"]["epsilon_lower"] > 0.6      # the reduced outcomes keep what tells the pair apart


def test_sampled_and_memoized_releases(tmp_path: Path, private_dir: Path) -> None:
    """Under budget.strategy sample (rows that do not report a column leave all its fields empty) and
    for a memoized binned column, the share missing and the mean among rows with a value come within 4
    SE of the truth, and steward-side validate passes."""
    from ldptransform import estimate, privatize, validate
    from ldptransform.keys import SecretKey

    n = 20000
    x, missing = _skewed_pay(n, seed=31)
    rng = np.random.default_rng(32)
    raw = tmp_path / "people.csv"
    pd.DataFrame({"pid": np.arange(n), "pay": np.where(missing, np.nan, np.round(x, 2)),
                  "g": rng.choice(["a", "b"], n)}).to_csv(raw, index=False)
    key = SecretKey(bytes(range(140, 172)))
    sampled = parse_policy({"budget": {"epsilon_per_row": 4.0, "strategy": "sample", "sample_columns": 1},
                            "columns": {"pid": {"type": "drop"}, "g": {"type": "categorical", "categories": ["a", "b"]},
                                        "pay": {"type": "numeric", "bounds": [0, 100], "missing": "as-answer"}}},
                           "sampled")
    memo = parse_policy({"budget": {"epsilon_per_row": 1.0}, "subject_key": "pid",
                         "columns": {"pid": {"type": "drop"}, "g": {"type": "drop"},
                                     "pay": {"type": "numeric", "bins": [0, 20, 50, 100], "epsilon": 1.0,
                                             "missing": "as-answer", "memoize": True}}}, "memoized")
    for name, lp in (("sampled", sampled), ("memoized", memo)):
        out = tmp_path / f"{name}.parquet"
        privatize(raw, lp, key, out)
        col = estimate(out).to_dict()["columns"]["pay"]
        share = next(f for f in col["frequencies"] if f["value"] == MISSING_LABEL)
        assert abs(share["estimate"] - missing.mean()) <= 4 * share["se"], (name, share)
        if name == "sampled":
            assert 0.4 * n < col["rows_reported"] < 0.6 * n
            assert abs(col["mean"]["estimate"] - x[~missing].mean()) <= 4 * col["mean"]["se"], col["mean"]
        rep = validate(out, raw=raw, key=key)
        assert rep.ok, [c.as_dict() for c in rep.checks if c.status == "fail"]
