"""Numeric distributions: the square-wave and hierarchy mechanisms, their decoders, and the
intervals of ``ldptransform.distribution``.

Release noise comes only from the keyed PRF under FIXED test keys and nonces, so every Monte
Carlo check is deterministic (it passes or fails the same way on every run).  numpy's
generator makes synthetic input data only (fixed seeds).  Tolerances are stated next to each
check.  The coverage studies of the intervals over repeated releases are in
tests/test_coverage.py.
"""

from __future__ import annotations

import json
import math
from statistics import NormalDist

from conftest import keyed_words, mechanism_of, realized_channel
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from scipy import stats

from ldptransform.distribution import Distribution, Interval, binned_distribution, frequency_covariance
from ldptransform.errors import PolicyError
from ldptransform.keys import SecretKey
from ldptransform.random import KeyedStream
from ldptransform.mechanisms import (
    CATEGORICAL,
    DEFAULT_DISTRIBUTION,
    DISTRIBUTION,
    GRR,
    NUMERIC,
    OLH,
    OUE,
    QUANTILE,
    DistributionMechanism,
    Hierarchy,
    SquareWave,
    SubsetSelection,
    build,
    choose_categorical,
    registry,
)
from ldptransform.mechanisms import distribution as dist_module
from ldptransform.policy import parse_policy

KEY = SecretKey(bytes(range(40, 72)))
NONCE = "5a5b5c5d5e5f60616263646566676869"
LDP_SLACK = 1.0 + 1e-9
PAY = (20000.0, 200000.0)


def prf_words(label: str, n: int, per_row: int, nonce: str = NONCE, start: int = 0) -> np.ndarray:
    return keyed_words(label, n, per_row, start, key=KEY, nonce=nonce, stream="test-distribution")


def pay_data(n: int, seed: int) -> np.ndarray:
    """Skewed synthetic pay (lognormal, median about 50000), clipped to PAY."""
    return np.clip(np.random.default_rng(seed).lognormal(math.log(50000.0), 0.45, n), *PAY)


def release_stats(m, x: np.ndarray, label: str, nonce: str = NONCE) -> np.ndarray:
    arrays = m.randomize(x, prf_words(label, len(x), m.words_per_row, nonce))
    assert m.count_invalid(arrays) == 0
    st = m.new_stats()
    m.add_stats(st, arrays)
    return st


