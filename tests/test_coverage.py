"""Coverage of the 95% intervals of quantiles and range shares, route by route.

Each study releases the same rows many times (release noise from the keyed PRF under the fixed
key of ``coverage_tools``, one nonce per release: every run draws the same reports, so every check
passes or fails the same way) and counts how often the interval holds the truth of those rows.
Data: ``coverage_tools.SHAPES``: a heavy right tail, a point mass at 0, discrete counts (numpy's
seeded generator), and ``mdvis`` of the RAND Health Insurance Experiment data shipped with
statsmodels (``statsmodels.datasets.randhie``).  The full grid (every route, shape, n in {20000,
200000}, eps in {0.5, 1, 2, 4}) is ``benchmarks/bench_coverage.py``; here a sample of it.

Tolerances.  A pooled coverage (all quantiles, or all ranges, of several configurations) must be
at least 0.93 - ``tolerance``: 3 binomial SEs of a 95% coverage counted over the releases only
(the statistics of one release are correlated, so they are not counted as independent trials).
A single cell (one statistic in one configuration) must not fall below the coverage at which
more misses than its releases show would happen with probability 1e-4 under a true 95%
(``cell_floor``): it catches one broken configuration that the pooled figure would hide.  Each
test also shows that it can fail: the same intervals made half as wide (each side halved around
the estimate) fall below the band.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import coverage_tools as ct
from coverage_tools import Coverage
from ldptransform.distribution import Distribution, binned_distribution
from ldptransform.results import QuantileResult, RangeResult
from ldptransform.mechanisms import DEFAULT_DISTRIBUTION, default_distribution

EPS = (0.5, 1.0, 2.0, 4.0)
BAND_LOW = 0.93


def cell_floor(releases: int) -> float:
    """Lowest coverage of one cell accepted: misses beyond the 1 - 1e-4 quantile of Binomial(R, 0.05)."""
    return 1.0 - float(stats.binom.isf(1e-4, releases, 0.05)) / releases


def assert_covers(results: list[Coverage]) -> dict[str, float]:
    """Pooled quantile and range coverage at least 0.93 - tolerance, every cell above its floor,
    and the half-as-wide intervals below the band; returns the pooled figures."""
    q, rel = ct.pooled(results, "q")
    r, _ = ct.pooled(results, "r")
    q_half, _ = ct.pooled(results, "q", half=True)
    r_half, _ = ct.pooled(results, "r", half=True)
    low = BAND_LOW - ct.tolerance(rel)
    where = [(c.shape, c.n, c.eps) for c in results]
    assert q >= low, (q, low, where)
    assert r >= low, (r, low, where)
    for c in results:
        floor = cell_floor(c.releases)
        assert c.q_cover.min() >= floor, (c.shape, c.n, c.eps, c.q_cover.tolist(), floor)
        assert c.r_cover.min() >= floor, (c.shape, c.n, c.eps, c.r_cover.tolist(), floor)
    # the check can fail: intervals half as wide miss far more often
    assert min(q_half, r_half) < low, (q_half, r_half, low)
    return {"q": q, "r": r, "q_half": q_half, "r_half": r_half, "low": low}


def linear_reading(d: Distribution) -> Distribution:
    """The same estimates with the rows read as spread evenly inside each bucket."""
    return Distribution(d.edges, d.mass, method=d.method, n=d.n, cov=d.cov, cdf_se=d.cdf_se_edges,
                        within="linear")


# --------------------------------------------------------------------------------------
# hierarchy (default parameters: branching 4, 64 leaves)
# --------------------------------------------------------------------------------------

# (shape, rows, eps, releases): every shape, every eps, three at 200000 rows
HIERARCHY_GRID = [("heavy-tail", 20000, 0.5, 60), ("zeros", 20000, 1.0, 60), ("counts", 20000, 4.0, 60),
                  ("randhie", 20190, 2.0, 60), ("heavy-tail", 200000, 2.0, 20), ("zeros", 200000, 4.0, 20),
                  ("counts", 200000, 0.5, 20)]


@pytest.fixture(scope="module")
def hierarchy_results() -> list[Coverage]:
    return [ct.measure("hierarchy", s, n, e, R) for s, n, e, R in HIERARCHY_GRID]


def test_hierarchy_intervals_cover_on_skewed_spiky_and_discrete_data(hierarchy_results):
    """Quantiles 0.1, 0.25, 0.5, 0.75, 0.9 and four range shares per shape (two with both ends on
    leaf edges, two with ends inside leaves), 300 releases in all (about 8 s).  Measured: pooled
    quantile coverage 0.993, ranges 0.965; half as wide 0.54 and 0.64."""
    got = assert_covers(hierarchy_results)
    assert got["q"] >= 0.97 and got["r"] >= 0.95, got   # measured: conservative (intervals reach leaf edges)
    # what the tool says of them (it quotes 99-100% for quantiles, 95-96% for ranges between leaf edges)
    assert all("hold whatever the shape inside a leaf" in m for c in hierarchy_results for m in c.d_methods)
    # the ranges with an end inside a leaf are the ones whose interval reaches the leaf edges
    assert all(list(c.r_edges) == [True, True, False, False] for c in hierarchy_results
               if c.shape in ("zeros", "counts"))


def test_hierarchy_linear_reading_would_under_cover_discrete_data():
    """The same releases with the intervals read linearly within leaves (rows assumed spread
    evenly, the old default) miss the truth of integer counts far more often than 5% (measured:
    pooled quantile coverage 0.48): what the edge-reaching intervals repair."""
    res = [ct.measure("hierarchy", s, n, e, 30, reread=linear_reading)
           for s, n, e in (("counts", 20000, 1.0), ("randhie", 20190, 2.0))]
    q, rel = ct.pooled(res, "q")
    assert q < BAND_LOW - ct.tolerance(rel), q


# --------------------------------------------------------------------------------------
# bins: through every frequency oracle that takes a binned column
# --------------------------------------------------------------------------------------

def test_every_binned_oracle_is_studied():
    assert set(ct.binned_oracles()) >= {"grr", "oue", "olh", "sue", "hadamard", "subset"}
    assert "matrix" not in ct.binned_oracles()          # refuses bins: (its matrix is for categories)


@pytest.mark.parametrize("oracle", ct.binned_oracles())
def test_bins_intervals_cover_through_each_oracle(oracle):
    """Every shape at 20000 rows (randhie at its 20190) and one at 200000, each oracle on its own
    rotation of eps over the grid; 40 releases (12 at 200000 rows), under 2 s per oracle.  Bins
    are the ones a steward would give each shape (``coverage_tools.SHAPES``): integers sit on
    the lower edges of theirs, zeros at the lower edge of the first.  Measured: pooled quantile
    coverage 0.997-0.999, ranges 0.974-0.987 over the oracles; read linearly within bins, the
    quantiles of the zeros and the counts 0.34-0.57."""
    i = ct.binned_oracles().index(oracle)
    grid = [(s, n, EPS[(i + j) % 4], R) for j, (s, n, R) in enumerate(
        [("heavy-tail", 20000, 40), ("zeros", 20000, 40), ("counts", 20000, 40), ("randhie", 20190, 40),
         (("zeros", "counts", "heavy-tail")[i % 3], 200000, 12)])]
    res = [ct.measure("bins:" + oracle, s, n, e, R) for s, n, e, R in grid]
    got = assert_covers(res)
    assert got["q"] >= 0.97, got                          # measured: conservative (intervals reach bin edges)
    assert all("intervals hold whatever the values inside a bin" in m for c in res for m in c.d_methods)
    lin = [ct.measure("bins:" + oracle, s, n, e, 20, reread=linear_reading) for s, n, e, _ in grid[1:3]]
    q_lin, rel = ct.pooled(lin, "q")
    assert q_lin < BAND_LOW - ct.tolerance(rel), q_lin    # the linear reading inside a bin misses


def test_harness_truth_and_edges():
    """The harness's truth is the inverse of the rows' CDF, its ranges have the stated ends."""
    x = np.array([0.0, 0.0, 0.0, 1.0, 2.0, 2.0, 5.0, 9.0, 9.0, 9.0])
    q, r = ct.truth(x, (0.1, 0.3, 0.31, 0.5, 0.9), ((0.0, 1.0), (0.5, 2.5)))
    assert q.tolist() == [0.0, 0.0, 1.0, 2.0, 9.0]
    assert r.tolist() == [0.3, 0.3]
    for s in ct.SHAPES.values():
        x = s.data(2000)
        assert x.min() >= s.bounds[0] and x.max() <= s.bounds[1]
        assert s.bins[0] == s.bounds[0] and s.bins[-1] == s.bounds[1]
    assert ct.SHAPES["randhie"].data(20190).size == 20190
    assert np.mean(ct.randhie_mdvis() == 0) == pytest.approx(0.3124, abs=1e-4)   # the dataset's 31% zeros
    assert ct.randhie_mdvis().max() == 77


# --------------------------------------------------------------------------------------
# smooth pay: the median and one range (both ends on bucket edges) over many releases
# --------------------------------------------------------------------------------------

PAY_RANGE = 0                      # index of [42500, 65000) in SHAPES["pay"].ranges: edges of 16 bins and 64 leaves


def test_hierarchy_interval_coverage():
    """300 releases of 20000 pay rows, hierarchy B = 4, 64 leaves, eps = 1 (about 5 s)."""
    c = ct.measure("hierarchy", "pay", 20000, 1.0, 300, quantiles=(0.5,))
    assert ct.SHAPES["pay"].ranges[PAY_RANGE] == (42500.0, 65000.0) and c.r_edges[PAY_RANGE]
    low = BAND_LOW - ct.tolerance(300)
    assert c.q_cover[0] >= low, c.q_cover               # reaches the leaf edges: conservative (measured 1.0)
    assert low <= c.r_cover[PAY_RANGE] <= 0.99, c.r_cover
    assert c.r_half[PAY_RANGE] / 300 < low, c.r_half


def _prefix_only(d: Distribution) -> Distribution:
    """The same bin estimates with the SEs of the prefix sums only (no covariance)."""
    assert d.cov is not None
    prefix_se = np.sqrt(np.maximum(np.diag(np.cumsum(np.cumsum(d.cov, 0), 1)), 0.0))
    return binned_distribution(d.edges, d.mass, prefix_se, n=d.n)


def test_bins_interval_coverage():
    """200 releases of the same rows cut into 16 equal bins and released through the categorical
    oracle the tool picks (subset selection at eps = 1, k = 16); prefix SEs and covariance from
    the per-row co-support counts, as binned_distribution's docstring describes (about 3 s)."""
    c = ct.measure("bins:auto", "pay", 20000, 1.0, 200, quantiles=(0.5,))
    low = BAND_LOW - ct.tolerance(200)
    assert c.q_cover[0] >= low, c.q_cover              # the median's interval reaches its bin's edges
    assert low <= c.r_cover[PAY_RANGE] <= 0.99, c.r_cover
    assert c.r_half[PAY_RANGE] / 200 < low, c.r_half
    p = ct.measure("bins:auto", "pay", 20000, 1.0, 200, quantiles=(0.5,), reread=_prefix_only)
    assert p.q_cover[0] >= low, p.q_cover
    assert p.r_cover[PAY_RANGE] >= 0.95, p.r_cover     # the SE bound for an interior range: conservative


