"""Checks of the mechanisms against published formulas and worked values.

Each test names the paper it checks and the status tag, in docs/formulas.md
(the project's reference sheet), of the formula or number it uses:
[S] seen in a source, [D] derived and checked numerically, [M] recalled from memory
(combinations such as [M+D] mean "recalled, then re-derived and simulated").  Table
values come from docs/formulas.md section 13 (all [D]) and are given there to 4 decimals,
so they are compared with an absolute tolerance of 5e-5.

Randomness comes only from the keyed PRF under a fixed test key, so every statistical
check is deterministic; numpy's generator only builds synthetic populations (fixed seed).
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import stats

from conftest import keyed_words
from ldptransform.keys import SecretKey
from ldptransform.mechanisms import GRR, OLH, OUE, SUE, Hybrid, Piecewise, TwoPoint

KEY = SecretKey(bytes(range(32)))
NONCE = "0f0e0d0c0b0a09080706050403020100"
TABLE_TOL = 5e-5  # docs/formulas.md section 13 prints 4 decimals
EPS_TABLE = (0.5, 1.0, 2.0, 4.0)


def words(label: str, n: int, per_row: int, start: int = 0) -> np.ndarray:
    return keyed_words(label, n, per_row, start, key=KEY, nonce=NONCE, stream="reference")


def cats(k: int) -> list[str]:
    return [f"v{i}" for i in range(k)]


# --------------------------------------------------------------------------------------
# GRR, SUE, OUE, OLH (Wang, Blocki, Li, Jha, USENIX Security 2017)
# --------------------------------------------------------------------------------------

GRR_TABLE = {  # n * Var at f = 0, docs/formulas.md section 13 [D]
    (0.5, 2): 3.9177, (0.5, 8): 18.1749, (0.5, 32): 75.2038, (0.5, 256): 607.4735,
    (1.0, 2): 0.9207, (1.0, 8): 2.9529, (1.0, 32): 11.0816, (1.0, 256): 86.9497,
    (2.0, 2): 0.1810, (2.0, 8): 0.3280, (2.0, 32): 0.9159, (2.0, 256): 6.4034,
    (4.0, 2): 0.0190, (4.0, 8): 0.0211, (4.0, 32): 0.0294, (4.0, 256): 0.1074,
}
OUE_TABLE = {0.5: 15.6708, 1.0: 3.6827, 2.0: 0.7241, 4.0: 0.0760}
SUE_TABLE = {0.5: 15.9169, 1.0: 3.9177, 2.0: 0.9207, 4.0: 0.1810}
OLH_INT_G_TABLE = {0.5: (3, 15.8174), 1.0: (4, 3.6917), 2.0: (8, 0.7246), 4.0: (56, 0.0760)}


@pytest.mark.parametrize("eps", EPS_TABLE)
@pytest.mark.parametrize("k", [2, 3, 8, 32, 256])
def test_grr_variance_matches_the_published_formulas(eps, k):
    """T. Wang, J. Blocki, N. Li, S. Jha, "Locally Differentially Private Protocols for
    Frequency Estimation", 26th USENIX Security Symposium, 2017.  Generalized randomized
    response keeps the value with probability E/(E+k-1), E = e^eps [M+D]; approximate
    n*Var (E+k-2)/(E-1)^2 [M+D]; exact n*Var adds f (k-2)/(E-1) [D] (docs/formulas.md 2.1);
    table values [D] (section 13)."""
    m = GRR(eps, cats(k))
    E = math.exp(eps)
    assert m.p_star == pytest.approx(E / (E + k - 1), rel=1e-14)
    assert m.q_star == pytest.approx(1 / (E + k - 1), rel=1e-14)
    assert m.approx_variance() == pytest.approx((E + k - 2) / (E - 1) ** 2, rel=1e-12)
    for f in (0.0, 0.1, 0.5, 1.0):
        exact = (E + k - 2) / (E - 1) ** 2 + f * (k - 2) / (E - 1)
        assert float(m.variance(f)) == pytest.approx(exact, rel=1e-12)
    if (eps, k) in GRR_TABLE:
        assert float(m.variance(0.0)) == pytest.approx(GRR_TABLE[eps, k], abs=TABLE_TOL)


@pytest.mark.parametrize("eps", EPS_TABLE)
def test_oue_and_sue_variances_match_the_published_formulas(eps):
    """T. Wang, J. Blocki, N. Li, S. Jha, "Locally Differentially Private Protocols for
    Frequency Estimation", USENIX Security 2017.  OUE: p = 1/2, q = 1/(E+1), approximate
    n*Var 4E/(E-1)^2 [M+D], exact adds + f [D].  SUE: p = e^(eps/2)/(e^(eps/2)+1),
    q = 1 - p, n*Var e^(eps/2)/(e^(eps/2)-1)^2 with no f term [M+D]/[D].  OUE <= SUE with
    ratio 4a/(a+1)^2, a = e^(eps/2) [D].  Table values [D] (docs/formulas.md section 13)."""
    E, a = math.exp(eps), math.exp(eps / 2)
    for k in (2, 5, 8):
        oue, sue = OUE(eps, cats(k)), SUE(eps, cats(k))
        assert (oue.p_star, oue.q_star) == pytest.approx((0.5, 1 / (E + 1)), rel=1e-14)
        assert (sue.p_star, sue.q_star) == pytest.approx((a / (a + 1), 1 / (a + 1)), rel=1e-14)
        for f in (0.0, 0.3, 1.0):
            assert float(oue.variance(f)) == pytest.approx(4 * E / (E - 1) ** 2 + f, rel=1e-12)
            assert float(sue.variance(f)) == pytest.approx(a / (a - 1) ** 2, rel=1e-12)
        assert oue.approx_variance() / sue.approx_variance() == pytest.approx(4 * a / (a + 1) ** 2, rel=1e-12)
        assert float(oue.variance(0.0)) == pytest.approx(OUE_TABLE[eps], abs=TABLE_TOL)
        assert float(sue.variance(0.0)) == pytest.approx(SUE_TABLE[eps], abs=TABLE_TOL)


@pytest.mark.parametrize("eps", EPS_TABLE)
def test_olh_variance_with_its_integer_hash_range(eps):
    """T. Wang, J. Blocki, N. Li, S. Jha, "Locally Differentially Private Protocols for
    Frequency Estimation", USENIX Security 2017.  OLH with g buckets: p* = E/(E+g-1),
    q* = 1/g, approximate n*Var (E-1+g)^2/((E-1)^2 (g-1)) [D]; the optimum over real g is
    E + 1, and an implementation must use an integer g and compute with it [M+D]
    (docs/formulas.md 2.4, section 14 item 5).  Our q* uses the exact collision probability of
    the hash family, which differs from 1/g by O(1/(2^31 - 1)), hence rel 1e-6 below.
    Table (integer g) values [D]; the table rounds e^eps and our g minimizes the variance
    over floor/ceil, which agree for eps = 0.5, 1, 2 (g = 3, 4, 8)."""
    m = OLH(eps, cats(16))
    E = math.exp(eps)
    g = m.g
    assert g in {math.floor(E) + 1, math.ceil(E) + 1}
    formula = (E - 1 + g) ** 2 / ((E - 1) ** 2 * (g - 1))
    assert m.approx_variance() == pytest.approx(formula, rel=1e-6)
    assert m.p_star == pytest.approx(E / (E + g - 1), rel=1e-14)
    assert m.q_star == pytest.approx(1 / g, rel=1e-6)
    table_g, table_v = OLH_INT_G_TABLE[eps]
    if eps < 4:
        assert g == table_g
    assert m.approx_variance() == pytest.approx(table_v, abs=TABLE_TOL)
    # the other integer candidate is never better
    other = ({math.floor(E) + 1, math.ceil(E) + 1} - {g}) or {g}
    for h in other:
        assert OLH(eps, cats(16), hash_range=h).approx_variance() >= m.approx_variance() * (1 - 1e-12)


@pytest.mark.parametrize("eps,threshold", [(0.5, 6.946), (1.0, 10.155), (2.0, 24.167), (4.0, 165.794)])
def test_grr_versus_oue_switch_point(eps, threshold):
    """T. Wang, J. Blocki, N. Li, S. Jha, "Locally Differentially Private Protocols for
    Frequency Estimation", USENIX Security 2017: GRR has the lower approximate variance
    iff k < 3e^eps + 2 [M+D]; the thresholds 6.946, 10.155, 24.167, 165.794 are [D]
    (docs/formulas.md 2.5 and section 13)."""
    assert 3 * math.exp(eps) + 2 == pytest.approx(threshold, abs=5e-4)
    below, above = math.floor(threshold), math.ceil(threshold)
    assert GRR(eps, cats(below)).approx_variance() < OUE(eps, cats(below)).approx_variance()
    assert GRR(eps, cats(above)).approx_variance() > OUE(eps, cats(above)).approx_variance()


def test_grr_output_counts_fit_the_published_channel():
    """T. Wang, J. Blocki, N. Li, S. Jha, "Locally Differentially Private Protocols for
    Frequency Estimation", USENIX Security 2017: GRR reports the true value w.p.
    E/(E+k-1) and each other value w.p. 1/(E+k-1) [M+D] (docs/formulas.md 2.1).  Pearson
    chi-square (scipy.stats.chisquare) of 20000 reports per input value against that
    row, computed here from the formula, not from the code.  Threshold: p >= 1e-3 for
    every input (fixed key: deterministic).  The same counts against the row for
    eps + 0.3 must be rejected (p < 1e-6), so the check can fail."""
    eps, k, n = 1.0, 6, 20_000
    m = GRR(eps, cats(k))

    def row(e: float, x: int) -> np.ndarray:
        E = math.exp(e)
        r = np.full(k, 1 / (E + k - 1))
        r[x] = E / (E + k - 1)
        return r

    for x in range(k):
        codes = m.randomize_codes(np.full(n, x, dtype=np.int64), words("gof-grr", n, m.words_per_row, x * n))
        counts = np.bincount(codes, minlength=k)
        assert counts.sum() == n
        assert stats.chisquare(counts, n * row(eps, x)).pvalue >= 1e-3
        assert stats.chisquare(counts, n * row(eps + 0.3, x)).pvalue < 1e-6


# --------------------------------------------------------------------------------------
# Randomized response (Warner, JASA 1965) is GRR with k = 2; the two-coin scheme
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("eps", [0.25, 1.0, math.log(3), 2.5])
def test_binary_randomized_response_is_grr_with_two_values(eps):
    """S. L. Warner, "Randomized Response: A Survey Technique for Eliminating Evasive
    Answer Bias", Journal of the American Statistical Association 60(309), 1965.
    Truth probability p = e^eps/(1+e^eps) [M+D]; the paper's estimator
    (lambda_hat - (1-p))/(2p-1) [S+D] equals the mean of our per-row estimates for every
    set of reports; fixed-data n*Var p(1-p)/(2p-1)^2 = e^eps/(e^eps-1)^2, no f term [D]
    (docs/formulas.md section 1)."""
    m = GRR(eps, ["yes", "no"])
    E = math.exp(eps)
    p = E / (1 + E)
    assert m.p_star == pytest.approx(p, rel=1e-14)
    np.testing.assert_allclose(m.channel(), [[p, 1 - p], [1 - p, p]], rtol=1e-14)
    for f in (0.0, 0.3, 1.0):
        assert float(m.variance(f)) == pytest.approx(p * (1 - p) / (2 * p - 1) ** 2, rel=1e-12)
        assert float(m.variance(f)) == pytest.approx(E / (E - 1) ** 2, rel=1e-12)
    x = (np.arange(999) % 3 == 0).astype(np.int64)  # codes: 0 = yes, 1 = no
    reports = m.randomize(x, words(f"binary-rr/{eps}", len(x), m.words_per_row))
    lam_hat = np.mean(np.asarray(reports[0].dictionary_decode().to_pylist()) == "yes")
    paper_estimate = (lam_hat - (1 - p)) / (2 * p - 1)
    assert m.row_estimates(reports)[:, 0].mean() == pytest.approx(paper_estimate, rel=1e-12, abs=1e-12)


def test_two_coin_scheme_is_grr_at_ln3():
    """Two-coin randomized response (common textbook practice, e.g. C. Dwork, A. Roth,
    "The Algorithmic Foundations of Differential Privacy", Foundations and Trends in
    Theoretical Computer Science, 2014): answer truthfully unless two fair coins both land
    heads, then lie.  Truth probability 3/4, worst-case ratio 3, eps = ln 3, fixed-data
    n*Var 0.75 [D] (docs/formulas.md section 1, check values).  p_star is compared to 3/4 up
    to one rounding (exp(ln 3) is not exactly 3 in floating point)."""
    # enumerate the four equally likely outcomes of two fair coins (1 = heads)
    truth = sum((Fraction(1, 4) for c1 in (0, 1) for c2 in (0, 1) if not (c1 and c2)), Fraction(0))
    assert truth == Fraction(3, 4)
    eps = math.log(truth / (1 - truth))
    assert eps == pytest.approx(1.098612, abs=5e-7)
    m = GRR(math.log(3), ["yes", "no"])
    assert m.p_star == pytest.approx(0.75, rel=2e-16, abs=0)
    np.testing.assert_allclose(m.channel(), [[0.75, 0.25], [0.25, 0.75]], rtol=1e-15)
    assert float(m.variance(0.3)) == pytest.approx(0.75, rel=1e-12)
    assert m.max_log_ratio() == pytest.approx(math.log(3), rel=1e-14)


def test_randomized_response_variance_with_sampling_monte_carlo():
    """S. L. Warner, "Randomized Response: A Survey Technique for Eliminating Evasive
    Answer Bias", JASA 60(309), 1965: with simple random sampling with replacement,
    n Var(pi_hat) = pi(1-pi) + p(1-p)/(2p-1)^2 [S+D]; at p = 3/4 (two-coin scheme, eps =
    ln 3) and pi = 0.3 this is 0.21 + 0.75 = 0.96 [D] (docs/formulas.md sections 0.4 and 1).

    Monte Carlo: a population of 1000 people, 300 of them 'yes'; 4000 independent surveys
    of n = 100 respondents each, drawn with replacement (numpy, fixed seed), every answer
    randomized by GRR(ln 3) through the keyed PRF (fixed key).  Checks: the mean of the
    4000 estimates is 0.3 within 5 standard errors; n times their sample variance is 0.96
    within 10% (the test asserts that 10% is at least 4 standard errors of the sample
    variance, computed from the exact fourth moment); and it exceeds the fixed-data value
    0.75 by more than 10%, so the sampling term is really measured."""
    pi, n, surveys = 0.3, 100, 4000
    population = np.zeros(1000, dtype=np.int64) + 1  # 1 = no
    population[:300] = 0                             # 0 = yes
    rng = np.random.default_rng(1965)
    x = population[rng.integers(0, population.size, size=(surveys, n))].ravel()
    m = GRR(math.log(3), ["yes", "no"])
    est = m.row_estimates(m.randomize(x, words("rr-sampling", x.size, m.words_per_row)))[:, 0]
    pi_hat = est.reshape(surveys, n).mean(axis=1)

    p = m.p_star
    target = pi * (1 - pi) + p * (1 - p) / (2 * p - 1) ** 2
    assert target == pytest.approx(0.96, abs=1e-12)
    # exact law of one per-row estimate: two values, P(report yes) = lam
    lam = p * pi + (1 - p) * (1 - pi)
    vals = np.array([(1 - (1 - p)) / (2 * p - 1), (0 - (1 - p)) / (2 * p - 1)]) - pi
    probs = np.array([lam, 1 - lam])
    mu2, mu4 = float(probs @ vals ** 2), float(probs @ vals ** 4)
    assert mu2 == pytest.approx(target, rel=1e-12)  # per-row second moment about pi
    var_mean2 = mu2 / n                                             # Var(pi_hat)
    mu4_mean = (mu4 + 3 * (n - 1) * mu2 ** 2) / n ** 3              # E (pi_hat - pi)^4
    se_s2 = math.sqrt((mu4_mean - var_mean2 ** 2 * (surveys - 3) / (surveys - 1)) / surveys)
    assert 0.10 * target / n >= 4 * se_s2

    assert abs(pi_hat.mean() - pi) <= 5 * math.sqrt(target / (n * surveys))
    measured = n * pi_hat.var(ddof=1)
    assert abs(measured - target) <= 0.10 * target, measured
    assert measured > 0.75 * 1.10, measured


# --------------------------------------------------------------------------------------
# The two-point mechanism (Duchi, Jordan, Wainwright, JASA 2018)
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("eps", EPS_TABLE)
def test_two_point_mechanism_matches_the_published_formulas(eps):
    """J. C. Duchi, M. I. Jordan, M. J. Wainwright, "Minimax Optimal Procedures for Locally
    Private Estimation", Journal of the American Statistical Association 113(521), 2018.
    Output +-C, C = (E+1)/(E-1), P(+C | t) = 1/2 + t(E-1)/(2(E+1)) [M+D]; exact
    Var = C^2 - t^2 [D]; table values at t = 0 and t = 1 [D] (docs/formulas.md 5.1, 13)."""
    E = math.exp(eps)
    C = (E + 1) / (E - 1)
    m = TwoPoint(eps, (-1.0, 1.0))
    np.testing.assert_allclose(m.outputs, [-C, C], rtol=1e-14)
    for i, t in enumerate(m.inputs):
        assert m.channel()[i, 1] == pytest.approx(0.5 + t * (E - 1) / (2 * (E + 1)), abs=1e-14)
    t = np.linspace(-1, 1, 41)
    np.testing.assert_allclose(m.variance(t), C ** 2 - t ** 2, rtol=1e-12)
    table = {0.5: (16.6708, 15.6708), 1.0: (4.6827, 3.6827), 2.0: (1.7241, 0.7241), 4.0: (1.0760, 0.0760)}
    assert float(m.variance(0.0)) == pytest.approx(table[eps][0], abs=TABLE_TOL)
    assert float(m.variance(1.0)) == pytest.approx(table[eps][1], abs=TABLE_TOL)
    # in column units the variance scales by ((hi - lo)/2)^2
    w = TwoPoint(eps, (100.0, 300.0))
    assert float(w.variance(250.0)) == pytest.approx((C ** 2 - 0.25) * 100.0 ** 2, rel=1e-12)


def test_two_point_frequency_of_plus_c_binomial():
    """J. C. Duchi, M. I. Jordan, M. J. Wainwright, JASA 2018 (as above):
    P(+C | t) = 1/2 + t(E-1)/(2(E+1)) [M+D], here at an input between the two ends
    (t = 0.3), so the random rounding to {-1, 1} is exercised.  Exact binomial test
    (scipy.stats.binomtest) of 40000 draws: p >= 1e-3; the probability for t = 0.4
    must be rejected (p < 1e-6)."""
    eps, n = 1.0, 40_000
    E = math.exp(eps)
    m = TwoPoint(eps, (0.0, 10.0))
    x = np.full(n, 6.5)  # t = 0.3
    out = m.randomize(x, words("binom-two-point", n, m.words_per_row))[0].to_numpy()
    plus = int((out > 5.0).sum())
    assert stats.binomtest(plus, n, 0.5 + 0.3 * (E - 1) / (2 * (E + 1))).pvalue >= 1e-3
    assert stats.binomtest(plus, n, 0.5 + 0.4 * (E - 1) / (2 * (E + 1))).pvalue < 1e-6


# --------------------------------------------------------------------------------------
# Piecewise and hybrid mechanisms (Wang, Xiao, Yang, Zhao, Hui, Shin, Shin, Yu, ICDE 2019)
# --------------------------------------------------------------------------------------

def pm_constants(eps: float) -> tuple[float, float, float, float]:
    a = math.exp(eps / 2)
    C = (a + 1) / (a - 1)
    high = (math.exp(eps) - a) / (2 * a + 2)
    return a, C, high, high / math.exp(eps)


def pm_window(eps: float, t: float) -> tuple[float, float]:
    _, C, _, _ = pm_constants(eps)
    left = (C + 1) / 2 * t - (C - 1) / 2
    return left, left + C - 1


def pm_cdf(eps: float, t: float, y: np.ndarray) -> np.ndarray:
    """CDF of the continuous piecewise mechanism's output for input t."""
    _, C, high, low = pm_constants(eps)
    left, right = pm_window(eps, t)
    y = np.clip(y, -C, C)
    inside = np.clip(np.minimum(y, right) - left, 0.0, None)
    return low * (y + C) + (high - low) * inside


