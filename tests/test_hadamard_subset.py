"""Hadamard response and subset selection: exact channels, realized samplers, Monte Carlo
variances, published/derived check values, fast decoding and the alphabet checks.

Papers: J. Acharya, Z. Sun, H. Zhang, "Hadamard Response: Estimating Distributions Privately,
Efficiently, and with Little Communication", AISTATS 2019 (docs/formulas.md section 3.1);
M. Ye, A. Barg, "Optimal Schemes for Discrete Distribution Estimation under Locally
Differential Privacy", IEEE Trans. Inf. Theory 2018, and S. Wang et al., "Mutual Information
Optimally Local Private Discrete Distribution Estimation", arXiv 2016 (docs/formulas.md sections
3.2 and 4); the framework of T. Wang, J. Blocki, N. Li, S. Jha, USENIX Security 2017
(docs/formulas.md section 0.3).

All release randomness comes from the keyed PRF under the fixed test key (conftest), so every
Monte Carlo check is deterministic; numpy's generator only makes synthetic inputs.
"""

from __future__ import annotations

import itertools
import json
import math
import time
import tracemalloc

import numpy as np
import pyarrow as pa
import pytest
from conftest import FIXED_KEY_BYTES, FIXED_NONCE, keyed_words
from scipy import stats

from ldptransform.errors import PolicyError
from ldptransform.mechanisms.base import build, registry
from ldptransform.mechanisms.categorical import OUE
from ldptransform.mechanisms import hadamard as hadamard_module
from ldptransform.mechanisms import subset as subset_module
from ldptransform.mechanisms.hadamard import HadamardResponse, _fold_parity, fwht, odd_parity
from ldptransform.mechanisms.subset import SubsetSelection

LDP_SLACK = 1.0 + 1e-12
TOP = (1 << 64) - 1


def words(name: str, n: int, per_row: int, start: int = 0) -> np.ndarray:
    return keyed_words(name, n, per_row, start, key=FIXED_KEY_BYTES, nonce=FIXED_NONCE, stream="test")


def cats(k: int) -> list[str]:
    return [f"c{i}" for i in range(k)]


def had(eps: float, k: int) -> HadamardResponse:
    return HadamardResponse(eps, cats(k))


def sub(eps: float, k: int, m: int | None = None) -> SubsetSelection:
    return SubsetSelection(eps, cats(k), m)


def cat_data(k: int, n: int, seed: int) -> np.ndarray:
    """Synthetic codes with geometric frequencies (every value appears)."""
    w = 0.6 ** np.arange(k) + 0.02
    x = np.random.default_rng(seed).choice(k, size=n, p=w / w.sum()).astype(np.int64)
    x[:k] = np.arange(k)
    return x


def all_outputs(m) -> list[pa.Array]:
    """The whole output alphabet, in the column order of m.channel()."""
    if isinstance(m, HadamardResponse):
        return [pa.array(np.arange(m.K, dtype=np.int32))]
    return [pa.array(m.channel_outputs())]


HAD_CASES = [(1.0, 5), (0.5, 8), (3.0, 3), (2.0, 12), (1.0, 2)]
SUB_CASES = [(1.0, 8, None), (0.5, 6, 3), (2.0, 7, 5), (1.0, 2, 1), (4.0, 10, 9), (1.5, 9, 2)]


def all_cases():
    return ([pytest.param(had(e, k), id=f"hadamard-{e}-{k}") for e, k in HAD_CASES]
            + [pytest.param(sub(e, k, m), id=f"subset-{e}-{k}-{m}") for e, k, m in SUB_CASES])


# --------------------------------------------------------------------------------------
# specs and construction
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("m", all_cases())
def test_spec_round_trip(m):
    spec = m.to_spec()
    assert set(spec) == {"mechanism", "epsilon", "categories"} | ({"subset_size"} if m.name == "subset" else set())
    again = build(json.loads(json.dumps(spec)))
    assert type(again) is type(m) and again.to_spec() == spec
    assert again.words_per_row == m.words_per_row
    for other in registry():
        if other != m.name:
            with pytest.raises(PolicyError):
                type(m).from_spec({**spec, "mechanism": other})
    assert m.describe().startswith(m.name)