# --------------------------------------------------------------------------------------
# square-wave: the bootstrap intervals it once gave, and why it gives none now
# --------------------------------------------------------------------------------------
# EMS smooths; the parametric bootstrap around its answer measures the noise, not the smoothing
# bias.  These studies re-measure that bootstrap (SquareWave.decode(study_replicates=...)): it
# holds on smooth data and fails on spikes and counts, so a release states no interval at all.

SW_PAY = {20000: 30, 100000: 20}   # rows: releases (100 bootstrap redraws each, eps 1)


@pytest.fixture(scope="module")
def square_wave_pay() -> dict[int, Coverage]:
    return {n: ct.measure("square-wave", "pay", n, 1.0, R, quantiles=(0.5,)) for n, R in SW_PAY.items()}


@pytest.mark.slow
def test_square_wave_bootstrap_coverage_at_20000_rows(square_wave_pay):
    """Smooth pay, where EMS's smoothing is harmless: 30 releases of 20000 rows, grid 256, 100
    bootstrap redraws, bias-aware intervals; the median and the share in [42500, 65000) in the
    band (measured: 0.93 and 1.0).  About 20 s."""
    c = square_wave_pay[20000]
    low = BAND_LOW - ct.tolerance(c.releases)
    assert c.q_cover[0] >= low, c.q_cover
    assert c.r_cover[PAY_RANGE] >= low, c.r_cover