@pytest.mark.parametrize("eps,grid", [(0.5, 16), (2.0, 32), (4.0, 64)])
def test_piecewise_is_an_exact_discretization_of_the_published_density(eps, grid):
    """N. Wang, X. Xiao, Y. Yang, J. Zhao, S. C. Hui, H. Shin, J. Shin, G. Yu, "Collecting
    and Analyzing Multidimensional Data with Local Differential Privacy", ICDE 2019.
    Density (e^eps - a)/(2a+2) on [l(t), r(t)] and that over e^eps elsewhere in [-C, C],
    a = e^(eps/2), C = (a+1)/(a-1), l(t) = (C+1)/2 t - (C-1)/2, r = l + C - 1 [M+D]
    (docs/formulas.md 5.2).  Our cells lie between consecutive window ends of the grid inputs,
    so for every grid input t_i and every window end y the channel mass of the cells below
    y equals the continuous CDF at y, to the channel's 2^-50 resolution (tolerance 1e-12)."""
    m = Piecewise(eps, (-1.0, 1.0), grid)
    _, C, _, _ = pm_constants(eps)
    ends = np.unique(np.concatenate([[-C, C]] + [np.array(pm_window(eps, t)) for t in m.inputs]))
    ends = np.clip(ends, -C, C)
    below = m.outputs[None, :] < ends[:, None]  # (ends, cells)
    for i, t in enumerate(m.inputs):
        np.testing.assert_allclose(below @ m.channel()[i], pm_cdf(eps, t, ends), rtol=0, atol=1e-12)
    assert m.outputs.min() > -C and m.outputs.max() < C