def assert_eps_ldp(Q: np.ndarray, eps: float) -> float:
    np.testing.assert_allclose(Q.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert (Q > 0).all(), "an output possible for one input is impossible for another"
    ratio = float(np.max(Q.max(axis=0) / Q.min(axis=0)))
    assert ratio <= math.exp(eps) * LDP_SLACK
    return ratio


# --------------------------------------------------------------------------------------
# registry, specs, output columns
# --------------------------------------------------------------------------------------

def test_registry_and_exports():
    assert DISTRIBUTION == ("square-wave", "hierarchy")
    assert set(registry()) == set(CATEGORICAL) | set(NUMERIC) | set(DISTRIBUTION) | set(QUANTILE)
    assert {registry()[n].kind for n in DISTRIBUTION} == {"distribution"}
    assert DEFAULT_DISTRIBUTION in DISTRIBUTION


@pytest.mark.parametrize("m", [SquareWave(1.0, PAY), SquareWave(0.3, (0, 1), 8), Hierarchy(1.0, PAY),
                               Hierarchy(2.0, (-5, 5), 2, 32), Hierarchy(0.5, (0, 1), 16, 256)],
                         ids=lambda m: "-".join(str(v) for v in m.to_spec().values() if not isinstance(v, list)))
def test_spec_round_trip(m):
    spec = m.to_spec()
    again = build(json.loads(json.dumps(spec)))
    assert type(again) is type(m) and again.to_spec() == spec
    assert again.words_per_row == m.words_per_row
    for other in registry():
        if other != m.name:
            with pytest.raises(PolicyError):
                type(m).from_spec({**spec, "mechanism": other})


def test_bad_parameters_are_refused():
    for kwargs in ({"grid": 0}, {"grid": 5000}, {"grid": 2.5}):
        with pytest.raises(PolicyError):
            SquareWave(1.0, PAY, **kwargs)
    for args in ((1, 4), (4, 60), (4, 4096), (17, 289), (3, 2)):
        with pytest.raises(PolicyError):
            Hierarchy(1.0, PAY, *args)
    spec = Hierarchy(1.0, PAY, 4, 64).to_spec()
    spec["levels"][1]["oracle"] = "oue"
    with pytest.raises(PolicyError):
        build(spec)


def test_hierarchy_picks_the_lower_variance_oracle_per_level():
    """Same criterion as choose_categorical (total variance) among GRR and OLH; subset selection
    (at its best size) only where it beats both by more than 1% (docs/formulas.md section 24)."""
    for eps in (0.5, 1.0, 3.0):
        m = Hierarchy(eps, PAY, 4, 1024)
        for o, k in zip(m.oracles, m.nodes):
            cats = [str(v) for v in range(k)]
            g, h = GRR(eps, cats).total_variance(), OLH(eps, cats).total_variance()
            sv = SubsetSelection(eps, cats).total_variance()
            assert o.name == ("subset" if sv * 1.01 < min(g, h) else "grr" if g <= h else "olh")
            # OUE, left out, would gain at most about 1% over OLH
            assert OUE(eps, cats).total_variance() >= 0.98 * min(g, h)
        assert m.oracles[0].name == ("subset" if eps == 0.5 else "grr")   # 4 nodes: subset of 2 at eps 0.5
    assert [o.name for o in Hierarchy(1.0, PAY, 4, 256).oracles] == ["grr", "subset", "subset", "subset"]
    assert [o.name for o in Hierarchy(1.0, PAY, 4, 1024).oracles] == ["grr", "subset", "subset", "subset", "olh"]
    # the column-level chooser also has subset selection, which beats both at k = 16, eps = 1
    top = choose_categorical(1.0, [str(v) for v in range(16)])[0]
    assert top.name != "grr"
    assert top.total_variance() <= OLH(1.0, [str(v) for v in range(16)]).total_variance()


# --------------------------------------------------------------------------------------
# square wave: published formulas, exact channel, sampler
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("eps,b", [(0.5, 0.358155), (1.0, 0.256083), (2.0, 0.129337), (4.0, 0.030428)])
def test_square_wave_b_matches_the_published_formula(eps, b):
    """Z. Li, T. Wang, M. Lopuhaä-Zwakenberg, N. Li, B. Škorić, "Estimating Numerical
    Distributions under Local Differential Privacy", SIGMOD 2020: b = (eps E - E + 1) /
    (2E(E - 1 - eps)) [M+D], values from docs/formulas.md 7.1 [D] (6 decimals).  [D]: b maximizes
    ln(1+2b) + 2b p ln p + q ln q (p = E/(2bE+1), q = 1/(2bE+1))."""
    got = dist_module.square_wave_b(eps)
    assert got == pytest.approx(b, abs=1e-6)
    E = math.exp(eps)
    assert got == pytest.approx((eps * E - E + 1) / (2 * E * (E - 1 - eps)), rel=1e-12)

    def bound(bb: float) -> float:
        p, q = E / (2 * bb * E + 1), 1 / (2 * bb * E + 1)
        return math.log(1 + 2 * bb) + 2 * bb * p * math.log(p) + q * math.log(q)

    assert bound(got) > max(bound(got * 0.97), bound(got * 1.03))
    assert dist_module.square_wave_b(1e-4) == pytest.approx(0.5, abs=1e-4)   # b -> 1/2 as eps -> 0


@pytest.mark.parametrize("eps,N", [(0.5, 16), (1.0, 64), (3.0, 32), (8.0, 16)])
def test_square_wave_channel_is_the_discretized_published_density(eps, N):
    """Cell j's probability for grid input v_i is the integral of the published density
    (p within b of v_i, q = p/E elsewhere on [-b, 1+b]) over the cell, computed here
    independently from the cell edges; the realized (integer-mass) channel is within
    2^-48 of it, eps holds exactly on it, and the whole budget is used."""
    m = SquareWave(eps, (0.0, 1.0), N)
    b, E = m.b, math.exp(eps)
    p, q = E / (2 * b * E + 1), 1 / (2 * b * E + 1)
    e = m.cell_edges
    assert e[0] == pytest.approx(-b) and e[-1] == pytest.approx(1 + b) and np.all(np.diff(e) > 0)
    v = np.arange(N + 1) / N
    lo_, hi_ = np.maximum(e[None, :-1], v[:, None] - b), np.minimum(e[None, 1:], v[:, None] + b)
    inside = np.maximum(hi_ - lo_, 0.0)
    expect = q * np.diff(e)[None, :] + (p - q) * inside
    Q = m.channel()
    assert Q.shape == (N + 1, m.n_cells)
    np.testing.assert_allclose(Q, expect, rtol=0, atol=2.0 ** -48 + 1e-12)
    assert_eps_ldp(Q, eps)
    assert m.max_log_ratio() <= eps + 1e-9
    assert m.max_log_ratio() == pytest.approx(eps, abs=1e-6)


def test_square_wave_structured_products_equal_the_dense_channel():
    """EMS applies the channel through prefix sums; they must equal the dense matrix."""
    m = SquareWave(1.3, (0.0, 1.0), 40)
    chan = m._chan
    Q = chan.matrix()
    rng = np.random.default_rng(3)
    x = rng.dirichlet(np.ones(41), size=3).T          # (N+1, R)
    rho = rng.random((m.n_cells, 3))
    np.testing.assert_allclose(chan.forward(x), Q.T @ x, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(chan.back(rho), Q @ rho, rtol=1e-12, atol=1e-15)


def _realized_square_wave_channel(m) -> np.ndarray:
    """P(cell j | grid input i) as the sampler realizes it (bounds (0, 1) and a power-of-two grid
    make the grid points exact)."""
    assert (m.lo, m.hi) == (0.0, 1.0)
    return realized_channel(m.randomize_index, m.inputs, m.n_cells)


@pytest.mark.parametrize("eps,N", [(1.0, 32), (0.5, 64), (4.0, 16),
                                   # 2bN within 1e-11 of an integer: cells of probability ~1e-12
                                   (None, 64)])
def test_square_wave_sampler_realizes_the_exact_channel(eps, N):
    if eps is None:  # solve 2 b(eps) N = 17 + 1e-11 for eps by bisection
        lo_, hi_ = 0.1, 5.0
        for _ in range(200):
            mid = (lo_ + hi_) / 2
            if 2 * dist_module.square_wave_b(mid) * N > 17 + 1e-11:
                lo_ = mid
            else:
                hi_ = mid
        eps = lo_
        w = np.diff(SquareWave(eps, (0.0, 1.0), N).cell_edges)
        assert w.min() < 1e-9, "the case must contain near-empty cells"
    m = SquareWave(eps, (0.0, 1.0), N)
    P = _realized_square_wave_channel(m)
    assert np.array_equal(P, m.channel()), np.abs(P - m.channel()).max()
    assert_eps_ldp(P, eps)


def test_square_wave_random_rounding_between_grid_points():
    """An input between grid points v_i < v < v_{i+1} goes through (1-lam) Q[i] + lam Q[i+1];
    the empirical CDF of 50000 cell indices stays in the DKW band (failure probability 1e-6),
    and the band excludes the unmixed row Q[i] (the check can fail)."""
    m = SquareWave(1.0, (10.0, 30.0), 8)
    n = 50_000
    Q = m.channel()
    dkw = math.sqrt(math.log(2 / 1e-6) / (2 * n))
    i, lam = 3, 0.7
    x = np.full(n, 10.0 + (i + lam) * 20.0 / 8)
    idx = m.randomize_index(x, prf_words("sw-rounding", n, 2))
    emp = np.cumsum(np.bincount(idx, minlength=m.n_cells)) / n
    assert np.abs(emp - np.cumsum((1 - lam) * Q[i] + lam * Q[i + 1])).max() <= dkw
    assert np.abs(emp - np.cumsum(Q[i])).max() > 3 * dkw


def test_square_wave_output_column_and_alphabet():
    m = SquareWave(1.0, PAY, 16)
    x = pay_data(1000, 1)
    arrays = m.randomize(x, prf_words("sw-alpha", 1000, 2))
    assert [f.type for f in m.output_fields("pay")] == [pa.int32()] and arrays[0].type == pa.int32()
    assert m.count_invalid(arrays) == 0
    v = arrays[0].to_pylist()
    assert m.count_invalid([pa.array(v[:10] + [-1, m.n_cells, None], pa.int64())]) == 3
    assert m.count_invalid([pa.array([0.5, 1.0, None, float(m.n_cells)])]) == 3   # whole floats pass
    assert m.count_invalid([pa.array(["1", "2"])]) == 2
    st = m.new_stats()
    m.add_stats(st, arrays)
    m.add_stats(st, [pa.array(v[:5] + [None, -3], pa.int32())])   # invalid rows do not count
    assert st.sum() == 1005 and st.dtype == np.int64


# --------------------------------------------------------------------------------------
# hierarchy: level assignment, channel, per-level unbiasedness, consistency
# --------------------------------------------------------------------------------------

def test_hierarchy_levels_are_data_independent_and_uniform():
    m = Hierarchy(1.0, PAY, 4, 256)
    n = 80_000
    w = prf_words("levels", n, m.words_per_row)
    a = m.randomize(pay_data(n, 2), w)[0].to_numpy()
    b = m.randomize(np.full(n, PAY[0]), w)[0].to_numpy()
    c = m.randomize(np.full(n, PAY[1]), w)[0].to_numpy()
    assert np.array_equal(a, b) and np.array_equal(a, c)          # the data never moves a row's level
    w2 = w.copy()
    w2[:, 1:] ^= np.uint64(0x9E3779B97F4A7C15)                       # only word 0 decides the level
    assert np.array_equal(m.assign_levels(w2), a)
    counts = np.bincount(a, minlength=m.height + 1)[1:]
    assert counts.sum() == n
    assert stats.chisquare(counts).pvalue >= 1e-4
    assert np.all(np.abs(counts - n / m.height) <= 5 * math.sqrt(n * (1 / m.height) * (1 - 1 / m.height)))


# levels as the tool chose them at eps 1 before subset levels (specs of earlier releases)
OLD_LEVELS_16 = [{"nodes": 4, "oracle": "grr"}, {"nodes": 16, "oracle": "olh", "hash_range": 4}]
OLD_LEVELS_64 = OLD_LEVELS_16 + [{"nodes": 64, "oracle": "olh", "hash_range": 4}]


def test_hierarchy_channel_meets_eps_level_by_level():
    """Given the level (data-independent, written out) and, for OLH, the public seed, a row's
    report is the level oracle's channel applied to its node: eps holds for every (level,
    seed, report) and every pair of inputs (here all 16 leaves), and the budget is used."""
    m = Hierarchy(1.0, (0.0, 1.0), 4, 16, levels=OLD_LEVELS_16)   # the default now picks subset at 16 nodes
    assert [o.name for o in m.oracles] == ["grr", "olh"]
    leaves = np.arange(16)
    E = math.exp(1.0)
    grr = m.oracles[0]
    node1 = leaves // 4
    Q1 = grr.channel()[node1]                                        # (leaf, report)
    assert_eps_ldp(Q1, 1.0)
    olh = m.oracles[1]
    x = (leaves + 0.5) / 16
    words = prf_words("olh-seeds", 300, m.words_per_row).copy()
    words[:, 0] = np.uint64(1)                                        # level 2 for every row
    seeds = m.randomize(np.resize(x, 300), words)[2].to_numpy().astype(np.uint64)
    Q2 = olh.channel_given_seeds(seeds)                               # (seed, node, y)
    ratio = (Q2.max(axis=1) / Q2.min(axis=1)).max()
    assert ratio <= E * LDP_SLACK
    assert m.max_log_ratio() == pytest.approx(1.0, abs=1e-9)


def test_hierarchy_outputs_and_alphabet():
    m = Hierarchy(1.0, PAY, 4, 64, levels=OLD_LEVELS_64)     # grr/olh levels (subset levels: test_hierarchy_levels.py)
    n = 4000
    arrays = m.randomize(pay_data(n, 3), prf_words("h-alpha", n, m.words_per_row))
    assert [f.name for f in m.output_fields("pay")] == ["pay__level", "pay", "pay__hash"]
    assert m.count_invalid(arrays) == 0
    level = arrays[0].to_numpy()
    seeds = arrays[2].to_numpy()
    assert arrays[2].null_count == 0 and np.all((seeds == 0) == (level == 1))   # GRR level: seed 0
    assert m.count_invalid([arrays[0], arrays[1], pa.array(np.where(level == 1, 7, seeds))]) == int((level == 1).sum())
    assert m.count_invalid([arrays[0], arrays[1], pa.array(np.where(level == 2, 0, seeds))]) == int((level == 2).sum())
    bad_level = pa.array(np.where(np.arange(n) < 3, 9, level).astype(np.int8))
    assert m.count_invalid([bad_level, arrays[1], arrays[2]]) == 3
    rep = arrays[1].to_numpy().copy()
    rep[level == 1] = 4                                               # 4 nodes at level 1
    assert m.count_invalid([arrays[0], pa.array(rep), arrays[2]]) == int((level == 1).sum())
    st = release_stats(m, pay_data(4, 3), "h-tiny")
    assert math.isnan(m.decode(st, 4).quantile(0.5))                  # a level with < 2 rows: no answer
    assert math.isnan(m.decode(m.new_stats(), 0).range_ci(*PAY).estimate)
    grr_only = Hierarchy(3.0, PAY, 2, 8)
    assert [o.name for o in grr_only.oracles] == ["grr"] * 3
    assert len(grr_only.output_fields("x")) == 2 and grr_only.words_per_row == 3


def test_hierarchy_level_estimates_are_unbiased_within_5_se():
    """Each level's node shares, from that level's rows only, against (a) the true node
    shares of those same rows, with the exact per-node SE of the oracle (docs/formulas.md 0.3),
    and (b) the true shares of all rows, with the SE from frequency_covariance (which also
    counts the sampling of rows into levels).  Fixed key: deterministic."""
    m = Hierarchy(1.0, PAY, 4, 64)
    n = 120_000
    x = pay_data(n, 4)
    w = prf_words("unbiased", n, m.words_per_row)
    arrays = m.randomize(x, w)
    st = m.new_stats()
    m.add_stats(st, arrays)
    level = arrays[0].to_numpy()
    leaf = m.leaf_of(x)
    for l, (nl, est, cov) in enumerate(m.level_estimates(st)):
        o, k = m.oracles[l], m.nodes[l]
        node = leaf // (m.branching ** (m.height - l - 1))
        at = level == l + 1
        assert nl == int(at.sum())
        f_level = np.bincount(node[at], minlength=k) / nl
        se_exact = np.sqrt(o.variance(f_level) / nl)
        assert np.all(np.abs(est - f_level) <= 5 * se_exact), l
        f_all = np.bincount(node, minlength=k) / n
        se = np.sqrt(np.diag(cov))
        assert np.all(np.abs(est - f_all) <= 5 * se), l
        assert np.all(se >= se_exact * 0.97)                          # the sampling term only adds
        # the check has teeth: the raw support shares (not debiased) fail it
        raw = st[m._layout[l][0]: m._layout[l][0] + k] / nl
        assert np.any(np.abs(raw - f_all) > 5 * se), l


def test_constrained_inference_is_the_weighted_least_squares_tree():
    """Weighted averaging up + mean consistency down (Hay et al., PVLDB 2010, with each level
    weighted by its known variance) equals the direct constrained GLS solution, and keeps a
    consistent tree unchanged (hence the decoder is unbiased)."""
    m = Hierarchy(1.0, (0.0, 1.0), 3, 27)
    rng = np.random.default_rng(5)
    ys = [rng.normal(size=(k, 2)) for k in m.nodes]
    prec = np.array([5.0, 2.0, 0.7])
    got = m.consistent(ys, np.ones(2), prec)
    D = m.leaves
    A = [np.kron(np.eye(k), np.ones((1, D // k))) for k in m.nodes]
    H = sum(p * a.T @ a for p, a in zip(prec, A))
    KKT = np.block([[H, np.ones((D, 1))], [np.ones((1, D)), np.zeros((1, 1))]])
    for col in range(2):
        g = sum(p * a.T @ y[:, col] for p, a, y in zip(prec, A, ys))
        sol = np.linalg.solve(KKT, np.concatenate([g, [1.0]]))[:D]
        np.testing.assert_allclose(got[:, col], sol, atol=1e-12)
    theta = rng.dirichlet(np.ones(D))
    exact = [(a @ theta)[:, None] for a in A]
    np.testing.assert_allclose(m.consistent(exact, np.ones(1), prec)[:, 0], theta, atol=1e-14)
    # a level with no rows (precision 0) is simply left out
    np.testing.assert_allclose(m.consistent(exact, np.ones(1), np.array([0.0, 2.0, 0.7]))[:, 0], theta, atol=1e-14)


def test_hierarchy_decode_is_consistent_and_its_covariance_matches_the_release_spread():
    """The leaf covariance the decoder reports against the spread of the estimates over 150
    releases of the same rows (different nonces): the SE of a range share and of the CDF at
    the median agree within 20% (a 150-release SD is itself within about 12% at 2 SE)."""
    m = Hierarchy(1.0, PAY, 4, 64)
    n = 20_000
    x = pay_data(n, 6)
    med = float(np.median(x))
    ests, ses = [], []
    for r in range(150):
        d = m.decode(release_stats(m, x, "spread", f"{r:032x}"), n)
        assert d.mass.sum() == pytest.approx(1.0, abs=1e-12)
        ests.append([d.range_share(42500, 65000), d.cdf(med)])
        ses.append([d.range_ci(42500, 65000).se, d.cdf_se(med)])
    sd = np.std(np.asarray(ests, dtype=float), axis=0, ddof=1)
    mean_se = np.mean(np.asarray(ses, dtype=float), axis=0)
    assert np.all(np.abs(mean_se / sd - 1) <= 0.20), (mean_se, sd)


# --------------------------------------------------------------------------------------
# EMS
# --------------------------------------------------------------------------------------

def test_ems_recovers_a_smooth_distribution_from_its_expected_counts():
    """Noise-free input (counts = n x channel x truth, n = 1e6): EMS returns the truth up to
    its smoothing bias, small for a smooth density inside the bounds (normal, mean 0.35, SD
    0.12, on grid 256: L1 below 0.03, Kolmogorov distance below 0.01; measured 0.015 and
    0.004), while the uniform start is far from it.  (The bias is larger for a density that
    rises steeply from a bound: beta(2, 6) measured L1 0.045, Kolmogorov 0.017.)"""
    m = SquareWave(1.0, (0.0, 1.0), 256)
    truth = stats.norm.pdf(m.inputs, 0.35, 0.12)
    truth /= truth.sum()
    counts = 1e6 * m._chan.forward(truth[:, None])[:, 0]
    got = dist_module.ems(m._chan, counts[None, :])[0]
    assert np.abs(got - truth).sum() < 0.03
    assert np.abs(np.cumsum(got) - np.cumsum(truth)).max() < 0.01
    assert np.abs(np.full_like(truth, 1 / truth.size) - truth).sum() > 0.5


def test_ems_recovers_skewed_pay():
    """100000 rows of lognormal pay at eps = 1 (fixed key): the decoded CDF is within 0.02 of
    the rows' own CDF at every grid edge (Kolmogorov distance), the median within 1.5% and
    the mean within 1%.  (Measured when written: 0.014, largest near the lower bound where
    the clipped rows pile up and smoothing spreads them; median -0.14%; mean -0.06%.)"""
    m = SquareWave(1.0, PAY)
    n = 100_000
    x = pay_data(n, 8)
    d = m.decode(release_stats(m, x, "ems-pay"), n)
    assert np.all(d.mass >= 0) and d.mass.sum() == pytest.approx(1.0)
    e = d.edges
    emp = np.searchsorted(np.sort(x), e, side="left") / n
    ks = np.abs(d.cdf(e) - emp).max()
    assert ks < 0.02, ks
    assert abs(d.quantile(0.5) / np.median(x) - 1) < 0.015
    assert abs(d.mean() / x.mean() - 1) < 0.01
    flat = Distribution(e, np.full(len(e) - 1, 1 / (len(e) - 1)), method="flat", n=n)
    assert np.abs(flat.cdf(e) - emp).max() > 10 * 0.02                # the check can fail


# --------------------------------------------------------------------------------------
# Distribution: answers and interval constructions
# --------------------------------------------------------------------------------------

def test_distribution_answers_on_a_known_histogram():
    d = Distribution([0, 10, 20, 40], [0.2, 0.5, 0.3], method="known", n=10)
    assert d.cdf(0) == 0 and d.cdf(10) == pytest.approx(0.2) and d.cdf(15) == pytest.approx(0.45)
    assert d.cdf(-5) == 0 and d.cdf(99) == pytest.approx(1.0)
    np.testing.assert_allclose(d.cdf(np.array([5.0, 30.0])), [0.1, 0.85])
    assert d.quantile(0.45) == pytest.approx(15.0)
    assert d.quantile(0.0) == 0.0 and d.quantile(1.0) == pytest.approx(40.0)
    assert d.range_share(5, 30) == pytest.approx(0.75)
    assert d.mean() == pytest.approx(0.2 * 5 + 0.5 * 15 + 0.3 * 30)
    with pytest.raises(ValueError):
        d.range_share(3, 2)
    with pytest.raises(ValueError):
        d.quantile(1.5)
    with pytest.raises(ValueError):
        d.range_ci(0, 10)                                               # no SE, no replicates
    empty = Distribution([0, 1, 2], [np.nan, np.nan], method="none", n=0)
    assert math.isnan(empty.quantile(0.5)) and math.isnan(empty.quantile_ci(0.5).lo)


def test_quantile_of_a_non_monotone_cdf_is_its_rearrangement():
    """With negative bucket estimates the quantile is lo + measure{x : F(x) < q}; checked
    against a brute-force count on a fine grid."""
    d = Distribution([0, 1, 2, 3, 4, 5], [0.3, 0.25, -0.1, 0.35, 0.2], method="t", n=1)
    xs = np.linspace(0, 5, 500_001)
    F = d.cdf(xs)
    for q in (0.3, 0.5, 0.52, 0.9):
        assert d.quantile(q) == pytest.approx(5 * np.mean(F < q), abs=2e-5)


def test_cdf_test_inversion_solves_the_quadratic_exactly():
    """quantile_ci's interval against a brute-force scan of {x : |F(x) - q| <= z se(F(x))},
    both with a full covariance and with SEs at the edges only."""
    rng = np.random.default_rng(9)
    K = 12
    mass = rng.dirichlet(np.ones(K)) + rng.normal(0, 0.01, K)
    G = rng.normal(0, 0.01, (K, K))
    cov = G @ G.T
    edges = np.cumsum(np.concatenate([[3.0], rng.uniform(0.5, 2, K)]))
    prefix_se = np.sqrt(np.diag(np.cumsum(np.cumsum(cov, 0), 1)))
    z = NormalDist().inv_cdf(0.975)
    xs = np.linspace(edges[0], edges[-1], 200_001)
    for d in (Distribution(edges, mass, method="t", n=5, cov=cov, within="linear"),
              binned_distribution(edges, mass, prefix_se, n=5, within="linear")):
        F = np.asarray(d.cdf(xs))
        se = np.array([d.cdf_se(v) for v in xs[::50]])
        inside = np.abs(F[::50] - 0.5) <= z * se
        iv = d.quantile_ci(0.5)
        step = xs[50] - xs[0]
        assert iv.lo == pytest.approx(xs[::50][inside].min(), abs=step)
        assert iv.hi == pytest.approx(xs[::50][inside].max(), abs=step)
        assert iv.lo <= d.quantile(0.5) <= iv.hi
        assert "test inversion" in iv.method


def _histogram_of(values: np.ndarray, edges: np.ndarray, se: float) -> Distribution:
    """The exact bucket shares of ``values`` with a small diagonal covariance (se per bucket)."""
    K = len(edges) - 1
    j = np.clip(np.searchsorted(edges, values, side="right") - 1, 0, K - 1)
    mass = np.bincount(j, minlength=K) / len(values)
    return Distribution(edges, mass, method="t", n=len(values), cov=np.eye(K) * se * se)


@pytest.mark.parametrize("place", ["low", "high", "spike"])
def test_bucket_intervals_hold_whatever_the_shape_inside_a_bucket(place):
    """Where the rows sit inside a bucket is unknown to a histogram estimate.  Three columns with
    the same bucket shares (so the same estimates) but their values at the buckets' lower
    edges, just under their upper edges, or on one point inside: the default intervals hold
    the true quantiles, range shares and mean of each, while the linear reading (rows spread
    evenly) misses some of them, so the check can fail."""
    edges = np.array([0.0, 2.0, 4.0, 6.0, 8.0, 10.0])
    base = np.repeat([0.0, 2.0, 4.0, 6.0, 8.0], [150, 250, 300, 200, 100])
    x = {"low": base, "high": base + 1.999, "spike": base + 0.5}[place]
    d = _histogram_of(x, edges, se=1e-4)
    lin = Distribution(d.edges, d.mass, method="t", n=d.n, cov=d.cov, within="linear")
    missed = 0
    for q in (0.1, 0.25, 0.5, 0.75, 0.9):
        truth = float(np.quantile(x, q, method="inverted_cdf"))
        iv = d.quantile_ci(q)
        assert iv.lo <= truth <= iv.hi, (q, truth, iv)
        assert iv.lo <= iv.estimate <= iv.hi
        li = lin.quantile_ci(q)
        missed += not (li.lo <= truth <= li.hi)
    for a, b in ((1.0, 5.0), (0.0, 3.0), (2.5, 9.5), (2.0, 6.0)):
        truth = float(np.mean((x >= a) & (x < b)))
        iv = d.range_ci(a, b)
        assert iv.lo <= truth <= iv.hi, (a, b, truth, iv)
        li = lin.range_ci(a, b)
        missed += not (li.lo <= truth <= li.hi)
    m = d.mean_ci()
    assert m.lo <= float(x.mean()) <= m.hi, (x.mean(), m)
    assert d.cov is not None and m.se == pytest.approx(math.sqrt(d.cov.diagonal() @ (d.centers - 5.0) ** 2))
    lm = lin.mean_ci()
    missed += not (lm.lo <= float(x.mean()) <= lm.hi)
    assert missed >= 3, missed
    # ranges with both ends on edges keep the exact normal interval
    assert d.range_ci(2.0, 6.0).method.startswith("normal approximation")


def test_bucket_quantile_interval_is_the_run_of_significant_edges():
    """The quantile interval against a direct reading of its definition: from the last edge
    of the leading run of edges whose CDF + z SE is below q to the first edge of the trailing
    run whose CDF - z SE is above q (SEs at the edges from the covariance, and from prefix SEs)."""
    rng = np.random.default_rng(5)
    K = 16
    mass = rng.dirichlet(np.ones(K) * 2)
    G = rng.normal(0, 0.01, (K, K))
    cov = G @ G.T
    edges = np.cumsum(np.concatenate([[0.0], rng.uniform(0.5, 2, K)]))
    F = np.concatenate([[0.0], np.cumsum(mass)])
    s = np.concatenate([[0.0], np.sqrt(np.diag(np.cumsum(np.cumsum(cov, 0), 1)))])
    z = NormalDist().inv_cdf(0.975)
    for d in (Distribution(edges, mass, method="t", n=5, cov=cov), binned_distribution(edges, mass, s, n=5)):
        for q in (0.05, 0.1, 0.3, 0.5, 0.77, 0.95):
            iv = d.quantile_ci(q)
            j_lo = max(j for j in range(K + 1) if all(F[: j + 1] + z * s[: j + 1] < q))
            j_hi = min(j for j in range(K + 1) if all(F[j:] - z * s[j:] > q)) if F[-1] - z * s[-1] > q else K
            assert iv.lo == pytest.approx(min(edges[j_lo], d.quantile(q)))
            assert iv.hi == pytest.approx(max(edges[j_hi], d.quantile(q)))
            assert "whatever the shape inside a bucket" in iv.method


def test_binned_distribution_and_frequency_covariance():
    """Prefix SEs may be given with or without the empty prefix; without a covariance, a
    range that does not start at the lower bound gets the conservative sum of the two SEs
    (said in the method); with it, the exact SE.  frequency_covariance of GRR equals the
    per-row variance the categorical decoder uses."""
    edges = [0, 1, 2, 3]
    f = np.array([0.2, 0.5, 0.3])
    se = np.array([0.01, 0.02, 0.0])
    a = binned_distribution(edges, f, se, n=100)
    b = binned_distribution(edges, f, np.concatenate([[0.0], se]), n=100)
    assert a.cdf_se(1.0) == b.cdf_se(1.0) == pytest.approx(0.01)
    r = a.range_ci(1, 2)
    assert r.se == pytest.approx(0.03) and "conservative" in r.method
    assert a.range_ci(0, 2).se == pytest.approx(0.02)
    m = GRR(1.0, ["a", "b", "c", "d"])
    s = np.array([300, 250, 200, 250])
    n = 1000
    cov = frequency_covariance(m.p_star, m.q_star, n, s)
    p, q = m.p_star, m.q_star
    total = (s - n * q) / (p - q)
    sq = (s * (1 - q) ** 2 + (n - s) * q ** 2) / (p - q) ** 2
    np.testing.assert_allclose(np.diag(cov), (sq - total ** 2 / n) / (n - 1) / n, rtol=1e-12)
    assert np.all(cov[~np.eye(4, dtype=bool)] < 0)                    # GRR: negatively correlated
    c = binned_distribution(np.arange(5.0), total / n, np.zeros(4), cov=cov, n=n)
    w = np.array([0, 1, 1, 0])
    assert c.range_ci(1, 3).se == pytest.approx(math.sqrt(w @ cov @ w)) and "exact" in c.range_ci(1, 3).method
    assert isinstance(c.range_ci(1, 3), Interval) and set(c.range_ci(1, 3).as_dict()) >= {"estimate", "lo", "hi"}


def test_square_wave_states_no_interval_and_says_why():
    """EMS's smoothing bias has no bound, so the decoded distribution gives point estimates
    only: every interval is NaN, with no SE, and its method says why and what to use instead."""
    m = SquareWave(1.0, PAY, 64)
    n = 5000
    d = m.decode(release_stats(m, pay_data(n, 10), "boot"), n)
    for iv in (d.quantile_ci(0.5), d.range_ci(40000, 60000), d.mean_ci()):
        assert math.isfinite(iv.estimate) and math.isnan(iv.lo) and math.isnan(iv.hi) and iv.se is None
        assert iv.method.startswith("no interval") and "cannot be bounded" in iv.method
        assert "release the column with hierarchy or bins" in iv.method
    assert d.quantile_ci(0.5).estimate == d.quantile(0.5)


def test_square_wave_study_bootstrap_is_reproducible():
    """The bootstrap kept for the coverage study: the same statistics give the same interval."""
    m = SquareWave(1.0, PAY, 64)
    n = 5000
    st = release_stats(m, pay_data(n, 10), "boot")
    a = m.decode(st, n, study_replicates=40).quantile_ci(0.5)
    b = m.decode(st.copy(), n, study_replicates=40).quantile_ci(0.5)
    assert (a.lo, a.hi) == (b.lo, b.hi) and a.lo < a.estimate < a.hi
    assert "Philox" in a.method and "coverage study only" in a.method
    st2 = st.copy()
    st2[0] += 1
    st2[-1] -= 1
    c = m.decode(st2, n, study_replicates=40).quantile_ci(0.5)
    assert (c.lo, c.hi) != (a.lo, a.hi)                              # other statistics, other draws


# --------------------------------------------------------------------------------------
# policy and release
# --------------------------------------------------------------------------------------

def _policy(**pay) -> dict:
    return {"budget": {"epsilon_per_row": 5.0},
            "columns": {"pay": {"type": "numeric", "bounds": list(PAY), "epsilon": 1.0, **pay}}}


def test_policy_resolves_the_distribution_mechanisms():
    rc = parse_policy(_policy(needs=["quantiles"]), "t").by_name["pay"]
    assert mechanism_of(rc).name == DEFAULT_DISTRIBUTION and "quantiles" in (rc.chosen_because or "")
    rc = parse_policy(_policy(needs=["mean", "quantiles"], leaves=256), "t").by_name["pay"]
    assert mechanism_of(rc).to_spec()["leaves"] == 256
    with pytest.raises(PolicyError, match=r"grid applies to mechanism square-wave only.*automatic choice.*"
                                          r"mechanism: square-wave"):
        parse_policy(_policy(needs=["quantiles"], grid=128), "t")
    rc = parse_policy(_policy(needs=["quantiles"], mechanism="square-wave", grid=128), "t").by_name["pay"]
    assert mechanism_of(rc).to_spec()["grid"] == 128
    assert mechanism_of(parse_policy(_policy(needs=["mean"]), "t").by_name["pay"]).name in NUMERIC
    assert mechanism_of(parse_policy(_policy(), "t").by_name["pay"]).name in NUMERIC
    rc = parse_policy(_policy(mechanism="hierarchy", branching=8, leaves=512), "t").by_name["pay"]
    h = mechanism_of(rc)
    assert isinstance(h, Hierarchy) and (h.branching, h.leaves) == (8, 512)
    rc = parse_policy(_policy(mechanism="square-wave", needs=["mean"]), "t").by_name["pay"]
    assert mechanism_of(rc).name == "square-wave"
    # a policy without the new fields keeps its hash (None fields are not written)
    assert "needs" not in json.dumps(parse_policy(_policy(), "t").policy.canonical())


@pytest.mark.parametrize("fields,match", [
    ({"mechanism": "hierarchy", "leaves": 60}, "power of branching"),
    ({"mechanism": "square-wave", "leaves": 64}, "leaves applies to mechanism hierarchy only"),
    ({"branching": 4}, "branching applies to mechanism hierarchy only"),
    ({"mechanism": "hierarchy", "grid": 64}, "grid does not apply"),
    ({"mechanism": "hierarchy", "branching": 1}, "branching"),
    ({"mechanism": "hierarchy", "leaves": 4096}, "leaves"),
    ({"needs": ["mean", "mean"]}, "twice"),
    ({"needs": []}, "needs"),
    ({"needs": ["median"]}, "needs"),
    ({"mechanism": "squarewave"}, "square-wave, hierarchy"),
])
def test_policy_refuses_misused_distribution_fields(fields, match):
    with pytest.raises(PolicyError, match=match):
        parse_policy(_policy(**fields), "t")


def test_bins_with_a_distribution_mechanism_is_refused():
    pol = {"budget": {"epsilon_per_row": 5.0},
           "columns": {"pay": {"type": "numeric", "bins": [0, 1, 2], "epsilon": 1.0, "mechanism": "hierarchy"}}}
    with pytest.raises(PolicyError, match="randomizes numbers"):
        parse_policy(pol, "t")


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_release_writes_reports_that_decode_to_the_same_statistics(tmp_path, fmt):
    """Through the whole release (policy, encoding, PRF, writer): the extract's columns are
    the mechanisms' output columns with a stated meaning, every value is in the alphabet, and
    the statistics read back from the file equal those of the same reports made directly."""
    import pandas as pd

    from ldptransform.policy import load_policy
    from ldptransform.release import privatize

    n = 3000
    rng = np.random.default_rng(12)
    df = pd.DataFrame({"pay": pay_data(n, 12), "hours": rng.uniform(-5, 75, n)})
    raw = tmp_path / "raw.csv"
    df.to_csv(raw, index=False)
    pol = {"budget": {"epsilon_per_row": 2.0}, "columns": {
        "pay": {"type": "numeric", "bounds": list(PAY), "epsilon": 1.0, "mechanism": "hierarchy", "leaves": 64},
        "hours": {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "needs": ["quantiles"],
                  "mechanism": "square-wave"}}}
    (tmp_path / "p.json").write_text(json.dumps(pol))
    out = tmp_path / f"x.{fmt}"
    res = privatize(raw, load_policy(tmp_path / "p.json"), KEY, out, nonce=NONCE)
    entries = {c.name: c for c in res.manifest.columns}
    assert [o.name for o in entries["pay"].outputs] == ["pay__level", "pay__subset", "pay"]   # eps 1: subset levels
    assert [o.name for o in entries["hours"].outputs] == ["hours"]
    assert "not an estimate" in entries["hours"].outputs[0].meaning
    assert "independent of the data" in entries["pay"].outputs[0].meaning
    if fmt == "parquet":
        table = pq.read_table(out)
    else:
        types = {"pay__level": pa.int8(), "pay": pa.int32(), "pay__subset": pa.string(), "hours": pa.int32()}
        table = pacsv.read_csv(out, convert_options=pacsv.ConvertOptions(column_types=types))
    for name, x in (("pay", df["pay"].to_numpy()), ("hours", np.clip(df["hours"].to_numpy(), 0, 70))):
        spec = entries[name].mechanism
        assert spec is not None
        m = build(spec)
        assert isinstance(m, DistributionMechanism)
        arrays = [table.column(o.name) for o in entries[name].outputs]
        assert m.count_invalid(arrays) == 0
        got = m.new_stats()
        m.add_stats(got, arrays)
        words = KeyedStream(KEY, NONCE, "column", name).words(0, n, m.words_per_row)
        want = m.new_stats()
        m.add_stats(want, m.randomize(x, words))
        assert np.array_equal(got, want), name
        assert m.decode(got, n).quantile(0.5) > 0
