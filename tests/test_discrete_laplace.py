"""Discrete Laplace on a grid (mechanisms/discrete_laplace.py) and KeyedStream.words_at.

Papers: A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally Utility-Maximizing Privacy
Mechanisms", STOC 2009 (the two-sided geometric noise; docs/formulas.md section 10.2);
C. L. Canonne, G. Kamath, T. Steinke, "The Discrete Gaussian for Differential Privacy",
NeurIPS 2020 (exact samplers; section 10.3); I. Mironov, "On Significance of the Least
Significant Bits for Differential Privacy", CCS 2012 (why the sampler is exact; section 10.1).

Every statistical check uses the fixed key and nonce of conftest.py (so it cannot flake) and
states its tolerance; numpy's seeded generator only makes input values.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import math
from fractions import Fraction

import numpy as np
import pyarrow as pa
import pytest
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes
from scipy import stats

from conftest import FIXED_KEY_BYTES, FIXED_NONCE
from ldptransform.errors import PolicyError
from ldptransform.keys import SecretKey
from ldptransform.random import KeyedStream
from ldptransform.mechanisms.base import build
from ldptransform.mechanisms.discrete_laplace import DiscreteLaplace
from ldptransform.random.variates import RowDraws as _RowDraws
from ldptransform.random.variates import bernoulli_exp, uniform_below
from ldptransform.mechanisms.numeric import DEFAULT_GRID

KEY = SecretKey(FIXED_KEY_BYTES)
ALPHA = 1e-3  # significance of the chi-square goodness-of-fit tests


def stream(*path: str, nonce: str = FIXED_NONCE) -> KeyedStream:
    return KeyedStream(KEY, nonce, "test-discrete-laplace", *path)


def drawer(s: KeyedStream, row0: int = 0):
    return lambda r, j: s.words_at(row0 + r, j)


def release(m: DiscreteLaplace, x: np.ndarray, row0: int, nonce: str = FIXED_NONCE) -> np.ndarray:
    """What the release layer does for one batch starting at global row ``row0``: fixed words
    from the column's stream, variable draws from the column's own draw stream."""
    fixed = stream("column", "v", nonce=nonce).words(row0, len(x), m.words_per_row)
    draws = stream("column", "v", "draws", nonce=nonce)
    (arr,) = m.randomize_with(x, fixed, drawer(draws, row0))
    return arr.to_numpy()


# -- KeyedStream.words_at -------------------------------------------------------------------

def test_words_at_matches_direct_aes_of_one_block():
    """words_at(r, j) is the first 8 bytes (little-endian) of AES-256-ECB, under the stream's
    HMAC-SHA256 sub-key, of the big-endian block (2^63 + j) * 2^64 + r (random/bits.py docstring;
    AES per the cryptography package, independent of the implementation's numpy packing)."""
    s = KeyedStream(KEY, FIXED_NONCE, "column", "pay", "draws")
    r, j = 987654321, 42
    msg = b"ldptransform/prf/v1"
    for label in (bytes.fromhex(FIXED_NONCE), b"column", b"pay", b"draws"):
        msg += len(label).to_bytes(4, "big") + label
    sub = hmac.new(FIXED_KEY_BYTES, msg, hashlib.sha256).digest()
    block = (((1 << 63) + j) << 64 | r).to_bytes(16, "big")
    enc = Cipher(algorithms.AES(sub), modes.ECB()).encryptor()
    want = int.from_bytes(enc.update(block)[:8], "little")
    got = s.words_at(np.array([r]), np.array([j]))
    assert got.dtype == np.uint64 and got.shape == (1,)
    assert int(got[0]) == want


def test_words_at_deterministic_and_independent_of_grouping():
    """Same (key, nonce, path, row, draw) -> same word, whatever else is asked in the same call,
    in whatever order, and in however many calls (the property the rejection sampler relies on)."""
    rows = np.repeat(np.arange(1000, 1040), 25)
    draws = np.tile(np.arange(25), 40)
    whole = stream("x").words_at(rows, draws)
    again = stream("x").words_at(rows, draws)  # a fresh stream object, same key material
    assert np.array_equal(whole, again)
    parts = np.concatenate([stream("x").words_at(rows[a:b], draws[a:b])
                            for a, b in [(0, 1), (1, 333), (333, 334), (334, 1000)]])
    assert np.array_equal(whole, parts)
    perm = np.random.default_rng(5).permutation(rows.size)
    assert np.array_equal(stream("x").words_at(rows[perm], draws[perm]), whole[perm])
    # broadcasting a scalar draw index
    assert np.array_equal(stream("x").words_at(np.arange(1000, 1040), 3), whole[3::25])


def test_words_at_differs_across_rows_draws_and_streams():
    """Distinct (row, draw) pairs get distinct words (10,000 pairs, no collision expected among
    64-bit words), and the words differ across stream paths and nonces and from the fixed
    counter-mode words of the same stream."""
    r, j = np.meshgrid(np.arange(100), np.arange(100), indexing="ij")
    w = stream("x").words_at(r.ravel(), j.ravel())
    assert np.unique(w).size == w.size
    assert not np.array_equal(w, stream("y").words_at(r.ravel(), j.ravel()))
    assert not np.array_equal(w, stream("x", nonce="ff" * 16).words_at(r.ravel(), j.ravel()))
    fixed = stream("x").words(0, 100, 2)
    assert np.intersect1d(w, fixed.ravel()).size == 0
    with pytest.raises(ValueError):
        stream("x").words_at(np.array([-1]), np.array([0]))


# -- exact integer building blocks --------------------------------------------------------

def test_uniform_below_rejects_the_biased_top_words():
    """Exact uniform integers (Canonne, Kamath, Steinke, NeurIPS 2020, docs/formulas.md 10.3 [S]):
    for m = 3, 2^64 mod 3 = 1, so the word 2^64 - 1 must be rejected (plain modulo would map it
    to 0) and the next word 2^64 - 2 accepted, giving (2^64 - 2) mod 3 = 2.  A power of two
    (m = 2) accepts every word."""
    seq = [np.uint64(2**64 - 1), np.uint64(2**64 - 2)]

    def draw(r, j):
        return np.array([seq[int(k)] for k in j], dtype=np.uint64)

    src = _RowDraws(1, draw)
    assert int(uniform_below(src, np.array([0]), 3)[0]) == 2
    assert int(src.counter[0]) == 2
    src = _RowDraws(1, draw)
    assert int(uniform_below(src, np.array([0]), 2)[0]) == 1 and int(src.counter[0]) == 1


@pytest.mark.parametrize("num,den", [(0, 1), (1, 3), (7, 10), (1, 1)])
def test_bernoulli_exp_frequency(num, den):
    """Bernoulli(exp(-gamma)) by the von Neumann-style loop of Canonne, Kamath, Steinke
    (NeurIPS 2020; docs/formulas.md 10.3 [S]): frequency within 5 SE of exp(-num/den) over
    100,000 rows under the fixed key (gamma = 0 must give exactly 1)."""
    n = 100_000
    src = _RowDraws(n, drawer(stream("bern", f"{num}/{den}")))
    hits = bernoulli_exp(src, np.arange(n), num, den)
    p = math.exp(-num / den)
    if p == 1.0:
        assert hits.all()
        return
    se = math.sqrt(p * (1 - p) / n)
    assert abs(hits.mean() - p) < 5 * se


# -- the noise distribution -----------------------------------------------------------------

def chi_square_pvalue(m: DiscreteLaplace, z: np.ndarray, min_expected: float = 20.0) -> tuple[float, int]:
    """Chi-square goodness of fit of integer samples z to m.pmf: one cell per z in [-L, L]
    (L the largest |z| whose expected count is at least ``min_expected``), plus the two pooled
    tails z < -L and z > L with exact tail mass a^(L+1) / (1 + a) each."""
    n = z.size
    a = m.a
    x = m.noise_rate
    # n * tanh(x/2) * a^L >= min_expected
    L = int(math.floor(math.log(n * math.tanh(x / 2) / min_expected) / x))
    assert L >= 1
    zs = np.arange(-L, L + 1)
    expected = np.concatenate([[a ** (L + 1) / (1 + a)], m.pmf(zs), [a ** (L + 1) / (1 + a)]]) * n
    assert abs(expected.sum() - n) < 1e-6 * n
    counts = np.bincount(np.clip(z, -L - 1, L + 1) + L + 1, minlength=2 * L + 3)
    return float(stats.chisquare(counts, expected).pvalue), 2 * L + 3


CASES = [(0.7, 4), (0.7, 256), (3.0, 2), (2.0, 1)]


@pytest.fixture(scope="module")
def noise_samples() -> dict[tuple[float, int], np.ndarray]:
    out = {}
    for eps, G in CASES:
        m = DiscreteLaplace(eps, [0.0, 1.0], G)
        out[(eps, G)] = m.sample_noise(200_000, drawer(stream("noise", f"{eps}/{G}")))
    return out


@pytest.mark.parametrize("eps,G", CASES)
def test_noise_matches_exact_pmf_chi_square(noise_samples, eps, G):
    """Sampled Z against the exact two-sided geometric pmf (1-a)/(1+a) a^|z|, a = exp(-eps/G)
    (Ghosh, Roughgarden, Sundararajan, STOC 2009; docs/formulas.md 10.2 [M]), drawn by the exact
    sampler of Canonne, Kamath, Steinke (NeurIPS 2020; docs/formulas.md 10.3 [M+D]): 200,000 draws
    under the fixed key, chi-square with pooled tails, p-value above 0.001.  Cases include a
    non-integer eps (0.7 = 7/10, so eps/G = 7/40 and 7/2560) and s > 1 with t > 1 (3/2)."""
    m = DiscreteLaplace(eps, [0.0, 1.0], G)
    p, cells = chi_square_pvalue(m, noise_samples[(eps, G)])
    assert cells >= 5
    assert p > ALPHA, f"chi-square p = {p:.3g} over {cells} cells"


@pytest.mark.parametrize("eps,G", [(0.7, 4), (3.0, 2)])
def test_chi_square_has_power_against_a_wrong_scale(noise_samples, eps, G):
    """Control for the test above (so it can fail): the same samples are rejected (p < 1e-6)
    against the pmf of a 10% larger eps (Ghosh et al. STOC 2009 pmf, docs/formulas.md 10.2 [M])."""
    wrong = DiscreteLaplace(round(eps * 1.1, 10), [0.0, 1.0], G)
    p, _ = chi_square_pvalue(wrong, noise_samples[(eps, G)])
    assert p < 1e-6


def test_noise_variance_formula_and_pmf():
    """Var(Z) = 2a/(1-a)^2 (docs/formulas.md 10.2 [D]: 4.337 for a = e^(-2/3), i.e. eps/G = 2/3),
    and it equals the second moment of the exact pmf summed directly; the pmf sums to 1."""
    m = DiscreteLaplace(2.0, [0.0, 3.0], 3)
    assert m.noise_variance() == pytest.approx(4.337, abs=5e-4)
    z = np.arange(-400, 401)
    assert m.pmf(z).sum() == pytest.approx(1.0, abs=1e-12)
    assert (m.pmf(z) * z ** 2).sum() == pytest.approx(m.noise_variance(), rel=1e-12)
    assert m.pmf(0) == pytest.approx(math.tanh(1 / 3), rel=1e-15)


# -- unbiasedness and variance of reports --------------------------------------------------

@pytest.mark.parametrize("eps,G,bounds", [(3.0, 2, (-1.0, 1.0)), (0.7, 16, (20.0, 70.0)),
                                          (1.5, DEFAULT_GRID, (0.0, 1000.0))])
def test_reports_unbiased_and_variance_matches(eps, G, bounds):
    """Per-row unbiasedness (rounding is unbiased and Z has mean 0; Ghosh et al. STOC 2009,
    docs/formulas.md 10.2 [M]) and the exact report variance step^2 (frac(1-frac) + 2a/(1-a)^2)
    (docs/formulas.md 10.2 [D]): for several values (the bounds, a grid point, off-grid values)
    the mean of 60,000 reports is within 5 SE of the value, and the sample variance within 10%
    of variance(x).  With eps 3 and G 2 the rounding term is a third of the variance at the
    midpoint, so leaving it out would fail."""
    m = DiscreteLaplace(eps, list(bounds), G)
    lo, hi = bounds
    xs = [lo, hi, lo + 0.5 * m.step, lo + 0.3 * (hi - lo) + 0.123 * m.step, lo + (G // 2) * m.step]
    n = 60_000
    x = np.repeat(xs, n)
    out = release(m, x, row0=10_000)
    assert (out < lo).any() and (out > hi).any()  # unbiasedness needs values beyond the bounds
    for k, v in enumerate(xs):
        rep = out[k * n:(k + 1) * n]
        var = m.variance(v)
        assert abs(rep.mean() - v) < 5 * math.sqrt(var / n), (v, rep.mean())
        assert abs(rep.var() / var - 1) < 0.10, (v, rep.var(), var)
    assert m.worst_variance() == pytest.approx(m.variance(lo + 0.5 * m.step), rel=1e-12)
    assert np.all(m.variance(np.array(xs)) <= m.worst_variance() * (1 + 1e-12))


def test_rounding_stage_uses_word_zero_like_grid_mechanisms():
    """The first stage is GridMechanism.randomize_index's unbiased random rounding (one word,
    to_unit(word) < frac; the rounding step of Duchi, Jordan, Wainwright, "Minimax Optimal
    Procedures for Locally Private Estimation", JASA 2018, docs/formulas.md 5.1 [M+D], on a finer
    grid): a grid point never moves, and a value 0.25 of a step above grid point 3 goes to 4
    exactly when to_unit(word 0) < 0.25; the top bound maps to index G."""
    m = DiscreteLaplace(1.0, [0.0, 8.0], 8)
    words = np.array([0, 2**62 - 2**11, 2**62, 2**64 - 1], dtype=np.uint64)  # to_unit: 0, <.25, .25, ~1
    assert list(m.grid_index(np.full(4, 3.25), words)) == [4, 4, 3, 3]
    assert list(m.grid_index(np.full(4, 3.0), words)) == [3, 3, 3, 3]
    assert list(m.grid_index(np.full(4, 8.0), words)) == [8, 8, 8, 8]


# -- reproducibility -----------------------------------------------------------------------

def test_same_key_and_nonce_reproduce_across_batchings():
    """Same key and nonce give identical output whether the rows go in one batch or in several
    with the right row offsets; a row's report does not depend on the other rows' values; a
    different nonce gives a different output (exact sampler of Canonne, Kamath, Steinke,
    NeurIPS 2020, docs/formulas.md 10.3 [M+D], driven row by row by the keyed PRF)."""
    m = DiscreteLaplace(0.7, [0.0, 100.0], 64)
    x = np.random.default_rng(11).uniform(0, 100, 5000)
    whole = release(m, x, row0=0)
    cuts = [0, 1, 777, 778, 3000, 5000]
    parts = np.concatenate([release(m, x[a:b], row0=a) for a, b in zip(cuts[:-1], cuts[1:])])
    assert np.array_equal(whole, parts)
    x2 = x.copy()
    x2[::2] = 100.0 - x2[::2]  # change every other row
    assert np.array_equal(release(m, x2, row0=0)[1::2], whole[1::2])
    other = release(m, x, row0=0, nonce="0f" * 16)
    assert (other != whole).mean() > 0.9


def test_randomize_without_draws_is_a_clear_type_error():
    """The fixed-words entry point cannot run a rejection sampler (Canonne, Kamath, Steinke 2020,
    docs/formulas.md 10.3 [M+D]): randomize says to use randomize_with."""
    m = DiscreteLaplace(1.0, [0, 1])
    assert m.variable_draws is True
    with pytest.raises(TypeError, match="randomize_with"):
        m.randomize(np.zeros(3), np.zeros((3, 2), dtype=np.uint64))


# -- privacy ---------------------------------------------------------------------------------

@pytest.mark.parametrize("eps,G", [(0.7, 4), (0.7, 256), (3.0, 2), (1.25, 7)])
def test_realized_ldp_is_exactly_eps(eps, G):
    """Exact channel P(y | i) = pmf(y - i) (Ghosh, Roughgarden, Sundararajan, STOC 2009,
    docs/formulas.md 10.2 [M]; eps from its decimal text, Mironov CCS 2012 / docs/formulas.md 10.1 [D]
    advice): the log-ratio between the extreme inputs 0 and G reaches eps for outputs outside
    [0, G] and never exceeds it; all other input pairs stay below; max_log_ratio() is exactly
    eps, and G * s / t equals the decimal rational."""
    m = DiscreteLaplace(eps, [0.0, 1.0], G)
    assert Fraction(m.s, m.t) * G == Fraction(repr(eps))
    assert m.max_log_ratio() == eps
    y = np.arange(-3 * G - 5, 4 * G + 6)
    lr = np.log(m.report_pmf(y, 0)) - np.log(m.report_pmf(y, G))
    assert np.max(np.abs(lr)) == pytest.approx(eps, rel=1e-12)
    assert lr[0] == pytest.approx(eps, rel=1e-12) and lr[-1] == pytest.approx(-eps, rel=1e-12)
    if G <= 16:
        i = np.arange(G + 1)
        P = m.report_pmf(y[None, :], i[:, None])
        worst = np.max(np.log(P.max(axis=0)) - np.log(P.min(axis=0)))
        assert worst <= eps * (1 + 1e-12)


def test_epsilon_is_its_decimal_rational():
    """eps 0.7 is 7/10, not the binary double (Mironov, CCS 2012, docs/formulas.md 10.1 [D] advice:
    exact rational arithmetic): for G = 256, eps/G = 7/2560; a numpy float works the same;
    integer eps is accepted."""
    m = DiscreteLaplace(0.7, [0, 1])
    assert m.grid == DEFAULT_GRID
    assert (m.epsilon_exact, m.s, m.t) == (Fraction(7, 10), 7, 2560)
    m2 = DiscreteLaplace(np.float64(0.7), [0, 1])
    assert (m2.s, m2.t) == (7, 2560) and type(m2.to_spec()["epsilon"]) is float
    assert DiscreteLaplace(2, [0, 1], 4).to_spec()["epsilon"] == 2.0


# -- output alphabet, spec, errors ------------------------------------------------------

def test_count_invalid():
    """The report alphabet is the lattice lo + k * step, k any integer (two-sided geometric noise,
    Ghosh et al. STOC 2009, docs/formulas.md 10.2 [M]): real reports (also beyond the bounds) are all
    valid; off-lattice, NaN, infinite, null and non-numeric values are counted."""
    m = DiscreteLaplace(0.5, [10.0, 20.0], 10)
    x = np.random.default_rng(3).uniform(10, 20, 3000)
    out = release(m, x, row0=0)
    assert (out < 10).any() and (out > 20).any()
    assert m.count_invalid([pa.array(out)]) == 0
    assert m.count_invalid([pa.chunked_array([pa.array(out[:10]), pa.array(out[10:])])]) == 0
    bad = pa.array([10.0, 10.5, float("nan"), float("inf"), None, 10.0 - 1000.0, 13.0 + 1e-6, 1e300])
    assert m.count_invalid([bad]) == 6  # 10.5, nan, inf, null, 13.000001, 1e300 (beyond 2^53 steps)
    assert m.count_invalid([pa.array([10, 11, 25, -3], type=pa.int64())]) == 0
    assert m.count_invalid([pa.array(["10", "11"])]) == 2


def test_spec_round_trip():
    """to_spec/from_spec round-trip exactly through JSON and through the registry's build
    (the manifest's path); the spec holds exactly mechanism, epsilon, bounds, grid (docs/formulas.md
    10.2 [M] parameters: eps and the grid's sensitivity G)."""
    m = DiscreteLaplace(0.7, [-3, 12.5], 100)
    spec = m.to_spec()
    assert set(spec) == {"mechanism", "epsilon", "bounds", "grid"}
    assert spec == {"mechanism": "discrete-laplace", "epsilon": 0.7, "bounds": [-3.0, 12.5], "grid": 100}
    back = build(json.loads(json.dumps(spec)))
    assert isinstance(back, DiscreteLaplace) and back.to_spec() == spec
    assert (back.s, back.t) == (m.s, m.t)
    assert DiscreteLaplace.from_spec({"mechanism": "discrete-laplace", "epsilon": 1.0,
                                      "bounds": [0, 1]}).grid == DEFAULT_GRID
    assert m.output_fields("pay") == [pa.field("pay", pa.float64())]
    assert m.words_per_row == 2 and m.kind == "numeric"
    assert "discrete-laplace" in m.describe() and "7/10" in m.describe()
    with pytest.raises(PolicyError):
        DiscreteLaplace.from_spec({"mechanism": "piecewise", "epsilon": 1.0, "bounds": [0, 1]})


@pytest.mark.parametrize("kwargs,field", [
    ({"epsilon": 0}, "epsilon"), ({"epsilon": -1.0}, "epsilon"), ({"epsilon": float("nan")}, "epsilon"),
    ({"epsilon": float("inf")}, "epsilon"), ({"epsilon": True}, "epsilon"), ({"epsilon": "1"}, "epsilon"),
    ({"epsilon": 0.1 + 0.2}, "epsilon"), ({"epsilon": 1 / 3}, "epsilon"),
    ({"bounds": [5, 5]}, "bounds"), ({"bounds": [6, 5]}, "bounds"), ({"bounds": [0, float("inf")]}, "bounds"),
    ({"bounds": [0]}, "bounds"), ({"bounds": None}, "bounds"), ({"bounds": [-1e308, 1e308]}, "bounds"),
    ({"grid": 0}, "grid"), ({"grid": 4097}, "grid"), ({"grid": 2.0}, "grid"), ({"grid": True}, "grid"),
])
def test_bad_parameters_raise_policy_error(kwargs, field):
    """Construction errors are PolicyError naming the mechanism and the field (house rule);
    an eps whose decimal text is too long for exact rational sampling (Canonne, Kamath, Steinke
    2020, docs/formulas.md 10.3 [M+D]) is refused rather than approximated."""
    args = {"epsilon": 1.0, "bounds": [0, 1], "grid": 16, **kwargs}
    with pytest.raises(PolicyError) as err:
        DiscreteLaplace(args["epsilon"], args["bounds"], args["grid"])
    msg = str(err.value)
    assert "discrete-laplace" in msg and f"'{field}'" in msg
    assert "\n" not in msg