@pytest.mark.parametrize("eps", EPS_TABLE)
def test_piecewise_variance_matches_the_published_formula(eps):
    """N. Wang, X. Xiao, Y. Yang, J. Zhao, S. C. Hui, H. Shin, J. Shin, G. Yu, "Collecting
    and Analyzing Multidimensional Data with Local Differential Privacy", ICDE 2019:
    Var = t^2/(a-1) + (a+3)/(3(a-1)^2), a = e^(eps/2); worst case 4a/(3(a-1)^2) at |t| = 1
    [D] (docs/formulas.md 5.2; table values at t = 0, 1 [D], section 13).  Our discretization
    reports the cell midpoint (the conditional mean of the continuous output within the
    cell), so at grid points its variance is the continuous one minus the within-cell
    variance: never above it, and within 1% at grid 256.  Between grid points the random
    rounding adds a little; still within 1%."""
    a = math.exp(eps / 2)
    m = Piecewise(eps, (-1.0, 1.0), 256)
    t = np.linspace(-1.0, 1.0, 101)  # includes off-grid points
    cont = t ** 2 / (a - 1) + (a + 3) / (3 * (a - 1) ** 2)
    np.testing.assert_allclose(m.variance(t), cont, rtol=0.01)
    grid_t = m.inputs
    cont_grid = grid_t ** 2 / (a - 1) + (a + 3) / (3 * (a - 1) ** 2)
    assert np.all(m.variance(grid_t) <= cont_grid * (1 + 1e-9))
    assert m.worst_variance() == pytest.approx(4 * a / (3 * (a - 1) ** 2), rel=0.01)
    table = {0.5: (17.7018, 21.2226), 1.0: (3.6821, 5.2236), 2.0: (0.6456, 1.2276), 4.0: (0.0848, 0.2414)}
    assert float(m.variance(0.0)) == pytest.approx(table[eps][0], rel=0.01)
    assert float(m.variance(1.0)) == pytest.approx(table[eps][1], rel=0.01)
    assert (a + 3) / (3 * (a - 1) ** 2) == pytest.approx(table[eps][0], abs=TABLE_TOL)


