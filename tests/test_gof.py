"""Goodness of fit of the reports to the declared mechanism (ldptransform/gof.py).

Fixed keys throughout, so every verdict here is deterministic.  Three kinds of check:

* a correct release passes at the family-wise level the validator uses (0.001), for every
  mechanism that has a test;
* a release made at another eps than the manifest declares fails, in the directions
  gof.py's table says are detectable (and a direction it calls hidden is shown to be so);
* the tests' reference distributions are valid: over many independent releases of the same
  data the rejection rate at 5% stays at or below 5% (plus 4 binomial SEs), also for a
  data set with zero-share categories (the boundary case the conservative hull reference is
  for); and Pearson's statistic equals scipy.stats.chisquare on the same pooled cells.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from scipy import stats

from conftest import keyed_words
from ldptransform import gof
from ldptransform.gof import FitResult, FitStats
from ldptransform.keys import SecretKey
from ldptransform.random import KeyedStream
from ldptransform.mechanisms import (
    GRR,
    OLH,
    OUE,
    SUE,
    DiscreteLaplace,
    HadamardResponse,
    Hierarchy,
    Hybrid,
    Matrix,
    Piecewise,
    SquareWave,
    SubsetSelection,
    TwoPoint,
)
from ldptransform.mechanisms.matrix import grr_matrix

KEY = SecretKey(bytes(range(64, 96)))
NONCE = "0f1e2d3c4b5a69788796a5b4c3d2e1f0"
FAMILY = 0.001
CATS = [f"c{i}" for i in range(12)]
# 3 common categories and 9 that nobody holds: the boundary case for the hull test
SHARES = np.r_[0.5, 0.3, 0.2, np.zeros(9)]
BOUNDS = (0.0, 100.0)


def words(label: str, n: int, per_row: int, start: int = 0) -> np.ndarray:
    return keyed_words(label, n, per_row, start, key=KEY, nonce=NONCE, stream="test-gof")


def cat_data(n: int, seed: int = 5) -> np.ndarray:
    return np.random.default_rng(seed).choice(len(CATS), size=n, p=SHARES)


def num_data(n: int, seed: int = 6) -> np.ndarray:
    # invented: skewed values on [0, 100] with an empty upper half
    return np.clip(np.random.default_rng(seed).gamma(2.0, 8.0, n), 0, 50)


def release(m, x: np.ndarray, label: str) -> list[pa.Array]:
    w = words(label, len(x), m.words_per_row)
    if getattr(m, "variable_draws", False):
        ds = KeyedStream(KEY, NONCE, "test-gof-draws", label)
        return m.randomize_with(x, w, lambda r, j: ds.words_at(r, j))
    return m.randomize(x, w)


def fit_of(m) -> FitStats:
    """The mechanism's fit test (the test fails if it has none)."""
    f = gof.fit_stats_for(m)
    assert f is not None, gof.no_fit_reason(m)
    return f


def verdict(declared, arrays) -> FitResult:
    f = fit_of(declared)
    f.add(arrays)
    return f.result(FAMILY)


def categorical(name: str, eps: float):
    return {
        "grr": lambda: GRR(eps, CATS),
        "oue": lambda: OUE(eps, CATS),
        "sue": lambda: SUE(eps, CATS),
        "olh": lambda: OLH(eps, CATS),
        "hadamard": lambda: HadamardResponse(eps, CATS),
        "subset": lambda: SubsetSelection(eps, CATS, 3),
        "matrix": lambda: Matrix(eps, CATS, grr_matrix(eps, len(CATS)).tolist()),
    }[name]()


def numeric(name: str, eps: float):
    return {
        "two-point": lambda: TwoPoint(eps, BOUNDS),
        "hybrid": lambda: Hybrid(eps, BOUNDS, 64),
        "piecewise": lambda: Piecewise(eps, BOUNDS, 64),
        "square-wave": lambda: SquareWave(eps, BOUNDS, 64),
        "hierarchy": lambda: Hierarchy(eps, BOUNDS, 4, 64),
        "discrete-laplace": lambda: DiscreteLaplace(eps, BOUNDS, 64),
    }[name]()


