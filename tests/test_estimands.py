"""Every statistic of `estimate` names its estimand, read from the manifest (clipping to the
bounds, bins, missing values filled or counted as a category, unknown categories), and the
text output shows each column's estimand once.  Cross-tab cells, within-row shares and grouped
means carry consistent versions beside the raw estimates; a distribution column's mean has an
SE and an interval.

Data: invented rows drawn with numpy's seeded generator (input data only); the release key and
nonce are fixed, so every check is deterministic.  Tolerance for estimates against the truth:
4 standard errors.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import FIXED_KEY_BYTES, module_private_dir

from ldptransform import estimate, parse_policy, privatize
from ldptransform.keys import SecretKey
from ldptransform.results import EstimateResult

KEY = SecretKey(FIXED_KEY_BYTES)
ROWS = 6000
SITES = ["north", "south", "east"]
POLICY: dict[str, Any] = {
    "budget": {"epsilon_per_row": 5.0},
    "columns": {
        "site": {"type": "categorical", "categories": SITES, "epsilon": 1.0, "missing": "as-category",
                 "unknown": "as-category"},
        "pay": {"type": "numeric", "bounds": [0, 150000], "missing": {"fill": 0}, "epsilon": 1.0,
                "mechanism": "hybrid"},
        "age": {"type": "numeric", "bounds": [18, 65], "missing": {"fill": 40}, "epsilon": 1.0,
                "needs": ["mean", "quantiles"], "mechanism": "hierarchy"},
        "tenure": {"type": "numeric", "bins": [0, 2, 5, 10, 40], "epsilon": 1.0, "missing": {"fill": 1}},
        "grade": {"type": "categorical", "categories": ["a", "b"], "epsilon": 0.25},
    },
}
PAY = "pay clipped to [0, 150000]; missing pay replaced by 0"
AGE = "age clipped to [18, 65]; missing age replaced by 40"
SITE = "missing site counted as <missing>; site values not among its listed categories counted as <other>"
TENURE = ("tenure clipped to [0, 40]; tenure in 4 bins with edges 0, 2, 5, 10, 40 (the last bin includes its upper "
          "edge); missing tenure replaced by 1")
GRADE = "no grade missing (the release refuses missing values); every grade among its listed categories " \
        "(the release refuses others)"


def _data() -> pd.DataFrame:
    rng = np.random.default_rng(11)  # invented input data only
    site = rng.choice(np.array(SITES + ["west", None], dtype=object), ROWS, p=[.4, .3, .2, .06, .04])
    pay = rng.lognormal(np.log(60000), 0.6, ROWS)          # a right tail past the upper bound
    pay[rng.random(ROWS) < 0.3] = np.nan                    # 30% blanks, filled with 0
    age = rng.normal(45, 14, ROWS)                          # some below 18 and above 65
    age[rng.random(ROWS) < 0.1] = np.nan
    tenure = rng.gamma(2.0, 4.0, ROWS)
    tenure[rng.random(ROWS) < 0.05] = np.nan
    return pd.DataFrame({"site": site, "pay": pay, "age": age, "tenure": tenure,
                         "grade": rng.choice(["a", "b"], ROWS, p=[.97, .03])})


@pytest.fixture(scope="module")
def release(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    d = tmp_path_factory.mktemp("estimands")
    df = _data()
    raw = d / "raw.parquet"
    df.to_parquet(raw, index=False)
    out = d / "x.parquet"
    with module_private_dir(tmp_path_factory):
        privatize(raw, parse_policy(POLICY, "estimands.yaml"), KEY, out, nonce="e" * 32)
    return {"df": df, "out": out}


def _estimate(release: dict[str, Any]) -> EstimateResult:
    return estimate(release["out"], crosstabs=[("site", "grade")], mean_by=[("pay", "grade"), ("pay", "site")],
                    quantiles=[0.25, 0.5], ranges=[("age", 30.0, 40.0), ("tenure", 2.0, 5.0)])


def test_each_column_names_how_its_values_were_encoded(release: dict[str, Any]) -> None:
    res = _estimate(release)
    assert {n: c.estimand for n, c in res.columns.items()} == {"site": SITE, "pay": PAY, "age": AGE,
                                                              "tenure": TENURE, "grade": GRADE}
    assert res.to_dict()["columns"]["pay"]["estimand"] == PAY


def test_every_statistic_names_its_estimand(release: dict[str, Any]) -> None:
    f = _estimate(release).to_frame()
    est = dict(zip(zip(f["column"], f["statistic"], f["value"].fillna("")), f["estimand"]))
    assert est[("pay", "mean", "")] == f"mean of pay among all rows; {PAY}"
    assert est[("age", "mean", "")] == f"mean of age among all rows (from the estimated distribution); {AGE}"
    assert est[("site", "frequency", "<other>")] == \
        f"share of rows with site not one of its listed categories among all rows; {SITE}"
    assert est[("tenure", "frequency", "[2, 5)")] == f"share of rows with tenure in bin [2, 5) among all rows; {TENURE}"
    assert est[("age", "quantile", "0.5")].startswith("0.5-quantile of age among all rows (read off its histogram")
    assert est[("age", "quantile", "0.5")].endswith(AGE) and est[("tenure", "quantile", "0.25")].endswith(TENURE)
    assert est[("age", "range share", "30..40")].startswith("share of rows with age in [30, 40) among all rows")
    assert est[("age", "range share", "30..40")].endswith(AGE)
    assert est[("site:grade", "joint share", "<missing>|b")] == \
        f"share of rows with site missing and grade = b among all rows; {SITE}; {GRADE}"
    assert est[("site:grade", "share within row", "north|a")] == \
        f"share of rows with grade = a among rows with site = north; {SITE}; {GRADE}"
    assert est[("pay:site", "mean", "south")] == f"mean of pay among rows with site = south; {PAY}; {SITE}"
    assert f["estimand"].str.len().min() > 0


def test_the_mean_is_of_the_encoded_values(release: dict[str, Any]) -> None:
    """What the estimand says is what is estimated: the mean of pay clipped and with blanks as 0,
    not the mean among the rows that have a pay."""
    df = release["df"]
    m = _estimate(release).columns["pay"].mean
    assert m is not None and m.estimate is not None and m.se is not None
    encoded = float(df["pay"].fillna(0).clip(0, 150000).mean())
    among_present = float(df["pay"].dropna().mean())
    assert abs(m.estimate - encoded) < 4 * m.se
    assert abs(m.estimate - among_present) > 10 * m.se  # the difference the estimand names is large


def test_a_distribution_column_mean_has_an_se(release: dict[str, Any]) -> None:
    res = _estimate(release)
    age = res.columns["age"]
    assert age.family == "distribution" and age.mean is not None
    m = age.mean
    assert m.estimate is not None and m.se is not None and m.se > 0
    assert m.ci_low is not None and m.ci_high is not None and m.ci_low <= m.estimate <= m.ci_high
    truth = float(release["df"]["age"].fillna(40).clip(18, 65).mean())
    assert m.ci_low <= truth <= m.ci_high
    d = res.to_dict()["columns"]["age"]["mean"]
    assert d["se"] == m.se and d["ci_low"] == m.ci_low and "interval" in d["note"]


def test_cross_tab_and_grouped_means_have_consistent_versions(release: dict[str, Any]) -> None:
    res = _estimate(release)
    x = res.crosstabs[0]
    joint = np.array([c.consistent for c in x.cells]).reshape(len(SITES) + 2, 2)
    assert (joint >= 0).all() and joint.sum() == pytest.approx(1.0, abs=1e-9)
    within = np.array([np.nan if c.within_consistent is None else c.within_consistent for c in x.cells])
    within = within.reshape(joint.shape)
    ok = joint.sum(axis=1) > 0
    assert np.isnan(within[~ok]).all()
    assert ((within[ok] >= 0) & (within[ok] <= 1)).all()
    np.testing.assert_allclose(within[ok].sum(axis=1), 1.0, atol=1e-9)
    np.testing.assert_allclose(within[ok], joint[ok] / joint[ok].sum(axis=1, keepdims=True), atol=1e-12)
    raw_within = np.array([np.nan if c.within.estimate is None else c.within.estimate for c in x.cells])
    # at eps 0.25 for a 3% category some raw within-row shares fall outside [0, 1]: the case this is for
    assert ((raw_within < 0) | (raw_within > 1)).any()
    means = [g for gm in res.grouped_means for g in gm.groups]
    assert any(g.mean.estimate is not None and not 0 <= g.mean.estimate <= 150000 for g in means)
    for g in means:
        if g.mean.estimate is None:
            assert g.consistent is None
        else:
            assert g.consistent == min(max(g.mean.estimate, 0.0), 150000.0)
    d = res.to_dict()
    assert d["crosstabs"][0]["row_shares"][0]["consistent"] == x.cells[0].within_consistent
    assert d["grouped_means"][0]["groups"][0]["consistent"] == res.grouped_means[0].groups[0].consistent
    f = res.to_frame()
    assert f.loc[f["statistic"] == "joint share", "consistent"].notna().sum() == joint.size
    assert f.loc[f["statistic"] == "share within row", "consistent"].notna().sum() == 2 * int(ok.sum())
    assert f.loc[f["statistic"] == "mean", "consistent"].notna().sum() == \
        sum(g.consistent is not None for g in means)


def test_the_text_output_shows_each_column_estimand_once(release: dict[str, Any], ldpt: Any) -> None:
    r = ldpt("estimate", release["out"], "--crosstab", "site:grade", "--mean-by", "pay:site")
    assert r.returncode == 0, r.stderr
    text = " ".join(r.stdout.split())  # the console may wrap long lines
    for name, enc in (("site", SITE), ("pay", PAY), ("age", AGE), ("tenure", TENURE), ("grade", GRADE)):
        assert text.count(f"{name} estimand: {enc}") == 1, name


def test_the_encoding_clauses_follow_the_manifest(release: dict[str, Any]) -> None:
    """The clauses come from the manifest's embedded policy: values refused outside the bounds
    are said to be within them, and a missing-value handling this version does not know is
    quoted as the policy gives it rather than left out."""
    import copy

    from ldptransform.estimate import column_estimand
    from ldptransform.manifest import load_manifest

    out: Path = release["out"]
    m = load_manifest(out.with_name(out.stem + ".manifest.json"))
    pol = copy.deepcopy(m.policy)
    pol["columns"]["pay"]["out_of_bounds"] = "error"
    pol["columns"]["pay"]["missing"] = {"as_answer": True}
    changed = m.model_copy(update={"policy": pol})
    assert column_estimand(changed, changed.column("pay")) == \
        "every pay within [0, 150000] (the release refuses values outside); missing pay handled as the policy " \
        "says (missing: as_answer: True)"
    assert column_estimand(m, m.column("pay")) == PAY