def test_piecewise_outputs_fit_the_continuous_density():
    """N. Wang et al., "Collecting and Analyzing Multidimensional Data with Local
    Differential Privacy", ICDE 2019: density as in the previous tests [M+D].  50000
    sampled outputs for the grid input t = 0.25 (eps = 2, grid 32), binned at every 4th
    window end (our cells never straddle a window end), against the continuous law's bin
    masses from the formula: Pearson chi-square (scipy.stats.chisquare), threshold
    p >= 1e-3 (fixed key: deterministic).  The law for t = 0.5 must be rejected (p < 1e-6)."""
    eps, grid, n = 2.0, 32, 50_000
    m = Piecewise(eps, (-1.0, 1.0), grid)
    _, C, _, _ = pm_constants(eps)
    i = int(np.argmin(np.abs(m.inputs - 0.25)))
    t = float(m.inputs[i])
    assert t == 0.25
    ends = np.unique(np.concatenate([np.array(pm_window(eps, s)) for s in m.inputs]))
    edges = np.unique(np.concatenate([[-C], ends[::4], [C]]))
    out = m.randomize(np.full(n, t), words("gof-piecewise", n, m.words_per_row))[0].to_numpy()
    counts = np.bincount(np.searchsorted(edges, out) - 1, minlength=len(edges) - 1)
    assert counts.sum() == n and len(counts) == len(edges) - 1

    def expected(s: float) -> np.ndarray:
        return n * np.diff(pm_cdf(eps, s, edges))

    assert expected(t).min() >= 5
    assert stats.chisquare(counts, expected(t)).pvalue >= 1e-3
    assert stats.chisquare(counts, expected(0.5)).pvalue < 1e-6