CAT_NAMES = ["grr", "oue", "sue", "olh", "hadamard", "subset", "matrix"]
NUM_NAMES = ["two-point", "hybrid", "piecewise", "square-wave", "hierarchy", "discrete-laplace"]
N = 40_000


def make(name: str, eps: float):
    return categorical(name, eps) if name in CAT_NAMES else numeric(name, eps)


def data(name: str, n: int = N) -> np.ndarray:
    return cat_data(n) if name in CAT_NAMES else num_data(n)


@pytest.mark.parametrize("name", CAT_NAMES + NUM_NAMES)
def test_correct_release_passes(name):
    m = make(name, 1.0)
    r = verdict(m, release(m, data(name), f"ok-{name}"))
    assert r["passed"], r["detail"]
    assert r["impossible"] == 0


# Released at eps 3, declared 1 (the declared eps is too small: the release is more
# revealing than the manifest says).  gof.py's table: detected for every mechanism here
# on this data (which has zero-share categories and an empty upper half).
@pytest.mark.parametrize("name", CAT_NAMES + NUM_NAMES)
def test_release_more_revealing_than_declared_fails(name):
    r = verdict(make(name, 1.0), release(make(name, 3.0), data(name), f"hi-{name}"))
    assert not r["passed"], r["detail"]


# Released at eps 1, declared 3 (declared too large): detected where a data-independent
# feature or the output alphabet carries eps ...
@pytest.mark.parametrize("name", ["oue", "sue", "olh", "hadamard", "two-point", "hybrid", "piecewise",
                                  "square-wave", "discrete-laplace"])
def test_release_flatter_than_declared_fails(name):
    r = verdict(make(name, 3.0), release(make(name, 1.0), data(name), f"lo-{name}"))
    assert not r["passed"], r["detail"]


# ... and hidden for randomized response (and a matrix that is randomized response), as the
# table says: flatter reports are what the declared channel gives for flatter data.
@pytest.mark.parametrize("name", ["grr", "matrix"])
def test_flatter_randomized_response_is_hidden(name):
    r = verdict(make(name, 3.0), release(make(name, 1.0), data(name), f"lo-{name}"))
    assert r["passed"], r["detail"]


def test_wrong_domain_is_caught():
    """Reports over 12 categories checked against a manifest that declares 11 (one dropped)."""
    m = OUE(1.0, CATS)
    arrays = release(m, cat_data(5000), "dom")
    r = verdict(OUE(1.0, CATS[:-1]), arrays)
    assert not r["passed"] and r["impossible"] == 5000
    s = SubsetSelection(1.0, CATS, 3)
    r = verdict(SubsetSelection(1.0, CATS, 4), release(s, cat_data(5000), "dom-subset"))
    assert not r["passed"] and r["impossible"] == 5000


def test_batches_merge_to_the_same_verdict():
    for name in ("oue", "hadamard", "subset", "discrete-laplace", "hierarchy"):
        m = make(name, 1.0)
        x = data(name, 9000)
        arrays = release(m, x, f"merge-{name}")
        whole = fit_of(m).add(arrays)
        parts = [fit_of(m).add([a.slice(s, 3000) for a in arrays]) for s in (0, 3000, 6000)]
        merged = parts[0].merge(parts[1]).merge(parts[2])
        for k in whole.stats:
            assert np.array_equal(np.asarray(whole.stats[k]), np.asarray(merged.stats[k])), (name, k)
        assert [r["p_value"] for r in whole.results(FAMILY)] == [r["p_value"] for r in merged.results(FAMILY)]


def test_n_tests_matches_results():
    for name in CAT_NAMES + NUM_NAMES:
        m = make(name, 1.0)
        f = fit_of(m).add(release(m, data(name, 3000), f"count-{name}"))
        assert f.n_tests == len(f.results(0.05)), name