def test_subset_spec_default_and_explicit_size():
    m = sub(1.0, 32)
    assert m.m == SubsetSelection.best_subset_size(1.0, 32) == 9
    spec = m.to_spec()
    del spec["subset_size"]
    assert SubsetSelection.from_spec(spec).m == 9
    four = build({**spec, "subset_size": 4})
    assert isinstance(four, SubsetSelection) and four.m == 4
    # words per row: 1 + min(m, k - m) (the complement is shuffled when 2m > k)
    assert sub(1.0, 10, 3).words_per_row == 4 and sub(1.0, 10, 8).words_per_row == 3
    assert had(1.0, 7).K == 8 and had(1.0, 8).K == 16 and had(1.0, 4096).K == 8192


@pytest.mark.parametrize("bad", [0, 8, -1, 2.5, True, "3", 3.0])
def test_subset_size_is_validated(bad):
    with pytest.raises(PolicyError) as err:
        sub(1.0, 8, bad)
    msg = str(err.value)
    assert "subset" in msg and "subset_size" in msg and "\n" not in msg


# --------------------------------------------------------------------------------------
# exact channels
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("m", all_cases())
def test_channel_meets_eps_tightly_and_gives_p_q(m):
    """Exact channel (Acharya et al. AISTATS 2019, docs/formulas.md 3.1 [M+D]; Ye and Barg IEEE
    Trans. Inf. Theory 2018, docs/formulas.md 3.2 [M+D]): rows sum to 1, the largest ratio over
    inputs of an output's probabilities is exactly e^eps, max_log_ratio() is eps, the support
    probabilities are p* (own value) and q* (other values), and channel x estimator = identity
    (exact unbiasedness, docs/formulas.md 0.3)."""
    Q = m.channel()
    E = math.exp(m.epsilon)
    np.testing.assert_allclose(Q.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert (Q > 0).all()
    ratio = float((Q.max(axis=0) / Q.min(axis=0)).max())
    assert ratio == pytest.approx(E, rel=1e-12)
    assert m.max_log_ratio() == m.epsilon
    S = m.support(all_outputs(m)).astype(float)
    P = Q @ S
    np.testing.assert_allclose(np.diag(P), m.p_star, rtol=0, atol=1e-12)
    np.testing.assert_allclose(P[~np.eye(m.k, dtype=bool)], m.q_star, rtol=0, atol=1e-12)
    np.testing.assert_allclose(Q @ m.row_estimates(all_outputs(m)), np.eye(m.k), rtol=0, atol=1e-9)


def test_hadamard_channel_structure():
    """docs/formulas.md 3.1 [M+D]: |C_x| = K/2, two sets share K/4 outputs, Q(y|x) = 2E/(K(E+1))
    on C_x and 2/(K(E+1)) off it."""
    m = had(1.3, 11)
    K, E = m.K, math.exp(1.3)
    S = m.support(all_outputs(m)).T.astype(int)  # (k, K): row x = indicator of C_x
    assert (S.sum(axis=1) == K // 2).all()
    inter = S @ S.T
    assert (inter[~np.eye(m.k, dtype=bool)] == K // 4).all()
    Q = m.channel()
    np.testing.assert_allclose(Q, np.where(S == 1, 2 * E / (K * (E + 1)), 2 / (K * (E + 1))), rtol=1e-13)


def test_channels_refuse_large_alphabets():
    with pytest.raises(ValueError):
        had(1.0, 8192).channel()  # K = 16384
    assert had(1.0, 4095).channel().shape == (4095, 4096)
    with pytest.raises(ValueError):
        sub(1.0, 30, 15).channel()  # C(30, 15) > 50,000
    assert sub(1.0, 17, 8).channel().shape == (17, math.comb(17, 8))


# --------------------------------------------------------------------------------------
# realized samplers
# --------------------------------------------------------------------------------------

def _branch_threshold(m, x: int, in_branch) -> float:
    """Realized P(first branch) of the word-0 coin for input x, by bisection over the whole
    64-bit word 0 (the coin is the integer comparison word < Tp, ``random.variates.words_below``):
    the number of words that take the first branch over 2^64, which must be Tp / 2^64 exactly."""
    lo, hi = 0, 1 << 64
    w = np.zeros((1, m.words_per_row), dtype=np.uint64)
    while lo < hi:
        mid = (lo + hi) // 2
        w[0, 0] = np.uint64(mid)
        if in_branch(m, np.array([x]), w)[0]:
            lo = mid + 1
        else:
            hi = mid
    assert lo == m.thresholds[0]
    return lo / float(1 << 64)


def _had_in_set(m, x, w):
    y = m.randomize_index(x, w)
    return ~odd_parity((x + 1) & y)


@pytest.mark.parametrize("eps,k", [(1.0, 5), (0.5, 2), (2.0, 12), (4.0, 300)])
def test_hadamard_sampler_realizes_the_channel(eps, k):
    """Enumerate word 1 (its top log2 K bits are the uniform u) for both outcomes of the word-0
    coin and every input: each output of the wanted half is hit by exactly 2 of the K values
    of u (flipping the lowest set bit of x+1 pairs the halves), none outside.  With the coin's
    realized probability (bisection) the realized channel equals channel() (Acharya et al.,
    AISTATS 2019, docs/formulas.md 3.1 [M+D])."""
    m = had(eps, k)
    K = m.K
    xs = np.repeat(np.arange(k), K)
    us = np.tile(np.arange(K, dtype=np.uint64), k)
    w = np.zeros((k * K, 2), dtype=np.uint64)
    w[:, 1] = us << np.uint64(64 - m.log2K)
    w[:, 1] |= np.uint64((1 << (64 - m.log2K)) - 1)  # low bits must not matter
    member = ~odd_parity(np.arange(1, k + 1)[:, None] & np.arange(K)[None, :])  # (k, K): y in C_x
    realized = np.zeros((k, K))
    for word0, branch_in in ((0, True), (TOP, False)):
        w[:, 0] = np.uint64(word0)
        y = m.randomize_index(xs, w)
        counts = np.zeros((k, K), dtype=np.int64)
        np.add.at(counts, (xs, y), 1)
        assert np.array_equal(counts, 2 * (member if branch_in else ~member))
        p_in = np.array([_branch_threshold(m, x, _had_in_set) for x in range(min(k, 4))])
        assert (p_in == m.p_star).all()
        realized += (p_in[0] if branch_in else 1 - p_in[0]) * counts / K
    np.testing.assert_allclose(realized, m.channel(), rtol=0, atol=1e-15)


SUB_ENUM = [(5, 2), (5, 3), (6, 3), (6, 4), (4, 1), (4, 3), (2, 1), (7, 5), (8, 4), (8, 1)]


@pytest.mark.parametrize("k,msize", SUB_ENUM)
def test_subset_sampler_realizes_the_channel(k, msize):
    """Enumerate every sequence of Fisher-Yates draws (word 1+i = j_i < k-1-i, which
    ``to_below`` maps to j_i itself) for both outcomes of the word-0 coin and every input: each
    subset containing x (coin: x in S) or not containing x (coin: x not in S) is produced by
    exactly the same number of sequences, so the realized law given the coin is uniform; with
    the coin's realized probability (bisection) the realized channel equals channel()
    (Ye and Barg, IEEE Trans. Inf. Theory 2018, docs/formulas.md 3.2 [M+D]).  Cases cover the
    direct shuffle (2m <= k) and the complement shuffle (2m > k)."""
    m = sub(1.0, k, msize)
    N, D = k - 1, m.words_per_row - 1
    seqs = np.array(list(itertools.product(*[range(N - i) for i in range(D)])), dtype=np.uint64)
    total = len(seqs)
    assert total == math.perm(N, D)
    outs = m.channel_outputs()
    col = {s: j for j, s in enumerate(outs)}
    realized = np.zeros((k, len(outs)))
    contains = np.array([[s[x] == "1" for s in outs] for x in range(k)])
    p_in = _branch_threshold(m, 0, lambda mm, x, w: mm.randomize_bits(x, w)[np.arange(len(x)), x])
    assert p_in == m.p_star
    for word0, branch_in in ((0, True), (TOP, False)):
        xs = np.repeat(np.arange(k), total)
        w = np.zeros((k * total, 1 + D), dtype=np.uint64)
        w[:, 0] = np.uint64(word0)
        w[:, 1:] = np.tile(seqs, (k, 1))
        reports = m.randomize(xs, w)[0].to_pylist()
        assert m.count_invalid(m.randomize(xs, w)) == 0
        counts = np.zeros((k, len(outs)), dtype=np.int64)
        np.add.at(counts, (xs, np.array([col[s] for s in reports])), 1)
        want = contains if branch_in else ~contains
        assert (counts[~want] == 0).all()
        per = total // math.comb(N, msize - 1 if branch_in else msize)
        assert (counts[want] == per).all()
        realized += (p_in if branch_in else 1 - p_in) * counts / total
    np.testing.assert_allclose(realized, m.channel(), rtol=0, atol=1e-15)


def _pooled_chisquare(cells: list[np.ndarray], probs: list[np.ndarray]) -> float:
    """p-value of the sum of per-input Pearson statistics (cells with expectation < 5 pooled)."""
    total, dof = 0.0, 0
    for c, p in zip(cells, probs):
        obs = np.bincount(c, minlength=len(p)).astype(float)
        exp_ = len(c) * p
        small = exp_ < 5
        if small.any():
            obs = np.append(obs[~small], obs[small].sum())
            exp_ = np.append(exp_[~small], exp_[small].sum())
        total += float(((obs - exp_) ** 2 / exp_).sum())
        dof += len(exp_) - 1
    return float(stats.chi2.sf(total, dof))


def _cells(m, arrays) -> np.ndarray:
    if isinstance(m, HadamardResponse):
        return arrays[0].to_numpy().astype(np.int64)
    bits = m.support(arrays).astype(np.int64)
    code = bits @ (1 << np.arange(m.k))
    lookup = np.full(1 << m.k, -1, dtype=np.int64)
    for j, s in enumerate(m.channel_outputs()):
        lookup[sum(1 << i for i, ch in enumerate(s) if ch == "1")] = j
    out = lookup[code]
    assert (out >= 0).all()
    return out


@pytest.mark.parametrize("m", [pytest.param(had(2.0, 12), id="hadamard-2-12"),
                               pytest.param(sub(1.0, 8, 3), id="subset-1-8-3"),
                               pytest.param(sub(0.7, 7, 5), id="subset-0.7-7-5")])
def test_output_distribution_matches_channel(m):
    """Goodness of fit of PRF-driven reports (fixed key, 20,000 per input value) to the exact
    channel, Pearson chi-square pooled over inputs, threshold p >= 1e-4; the same reports
    against the channel at eps + 0.25 must give p < 1e-4 (the check has teeth).  Papers:
    Acharya et al. AISTATS 2019 / Ye and Barg IEEE Trans. Inf. Theory 2018 (docs/formulas.md
    3.1, 3.2 [M+D])."""
    wrong = build({**m.to_spec(), "epsilon": m.epsilon + 0.25})
    assert isinstance(wrong, type(m))
    n = 20_000
    cells, probs, probs_wrong = [], [], []
    Q, Qw = m.channel(), wrong.channel()
    for x in range(m.k):
        arrays = m.randomize(np.full(n, x, dtype=np.int64), words(f"gof/{m.describe()}", n, m.words_per_row, x * n))
        cells.append(_cells(m, arrays))
        probs.append(Q[x])
        probs_wrong.append(Qw[x])
    assert _pooled_chisquare(cells, probs) >= 1e-4
    assert _pooled_chisquare(cells, probs_wrong) < 1e-4


# --------------------------------------------------------------------------------------
# Monte Carlo: unbiasedness and exact variance
# --------------------------------------------------------------------------------------

def _r2_moments(b: float, p: float, q: float) -> tuple[float, float]:
    """For r = (B - b)/(p - q), B ~ Bernoulli(b): (E r^2, Var r^2)."""
    m2 = b * (1 - b) / (p - q) ** 2
    m4 = b * (1 - b) * ((1 - b) ** 3 + b ** 3) / (p - q) ** 4
    return m2, m4 - m2 ** 2


def check_mc(m, n: int, label: str, seed: int) -> None:
    x = cat_data(m.k, n, seed)
    f = np.bincount(x, minlength=m.k) / n
    arrays = m.randomize(x, words(label, n, m.words_per_row))
    assert m.count_invalid(arrays) == 0
    est = m.row_estimates(arrays)
    exact = m.variance(f)
    # (a) mean within 5 SE of the true frequency
    se = np.sqrt(exact / n)
    assert np.all(np.abs(est.mean(axis=0) - f) <= 5 * se), (est.mean(axis=0) - f) / se
    # the decoder's summary path gives the same sums as the per-row path
    s1, s2 = m.decode_sums(m.summarize(arrays), n)
    np.testing.assert_allclose(s1, est.sum(axis=0), rtol=1e-9, atol=1e-6)
    np.testing.assert_allclose(s2, (est ** 2).sum(axis=0), rtol=1e-9)
    # (b) per-row residual (estimate - 1[x = v]) has the exact variance (rows independent),
    # within 10%, and 10% is at least 4 standard errors of the empirical mean square
    resid = est - (x[:, None] == np.arange(m.k)[None, :])
    emp = (resid ** 2).mean(axis=0)
    p, q = m.p_star, m.q_star
    m2_in, v2_in = _r2_moments(p, p, q)
    m2_out, v2_out = _r2_moments(q, p, q)
    for v in range(m.k):
        assert f[v] * m2_in + (1 - f[v]) * m2_out == pytest.approx(exact[v], rel=1e-12)
        se_v = math.sqrt(f[v] * v2_in + (1 - f[v]) * v2_out) / math.sqrt(n)
        assert 0.10 * exact[v] >= 4 * se_v, "sample too small for a 10% check to mean anything"
        assert abs(emp[v] - exact[v]) <= 0.10 * exact[v], (v, emp[v], exact[v])


MC_CASES = [("hadamard", 1.0, 6, None), ("hadamard", 2.0, 12, None), ("hadamard", 0.5, 3, None),
            ("subset", 1.0, 8, None), ("subset", 0.5, 10, 4), ("subset", 2.0, 6, 4), ("subset", 1.5, 16, None)]


def _make(name, eps, k, msize):
    return had(eps, k) if name == "hadamard" else sub(eps, k, msize)


@pytest.mark.parametrize("case", MC_CASES, ids=lambda c: "-".join(map(str, c)))
def test_monte_carlo_unbiased_and_exact_variance(case):
    """Fixed-key Monte Carlo, n = 20,000: every frequency estimate within 5 SE of the truth and
    the per-row n*Var within 10% of the exact formula of docs/formulas.md 0.3 [M+D] (Wang et al.
    USENIX Security 2017), for hadamard (Acharya et al. AISTATS 2019) and subset (Ye and Barg
    IEEE Trans. Inf. Theory 2018)."""
    check_mc(_make(*case), 20_000, "mc/" + "-".join(map(str, case)), seed=31)


@pytest.mark.slow
@pytest.mark.parametrize("case", [("hadamard", 0.5, 40, None), ("subset", 1.0, 48, None), ("subset", 4.0, 30, None),
                                  ("subset", 3.0, 16, None)],
                         ids=lambda c: "-".join(map(str, c)))
def test_monte_carlo_large(case):
    """As test_monte_carlo_unbiased_and_exact_variance with n = 200,000 (same papers, [M+D])."""
    check_mc(_make(*case), 200_000, "mc-large/" + "-".join(map(str, case)), seed=32)


# --------------------------------------------------------------------------------------
# formulas and check values
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("eps,hr", [(0.5, 16.6708), (1.0, 4.6827), (2.0, 1.7241), (4.0, 1.0760)])
def test_hadamard_variance_formula_and_table(eps, hr):
    """Acharya et al. AISTATS 2019: exact n*Var = ((E+1)/(E-1))^2 - f_v (docs/formulas.md 3.1,
    [D]); the f = 0 value is the HR column of the docs/formulas.md section 13 table [D],
    independent of k."""
    E = math.exp(eps)
    for k in (2, 7, 300):
        m = had(eps, k)
        f = np.linspace(0, 1, 11)
        np.testing.assert_allclose(m.variance(f), ((E + 1) / (E - 1)) ** 2 - f, rtol=1e-12)
        assert m.approx_variance() == pytest.approx(hr, abs=5e-5)
        assert m.total_variance() == pytest.approx(k * ((E + 1) / (E - 1)) ** 2 - 1, rel=1e-12)


def test_subset_variance_matches_closed_forms():
    """Ye and Barg IEEE Trans. Inf. Theory 2018 (docs/formulas.md 3.2 [D]): p*, q* closed forms,
    n*Var* = [(m-1)E + k-m][mE + k-m-1] / (m(k-m)(E-1)^2) plus the exact f-term
    f [(k-m)(k-m-1) - m(m-1)E] / (m(k-m)(E-1)); m = 1 is GRR; and total_variance() from p*, q*
    equals the section 4 closed form (k-1)[(mE+k-m)^2 - (mE^2+k-m)] / (m(k-m)(E-1)^2) [D]."""
    f = np.linspace(0, 1, 6)
    for eps in (0.3, 1.0, 2.5, 5.0):
        E = math.exp(eps)
        for k in (2, 3, 8, 33, 200):
            for msize in sorted({1, 2, k // 3, k // 2, k - 1} & set(range(1, k))):
                m = sub(eps, k, msize)
                assert m.p_star == pytest.approx(msize * E / (msize * E + k - msize), rel=1e-13)
                assert m.q_star == pytest.approx(msize * ((msize - 1) * E + k - msize)
                                                 / ((k - 1) * (msize * E + k - msize)), rel=1e-13)
                var0 = (((msize - 1) * E + k - msize) * (msize * E + k - msize - 1)
                        / (msize * (k - msize) * (E - 1) ** 2))
                fterm = ((k - msize) * (k - msize - 1) - msize * (msize - 1) * E) / (msize * (k - msize) * (E - 1))
                np.testing.assert_allclose(m.variance(f), var0 + f * fterm, rtol=1e-10, atol=1e-12)
                closed = ((k - 1) * ((msize * E + k - msize) ** 2 - (msize * E * E + k - msize))
                          / (msize * (k - msize) * (E - 1) ** 2))
                assert m.total_variance() == pytest.approx(closed, rel=1e-10)
                if msize == 1:
                    assert m.approx_variance() == pytest.approx((E + k - 2) / (E - 1) ** 2, rel=1e-12)


# docs/formulas.md section 13 [D]: SS (best m) column, per-item n*Var at f = 0, m minimizing it
TABLE13 = [
    (0.5, 2, 1, 3.9177), (0.5, 8, 3, 11.7591), (0.5, 32, 12, 14.6442), (0.5, 256, 97, 15.5410),
    (1.0, 2, 1, 0.9207), (1.0, 8, 2, 2.5681), (1.0, 32, 8, 3.3964), (1.0, 256, 69, 3.6462),
    (2.0, 2, 1, 0.1810), (2.0, 8, 1, 0.3280), (2.0, 32, 3, 0.6184), (2.0, 256, 30, 0.7106),
    (4.0, 2, 1, 0.0190), (4.0, 8, 1, 0.0211), (4.0, 32, 1, 0.0294), (4.0, 256, 4, 0.0674),
]


@pytest.mark.parametrize("eps,k,msize,value", TABLE13)
def test_subset_per_item_table(eps, k, msize, value):
    """docs/formulas.md section 13 table, SS column [D] (Ye and Barg IEEE Trans. Inf. Theory 2018):
    with the table's m, n*Var at f = 0 matches to the printed 4 decimals, and that m minimizes
    the per-item f = 0 variance over 1..k-1 (which can differ from best_subset_size, chosen on
    the total variance)."""
    assert sub(eps, k, msize).approx_variance() == pytest.approx(value, abs=5e-5)
    per_item = [sub(eps, k, j).approx_variance() for j in range(1, k)]
    assert int(np.argmin(per_item)) + 1 == msize


TABLE4 = [(0.5, 8, 3, 95.111, 126.366), (0.5, 256, 97, 3979.480, 4012.723), (1.0, 32, 9, 109.733, 118.846),
          (2.0, 32, 4, 20.792, 24.170), (4.0, 256, 5, 18.348, 20.462)]


@pytest.mark.parametrize("eps,k,mstar,l2,l2_oue", TABLE4)
def test_subset_total_variance_table(eps, k, mstar, l2, l2_oue):
    """docs/formulas.md section 4 table [D] (symmetric subset family, Ye and Barg IEEE Trans. Inf.
    Theory 2018): best_subset_size = m*, total_variance() = n*L2* to the printed 3 decimals, the
    default m is m*, no m does better, and OUE's total is k*4E/(E-1)^2 + 1."""
    assert SubsetSelection.best_subset_size(eps, k) == mstar
    m = sub(eps, k)
    assert m.m == mstar
    assert m.total_variance() == pytest.approx(l2, abs=5e-4)
    assert min(sub(eps, k, j).total_variance() for j in range(1, k)) == pytest.approx(m.total_variance(), rel=1e-12)
    assert OUE(eps, cats(k)).total_variance() == pytest.approx(l2_oue, abs=5e-4)


def test_total_and_per_item_optimal_sizes_differ():
    """docs/formulas.md section 4 note [D]: the m minimizing total L2 can differ by one from the m
    minimizing the per-item f = 0 variance: eps 1, k 32: 9 vs 8; eps 4, k 256: 5 vs 4."""
    for eps, k, total_m, item_m in [(1.0, 32, 9, 8), (4.0, 256, 5, 4)]:
        assert SubsetSelection.best_subset_size(eps, k) == total_m
        assert min(range(1, k), key=lambda j: sub(eps, k, j).approx_variance()) == item_m
    # no overflow at huge eps: m = 1 (total variance -> 0)
    assert SubsetSelection.best_subset_size(800.0, 50) == 1


# --------------------------------------------------------------------------------------
# fast decoding
# --------------------------------------------------------------------------------------

def test_parity_and_fwht_against_brute_force():
    """Helpers of the hadamard decoder: parity of popcount (both code paths) and the fast
    Walsh-Hadamard transform against the explicit Sylvester matrix H[i][j] = (-1)^popcount(i&j)
    (Acharya et al. AISTATS 2019, docs/formulas.md 3.1 [M+D])."""
    rng = np.random.default_rng(3)
    a = rng.integers(0, 1 << 31, size=5000)
    want = np.array([bin(int(v)).count("1") % 2 == 1 for v in a])
    assert np.array_equal(_fold_parity(a.copy()), want)
    assert np.array_equal(odd_parity(a.copy()), want)
    for K in (1, 2, 4, 16, 64):
        i = np.arange(K)
        H = np.where(odd_parity(i[:, None] & i[None, :]), -1, 1)
        c = rng.integers(0, 1000, size=K)
        assert np.array_equal(fwht(c), H @ c)
    with pytest.raises(ValueError):
        fwht(np.ones(6))


@pytest.mark.parametrize("k", [2, 3, 7, 8, 100, 4096])
def test_fwht_support_counts_equal_parity_counts(k):
    """Support counts from the histogram's Walsh-Hadamard transform equal the brute-force
    parity counts sum_i 1[popcount((v+1) & y_i) even] (Acharya et al. AISTATS 2019,
    docs/formulas.md 3.1 [M+D]); malformed rows support nothing in both."""
    m = had(1.0, k)
    rng = np.random.default_rng(k)
    y = rng.integers(0, m.K, size=20_000).astype(object)
    y[:5] = [None, -1, m.K, m.K + 7, None]
    arr = [pa.array(list(y), pa.int64())]
    brute = m.support(arr).sum(axis=0)
    assert brute.shape == (k,)
    fast = m.support_from_summary(m.summarize(arr), len(y))
    assert np.array_equal(fast, brute)
    assert np.array_equal(m.support_counts(arr), brute)
    assert m.summarize(arr).sum() == 20_000 - 5


def test_decoding_a_million_hadamard_reports_is_fast(capsys):
    """Decode 1,000,000 hadamard reports at k = 4096 (K = 8192): histogram + one fast
    Walsh-Hadamard transform + decode_sums, well under a second (asserted < 1 s; the measured
    time is printed).  The estimates are also within 5 SE of the truth (docs/formulas.md 0.3, 3.1
    [M+D]; Acharya et al. AISTATS 2019)."""
    m = had(1.0, 4096)
    n = 1_000_000
    x = np.random.default_rng(9).zipf(1.5, size=n) % m.k
    f = np.bincount(x, minlength=m.k) / n
    t0 = time.perf_counter()
    arrays = m.randomize(x, words("speed/hadamard", n, m.words_per_row))
    t_rand = time.perf_counter() - t0
    t0 = time.perf_counter()
    s1, _ = m.decode_sums(m.summarize(arrays), n)
    t_dec = time.perf_counter() - t0
    with capsys.disabled():
        print(f"\n[hadamard k=4096, 1M reports] randomize {t_rand:.3f} s, decode {t_dec:.3f} s")
    assert t_dec < 1.0
    se = np.sqrt(m.variance(f) / n)
    assert np.all(np.abs(s1 / n - f) <= 5 * se)


def test_decoding_memory_is_bounded():
    """summarize/support of 16,384 subset reports at k = 4096 (64 MB of report text) and the
    hadamard support of 16,384 rows: the traced peak beyond the input and the (n, k) result
    stays below 64 MB (rows are decoded in chunks of 2^22 entries)."""
    k, n = 4096, 16_384
    m = sub(1.0, k, 40)
    bits = np.zeros((n, k), dtype=bool)
    rng = np.random.default_rng(4)
    idx = (rng.integers(0, k, size=n)[:, None] + 101 * np.arange(40)[None, :]) % k  # 40 distinct per row
    bits[np.arange(n)[:, None], idx] = True
    from ldptransform.mechanisms.categorical import bits_to_strings
    arrays = [bits_to_strings(bits)]
    del idx
    tracemalloc.start()
    try:
        counts = m.summarize(arrays)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        assert peak < 64 << 20, peak
        assert np.array_equal(counts, bits.sum(axis=0))
        s = m.support(arrays)
        _, peak = tracemalloc.get_traced_memory()
        assert peak - s.nbytes < 64 << 20, peak
        assert np.array_equal(s, bits)
        del s
        h = had(1.0, k)
        y = [pa.array(rng.integers(0, h.K, size=n).astype(np.int32))]
        tracemalloc.reset_peak()
        sh = h.support(y)
        _, peak = tracemalloc.get_traced_memory()
        assert peak - sh.nbytes < 64 << 20, peak
    finally:
        tracemalloc.stop()


# --------------------------------------------------------------------------------------
# batching, chunking, alphabet checks
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("m", all_cases() + [pytest.param(sub(1.0, 300), id="subset-1-300")])
def test_randomize_ignores_batch_split_and_chunking(m, monkeypatch):
    """Outputs depend only on each row's own words: splitting the rows, or decoding/randomizing
    in tiny internal chunks, changes nothing; another stream changes the outputs."""
    n, a = 1000, 377
    x = cat_data(m.k, n, 5)
    x_before = x.copy()
    label = f"split/{m.describe()}"
    whole = m.randomize(x, words(label, n, m.words_per_row))
    parts = [m.randomize(x[:a], words(label, a, m.words_per_row)),
             m.randomize(x[a:], words(label, n - a, m.words_per_row, a))]
    assert np.array_equal(x, x_before)
    assert whole[0].to_pylist() == parts[0][0].to_pylist() + parts[1][0].to_pylist()
    sup = m.support(whole)
    counts = m.support_counts(whole)
    module = hadamard_module if m.name == "hadamard" else subset_module
    monkeypatch.setattr(module, "_CHUNK_ELEMENTS", 64)
    assert m.randomize(x, words(label, n, m.words_per_row))[0].to_pylist() == whole[0].to_pylist()
    assert np.array_equal(m.support(whole), sup)
    assert np.array_equal(m.support_counts(whole), counts)
    other = m.randomize(x, words(label + "/other", n, m.words_per_row))
    assert other[0].to_pylist() != whole[0].to_pylist()
    assert m.output_fields("col")[0].type == whole[0].type


def test_count_invalid_hadamard():
    m = had(1.0, 6)  # K = 8
    arrays = m.randomize(cat_data(6, 200, 7), words("invalid/hadamard", 200, 2))
    assert m.count_invalid(arrays) == 0
    y = arrays[0].to_pylist()
    assert set(y) <= set(range(8))
    assert m.count_invalid([pa.array(y, pa.int64())]) == 0
    assert m.count_invalid([pa.array([str(v) for v in y])]) == 0       # read back as text
    assert m.count_invalid([pa.array([float(v) for v in y])]) == 0     # read back as floats
    bad = list(y)
    bad[0], bad[1], bad[2], bad[3] = 8, -1, None, 1000
    assert m.count_invalid([pa.array(bad, pa.int64())]) == 4
    assert m.count_invalid([pa.array([1.5, 2.0, float("nan"), 8.0])]) == 3
    assert m.count_invalid([pa.array(["3", "x", "", "07", None, "8"])]) == 4
    # a malformed row supports nothing, in both decoding paths
    s = m.support([pa.array(bad, pa.int64())])
    assert not s[:4].any()
    assert np.array_equal(m.support_counts([pa.array(bad, pa.int64())]), s.sum(axis=0))


def test_count_invalid_subset():
    m = sub(1.0, 6, 2)
    arrays = m.randomize(cat_data(6, 200, 7), words("invalid/subset", 200, m.words_per_row))
    assert m.count_invalid(arrays) == 0
    r = arrays[0].to_pylist()
    assert all(len(s) == 6 and s.count("1") == 2 for s in r)
    bad = list(r)
    bad[0] = r[0][:-1]            # too short
    bad[1] = r[1] + "0"           # too long
    bad[2] = "01x010"             # foreign character
    bad[3] = None
    bad[4] = "111000"             # three ones: not a subset of size m
    bad[5] = "000000"             # none
    bad[6] = "100000"             # one
    assert m.count_invalid([pa.array(bad)]) == 7
    s = m.support([pa.array(bad)])
    assert not s[:7].any() and np.array_equal(s[7:], m.support(arrays)[7:])
    assert np.array_equal(m.support_counts([pa.array(bad)]), s.sum(axis=0))
    # integers (leading zeros dropped by a CSV round trip) are padded back
    assert m.count_invalid([pa.array([int(v) for v in r], pa.int64())]) == 0