@pytest.mark.parametrize("eps,table_value", [(1.0, 4.2890), (2.0, 1.0423), (4.0, 0.2190)])
def test_hybrid_variance_is_constant_and_matches_the_formula(eps, table_value):
    """N. Wang, X. Xiao, Y. Yang, J. Zhao, S. C. Hui, H. Shin, J. Shin, G. Yu, "Collecting
    and Analyzing Multidimensional Data with Local Differential Privacy", ICDE 2019.
    Hybrid: piecewise w.p. alpha = 1 - e^(-eps/2), else two-point (for eps > 0.61) [M];
    with that alpha the variance is constant,
    (a+3)/(3a(a-1)) + (E+1)^2/(a(E-1)^2) [D]; table values [D] (docs/formulas.md 5.3, 13).
    Within 1% at grid 256 (discretization of the piecewise part)."""
    a, E = math.exp(eps / 2), math.exp(eps)
    m = Hybrid(eps, (-1.0, 1.0), 256)
    assert m.alpha == pytest.approx(1 - 1 / a, rel=1e-14)
    formula = (a + 3) / (3 * a * (a - 1)) + (E + 1) ** 2 / (a * (E - 1) ** 2)
    assert formula == pytest.approx(table_value, abs=TABLE_TOL)
    t = np.linspace(-1.0, 1.0, 101)
    np.testing.assert_allclose(m.variance(t), formula, rtol=0.01)
    assert m.worst_variance() == pytest.approx(formula, rel=0.01)
    # the mixture really is alpha * piecewise + (1 - alpha) * two-point (exact variances)
    pm, tp = Piecewise(eps, (-1.0, 1.0), 256), TwoPoint(eps, (-1.0, 1.0))
    mix = m.alpha * pm.variance(t) + (1 - m.alpha) * tp.variance(t)
    np.testing.assert_allclose(m.variance(t), mix, rtol=1e-9)