def test_results_are_typed_and_keep_the_dict_shape():
    m = make("oue", 1.0)
    f = fit_of(m).add(release(m, data("oue", 3000), "typed-oue"))
    tests = f.results(0.01)
    assert all(isinstance(r, gof.FitResult) for r in tests)
    d = tests[0].to_dict()
    assert list(d) == ["test", "kind", "statistic", "df", "reference", "p_value", "alpha", "passed", "rows",
                       "impossible", "detail", "observed", "expected"]
    assert tests[0]["p_value"] == tests[0].p_value and tests[0].get("tested", True) is True and tests[0].tested
    verdict = f.result(0.01)
    assert [t["kind"] for t in verdict.to_dict()["tests"]] == ["ones-mean", "ones-histogram"]
    assert verdict.p_value == min(1.0, 2 * min(r.p_value for r in tests))
    frame = verdict.to_frame()  # one row per test of the combined verdict
    assert list(frame["kind"]) == ["ones-mean", "ones-histogram"]
    assert list(frame["p_value"]) == [r.p_value for r in tests] and frame["tested"].all()
    assert len(tests[0].to_frame()) == 1 and tests[0].to_frame().loc[0, "test"] == tests[0].test
    # hierarchy: every level's tests carry the level
    h = make("hierarchy", 1.0)
    levels = [r.extra["level"] for r in fit_of(h).add(release(h, data("hierarchy", 3000), "typed-h"))
              .results(0.01)]
    assert levels == sorted(levels) and set(levels) == {1, 2, 3}


def test_pearson_matches_scipy():
    """pearson_test on cells already above the pooling threshold is scipy.stats.chisquare."""
    probs = np.array([0.1, 0.2, 0.3, 0.4])
    counts = np.array([95, 230, 290, 385])
    x2, df, cells = gof.pearson_test(counts, probs)
    ref = stats.chisquare(counts, probs * counts.sum())
    assert cells == 4 and df == 3
    assert x2 == pytest.approx(ref.statistic, rel=1e-12)
    assert gof._chi2_sf(x2, df) == pytest.approx(ref.pvalue, rel=1e-9)


@pytest.mark.slow
@pytest.mark.parametrize("name", ["grr", "subset", "hadamard", "oue", "discrete-laplace"])
def test_false_alarm_rate_at_most_nominal(name):
    """300 independent releases (distinct PRF labels) of the same 3000 rows with zero-share
    categories or an empty half range: the share of releases whose column verdict rejects at
    5% is at most 5% + 4 binomial SEs (the hull reference is conservative by construction, the
    binomial bounds exact, Bonferroni conservative)."""
    R, n, alpha = 300, 3000, 0.05
    m = make(name, 1.0)
    x = data(name, n)
    rejected = 0
    for r in range(R):
        f = fit_of(m).add(release(m, x, f"null-{name}-{r}"))
        rejected += not f.result(alpha)["passed"]
    limit = alpha + 4 * math.sqrt(alpha * (1 - alpha) / R)
    assert rejected / R <= limit, (name, rejected)


def test_hadamard_zero_output_is_exactly_binomial():
    """P(y = 0) = 2 p*/K for every input (output 0 is in every value's half): the exact
    channel's column 0 is constant, and the test statistic is a count with that success rate."""
    m = HadamardResponse(1.0, CATS)
    Q = m.channel()
    assert np.allclose(Q[:, 0], 2 * m.p_star / m.K, rtol=1e-12)


def test_validate_catches_a_manifest_with_a_wrong_eps(tmp_path: Path, survey, ldpt) -> None:
    """A release whose manifest understates one column's eps (the spec rewritten from 1 to 0.25
    after the fact, with the extract untouched) fails the fit check; the true manifest passes."""
    from ldptransform.validate import validate

    out = survey["dir"] / "extract.parquet"
    res = ldpt("privatize", survey["csv"], "--policy", survey["policy"], "--key", survey["key"], "--out", out)
    assert res.returncode == 0, res.stderr
    mpath = survey["dir"] / "extract.manifest.json"
    good = {c.name: c.status for c in validate(out, mpath).checks}
    assert good["fit"] == "pass"
    m = json.loads(mpath.read_text())
    for c in m["columns"]:
        if c["name"] == "satisfaction":
            c["mechanism"]["epsilon"] = 0.25
    bad_path = tmp_path / "tampered.manifest.json"
    bad_path.write_text(json.dumps(m))
    checks = {c.name: c for c in validate(out, bad_path).checks}
    assert checks["fit"].status == "fail", checks["fit"].detail
    assert "satisfaction" in checks["fit"].detail