@pytest.mark.slow
def test_square_wave_bootstrap_coverage_at_100000_rows(square_wave_pay):
    """The same at 100000 rows, 20 releases (measured: median 1.0, range 1.0; the smoothing bias
    grows against the noise with the rows, which the bias-aware interval absorbs here).  The
    intervals made half as wide fall below the band pooled over both sizes.  About 20 s."""
    c = square_wave_pay[100000]
    low = BAND_LOW - ct.tolerance(c.releases)
    assert c.q_cover[0] >= low, c.q_cover
    assert c.r_cover[PAY_RANGE] >= low, c.r_cover
    both = list(square_wave_pay.values())
    rel = sum(x.releases for x in both)
    half = sum(int(x.q_half[0] + x.r_half[PAY_RANGE]) for x in both) / (2 * rel)
    assert half < BAND_LOW - ct.tolerance(rel), half


@pytest.mark.slow
def test_square_wave_bootstrap_under_covers_spiky_and_discrete_data():
    """Where the rows are a spike (40% zeros) or integers, EMS smooths the spike away and its
    bootstrap intervals, which only measure the noise around that smoothed answer, miss the truth
    far more often than 5%: 10 releases of 20000 rows each at eps 1 (measured: pooled quantile
    coverage about 0.5; the 10th percentile of the zeros, 0, never inside).  This is why a
    release states no square-wave interval (next test).  About 12 s."""
    res = [ct.measure("square-wave", s, 20000, 1.0, 10) for s in ("zeros", "counts")]
    q, rel = ct.pooled(res, "q")
    assert q < BAND_LOW - ct.tolerance(rel), q
    zeros = res[0]
    assert zeros.quantiles[0] == 0.1 and zeros.q_cover[0] <= 0.2, zeros.q_cover