def test_hybrid_below_the_threshold_is_the_two_point_mechanism():
    """N. Wang et al., "Collecting and Analyzing Multidimensional Data with Local
    Differential Privacy", ICDE 2019: alpha = 0 for eps <= eps* ~ 0.61 [M]; the computed
    crossover of the constant hybrid variance with the two-point worst case is
    eps* = 0.6094 [D] (docs/formulas.md 5.3, section 14 item 8).  At eps = 0.5 the hybrid is
    the two-point mechanism (worst case 16.6708 [D]); the alpha = 1 - e^(-eps/2) formula
    would give 16.8988 there [D], reproduced from our piecewise and two-point variances."""
    def hm(e):
        a, E = math.exp(e / 2), math.exp(e)
        return (a + 3) / (3 * a * (a - 1)) + (E + 1) ** 2 / (a * (E - 1) ** 2)

    def two_point_worst(e):
        return ((math.exp(e) + 1) / (math.exp(e) - 1)) ** 2

    lo, hi = 0.3, 1.0
    for _ in range(60):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if hm(mid) > two_point_worst(mid) else (lo, mid)
    assert lo == pytest.approx(0.6094, abs=5e-5)

    eps = 0.5
    m = Hybrid(eps, (-1.0, 1.0), 256)
    assert m.alpha == 0.0
    assert m.worst_variance() == pytest.approx(16.6708, abs=TABLE_TOL)
    assert Hybrid(0.6, (0, 1)).alpha == 0.0 and Hybrid(0.62, (0, 1)).alpha > 0.0
    alpha = 1 - math.exp(-eps / 2)
    t = np.linspace(-1, 1, 11)
    mix = alpha * Piecewise(eps, (-1.0, 1.0), 256).variance(t) + (1 - alpha) * TwoPoint(eps, (-1.0, 1.0)).variance(t)
    np.testing.assert_allclose(mix, 16.8988, rtol=0.01)
    assert hm(eps) == pytest.approx(16.8988, abs=TABLE_TOL)


def test_piecewise_beats_two_point_worst_case_above_1_29():
    """N. Wang et al., "Collecting and Analyzing Multidimensional Data with Local
    Differential Privacy", ICDE 2019, compared with J. C. Duchi, M. I. Jordan,
    M. J. Wainwright, "Minimax Optimal Procedures for Locally Private Estimation", JASA
    2018: the piecewise worst case 4a/(3(a-1)^2) is below the two-point worst case
    ((E+1)/(E-1))^2 iff eps > 1.29 [M]; the computed crossover is 1.2898 [D]
    (docs/formulas.md 5.2, section 14 item 8).  Checked on the formulas (to 5e-5) and on the
    mechanisms' exact worst-case variances at grid 256 (to 0.01)."""
    def pm_worst(e):
        a = math.exp(e / 2)
        return 4 * a / (3 * (a - 1) ** 2)

    def two_point_worst(e):
        return ((math.exp(e) + 1) / (math.exp(e) - 1)) ** 2

    lo, hi = 0.5, 3.0
    for _ in range(60):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if pm_worst(mid) > two_point_worst(mid) else (lo, mid)
    assert lo == pytest.approx(1.2898, abs=5e-5)

    def gap(e):
        return Piecewise(e, (-1.0, 1.0), 256).worst_variance() - TwoPoint(e, (-1.0, 1.0)).worst_variance()

    assert gap(1.25) > 0 > gap(1.33)
    lo, hi = 1.25, 1.33
    for _ in range(12):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if gap(mid) > 0 else (lo, mid)
    assert lo == pytest.approx(1.2898, abs=0.01)