def test_a_square_wave_release_states_no_interval_and_says_why(tmp_path):
    """Through the partner's estimate on a zero-spiked column: quantiles, ranges and the mean
    come with estimates but no SE and no interval (None in the JSON shape), and each says why
    and which routes give intervals that hold."""
    from ldptransform import estimate, load_policy, privatize
    from ldptransform.keys import SecretKey

    sh = ct.SHAPES["zeros"]
    x = sh.data(20000, 3)  # synthetic input data only
    src = tmp_path / "raw.parquet"
    pd.DataFrame({"v": x}).to_parquet(src, index=False)
    pol = tmp_path / "p.yaml"
    pol.write_text(f"budget: {{epsilon_per_row: 1}}\nunlisted: drop\ncolumns:\n  v: {{type: numeric, bounds: "
                   f"[{sh.bounds[0]}, {sh.bounds[1]}], epsilon: 1, needs: [quantiles], mechanism: square-wave}}\n")
    out = tmp_path / "x.parquet"
    privatize(src, load_policy(pol), SecretKey(bytes(range(32))), out, nonce="7" * 32)
    res = estimate(out, ranges=[("v", sh.bounds[0], 8.0)])
    d = res.columns["v"].distribution
    assert d is not None and d.quantiles and d.ranges
    stats: list[QuantileResult | RangeResult] = [*d.quantiles, *d.ranges]
    for r in stats:
        assert r.estimate is not None and math.isfinite(r.estimate)
        assert r.se is None and r.ci_low is None and r.ci_high is None, r
        assert r.method is not None and r.method.startswith("no interval") and "cannot be bounded" in r.method
        assert "release the column with hierarchy or bins" in r.method
    json.dumps(res.to_dict(), allow_nan=False)                  # strict JSON: no NaN bounds


def test_quantiles_default_to_the_route_whose_intervals_hold():
    """`needs: [quantiles]` without a mechanism gets hierarchy, with the parameters studied above
    (square-wave's smoothing bias has no bound: see the test before), and its reason says why."""
    assert DEFAULT_DISTRIBUTION == "hierarchy"
    for eps, bounds in ((0.5, (0.0, 64.0)), (4.0, (20000.0, 200000.0))):
        m, why = default_distribution(eps, bounds)
        assert m.to_spec() == ct.route_mechanism("hierarchy", eps, bounds).to_spec()
        assert "square-wave" in why and "hierarchy" in why
