"""Mechanism ``matrix``: post-randomization with a steward-supplied transition matrix.

Paper: J. M. Gouweleeuw, P. Kooiman, L. C. R. J. Willenborg, P.-P. de Wolf, "Post
Randomisation for Statistical Disclosure Control: Theory and Implementation", Journal of
Official Statistics 14(4), 1998 (docs/formulas.md section 11: unbiased moment estimator [M+D],
LDP correspondence of a transition matrix [D]).  GRR: T. Wang, J. Blocki, N. Li, S. Jha,
"Locally Differentially Private Protocols for Frequency Estimation", USENIX Security 2017
(docs/formulas.md sections 0.3 and 2.1, [M+D]).

All release randomness is the keyed PRF under the fixed test key and nonce, so every Monte
Carlo check is deterministic; numpy's seeded generator only makes input data.  Tolerances:
5 SE for means, 10% for variances (and the test asserts that 10% is several SE wide).
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pyarrow as pa
import pytest
from conftest import FIXED_KEY_BYTES, FIXED_NONCE, keyed_words, realized_channel

from ldptransform.errors import PolicyError
from ldptransform.estimate import CategoricalStats
from ldptransform.mechanisms.base import build
from ldptransform.mechanisms.categorical import GRR, FrequencyOracle
from ldptransform.mechanisms.matrix import Matrix, grr_matrix

CATS4 = ["north", "south", "east", "west"]
# An asymmetric matrix; column ratios 5, 5.5, 4.5, 5.5, so it gives eps = ln 5.5.
ASYM = [[0.50, 0.20, 0.20, 0.10],
        [0.15, 0.55, 0.10, 0.20],
        [0.10, 0.25, 0.45, 0.20],
        [0.10, 0.10, 0.25, 0.55]]
ASYM_EPS = math.log(5.5)


def words(name: str, n: int, m: FrequencyOracle) -> np.ndarray:
    return keyed_words(name, n, m.words_per_row, key=FIXED_KEY_BYTES, nonce=FIXED_NONCE, stream="test")


def refusal(eps, cats, matrix) -> str:
    with pytest.raises(PolicyError) as err:
        Matrix(eps, cats, matrix)
    msg = str(err.value)
    assert msg.startswith("mechanism matrix, field 'matrix'") and "\n" not in msg
    return msg


# -- validation --------------------------------------------------------------------------

def test_matrix_beyond_eps_is_refused_with_the_eps_it_gives():
    """docs/formulas.md section 11 [D] (Gouweleeuw et al., JOS 1998; LDP iff column ratio <= e^eps):
    the message states the eps the realized matrix gives (ln 5.5) and the column attaining it."""
    msg = refusal(1.5, CATS4, ASYM)
    found = re.search(r"gives eps = ([0-9.]+)", msg)
    assert found is not None, msg
    got = float(found.group(1))
    assert abs(got - ASYM_EPS) < 1e-8
    assert "column 1 ('south')" in msg and "at least 1.704749" in msg and "flatten column 1" in msg
    # just below the matrix's own eps: refused; at it: accepted, and the realized eps is within it
    refusal(ASYM_EPS * (1 - 1e-9), CATS4, ASYM)
    m = Matrix(ASYM_EPS, CATS4, ASYM)
    assert m.max_log_ratio() <= ASYM_EPS * (1 + 1e-12)


@pytest.mark.parametrize("matrix,needle", [
    ([[0.5, 0.5, 0.0, 0.0], [0.25] * 4, [0.25] * 4, [0.25] * 4], "unbounded likelihood ratio"),
    ([[0.5, 0.2, 0.2, 0.1], [0.3, 0.3, 0.2, 0.1]] + ASYM[2:], "sums to 0.9"),
    ([[0.4, 0.2, 0.2, 0.2], [0.4, 0.2, 0.2, 0.2], [0.2, 0.2, 0.4, 0.2], [0.2, 0.2, 0.2, 0.4]], "singular"),
    ([[0.4, 0.2, 0.2, 0.2], [0.4 + 1e-10, 0.2 - 1e-10, 0.2, 0.2], [0.2, 0.2, 0.4, 0.2],
      [0.2, 0.2, 0.2, 0.4]], "condition number"),
    ([row[:3] for row in ASYM[:3]], "has 3 rows"),
    ([[0.5, 0.5]] + ASYM[1:], "row 0 ('north') has 2 entries"),
    ([[float("nan"), 0.5, 0.25, 0.25]] + ASYM[1:], "not a finite number"),
    ([["0.5", 0.2, 0.2, 0.1]] + ASYM[1:], "not a number"),
    ("0.5 0.5", "list of rows"),
], ids=["zero", "row-sum", "singular", "ill-conditioned", "shape-rows", "shape-cols", "nan", "string", "scalar"])
def test_bad_matrices_are_refused(matrix, needle):
    """Gouweleeuw et al., JOS 1998 (docs/formulas.md section 11 [D]): a zero entry breaks LDP, rows of
    a Markov matrix sum to 1, and decoding needs an invertible, well-conditioned matrix."""
    msg = refusal(10.0, CATS4, matrix)
    assert needle in msg, msg


def test_row_sum_message_names_the_row_and_its_sum():
    """Gouweleeuw et al., JOS 1998 (docs/formulas.md section 11, rows of P sum to 1)."""
    bad = [list(r) for r in ASYM]
    bad[2] = [0.10, 0.25, 0.45, 0.30]
    msg = refusal(10.0, CATS4, bad)
    assert "row 2 ('east') sums to 1.1" in msg
    # within 1e-9 is accepted
    ok = [list(r) for r in ASYM]
    ok[2][0] += 5e-10
    Matrix(2.0, CATS4, ok)


def test_zero_entry_names_row_and_column():
    """docs/formulas.md section 11 [D]: zero entries are forbidden (ratio infinite)."""
    bad = [list(r) for r in ASYM]
    bad[3] = [0.0, 0.2, 0.25, 0.55]
    assert "row 3 ('west'), column 0 ('north')" in refusal(10.0, CATS4, bad)


# -- GRR as a matrix ---------------------------------------------------------------------

def test_grr_matrix_decodes_exactly_as_grr():
    """docs/formulas.md section 11 [D]: GRR is the transition matrix with p* on the diagonal and q*
    off it, and (P^T)^{-1} T* reproduces the GRR estimator of section 2.1 (Wang, Blocki, Li,
    Jha, USENIX Security 2017) -- on the same reports, with the same variances."""
    eps, k, n = 1.2, 6, 20000
    cats = [f"c{i}" for i in range(k)]
    g = GRR(eps, cats)
    m = Matrix(eps, cats, grr_matrix(eps, k))
    assert abs(m.actual_epsilon - eps) < 1e-12 and m.max_log_ratio() <= eps * (1 + 1e-12)
    assert np.abs(m.channel() - g.channel()).max() < 1e-14
    x = np.random.default_rng(3).choice(k, size=n, p=[0.4, 0.25, 0.15, 0.1, 0.06, 0.04])
    reports = g.randomize(x, words("grr-as-matrix", n, g))
    sg, sm = CategoricalStats(g, joint=True), CategoricalStats(m, joint=True)
    sg.add(reports)
    sm.add(reports)
    (eg, seg), (em, sem) = sg.estimates(), sm.estimates()
    assert eg is not None and seg is not None and em is not None and sem is not None
    np.testing.assert_allclose(em, eg, rtol=0, atol=1e-12)
    np.testing.assert_allclose(sem, seg, rtol=1e-9)
    np.testing.assert_allclose(sm.covariance(), sg.covariance(), rtol=1e-9, atol=1e-18)
    np.testing.assert_allclose(m.row_estimates(reports), g.row_estimates(reports), rtol=0, atol=1e-12)
    f = np.bincount(x, minlength=k) / n
    np.testing.assert_allclose(m.variance(f), g.variance(f), rtol=1e-10)
    assert m.total_variance() == pytest.approx(g.total_variance(), rel=1e-10)


# -- the realized channel ------------------------------------------------------------------

def test_sampler_realizes_the_exact_channel():
    """Gouweleeuw et al., JOS 1998: the published category is drawn from row x of P; the sampler
    realizes channel() exactly (bisection over the PRF word, tests/conftest.py)."""
    m = Matrix(2.0, CATS4, ASYM)
    P = realized_channel(m.randomize_codes, np.arange(4), 4)
    assert np.array_equal(P, m.channel()), np.abs(P - m.channel()).max()
    assert np.abs(m.channel() - np.array(ASYM)).max() < 1e-14
    ratios = m.channel().max(axis=0) / m.channel().min(axis=0)
    assert math.log(ratios.max()) == pytest.approx(m.max_log_ratio(), rel=1e-14)
    assert m.max_log_ratio() == pytest.approx(ASYM_EPS, rel=1e-13)


def test_realized_channel_stays_within_eps_for_grr_matrices():
    """docs/formulas.md section 11 [D]: GRR's column ratio is exactly e^eps, so its realized matrix
    must not exceed the column's eps beyond float round-off."""
    for k in (2, 3, 7, 40):
        for eps in (0.05, 0.7, 3.0, 9.0):
            m = Matrix(eps, [f"c{i}" for i in range(k)], grr_matrix(eps, k))
            Q = m.channel()
            assert (Q.sum(axis=1) == 1.0).all()
            assert (Q.max(axis=0) <= math.exp(eps) * Q.min(axis=0) * (1 + 1e-12)).all()


# -- Monte Carlo: unbiasedness and exact variance ---------------------------------------------

def test_asymmetric_matrix_unbiased_and_variance_matches():
    """Gouweleeuw et al., JOS 1998 (docs/formulas.md section 11, T^ = (P^T)^{-1} T*, [M+D]): over R
    releases of the same data, the mean of the decoded frequencies is within 5 SE of the truth
    and their empirical variance within 10% of variance() (exact, derived for a fixed data set)."""
    m = Matrix(1.75, CATS4, ASYM)
    n, R = 400, 10000
    x = np.random.default_rng(11).choice(4, size=n, p=[0.55, 0.25, 0.15, 0.05])
    f = np.bincount(x, minlength=4) / n
    codes = m.randomize_codes(np.tile(x, R), words("asym-mc", n * R, m)).reshape(R, n)
    hist = (codes[:, :, None] == np.arange(4)).sum(axis=1)           # (R, k)
    est = hist @ m.inverse / n                                        # (R, k) decoded frequencies
    var = m.variance(f) / n                                           # exact Var of each estimate
    se_mean = np.sqrt(var / R)
    assert (np.abs(est.mean(axis=0) - f) <= 5 * se_mean).all(), (est.mean(axis=0) - f) / se_mean
    rel = est.var(axis=0, ddof=1) / var - 1
    assert 0.10 >= 4 * math.sqrt(2 / (R - 1))                         # 10% is > 4 SE of a sample variance
    assert (np.abs(rel) <= 0.10).all(), rel


def test_variance_matches_exact_enumeration_and_decoder_statistics():
    """docs/formulas.md section 11 (Cov(T^) = (P^T)^{-1} V P^{-1}, [M+D]): variance() equals the central
    second moment of u(Y) = W[Y] enumerated over the channel, its diagonal, and the decoder's sums
    and covariance equal the row estimates' sample moments."""
    m = Matrix(1.75, CATS4, ASYM)
    P, W = m.channel(), m.inverse
    np.testing.assert_allclose(P @ W, np.eye(4), atol=1e-13)           # E[u | x] = e_x
    f = np.array([0.1, 0.4, 0.2, 0.3])
    central = np.array([[(P[x] * (W[:, v] - (x == v)) ** 2).sum() for v in range(4)] for x in range(4)])
    np.testing.assert_allclose(m.variance(f), f @ central, rtol=1e-12)
    V = sum(f[x] * (np.diag(P[x]) - np.outer(P[x], P[x])) for x in range(4))
    np.testing.assert_allclose(np.diag(W.T @ V @ W), m.variance(f), rtol=1e-10)
    assert m.total_variance() == pytest.approx(max(central[x].sum() for x in range(4)), rel=1e-12)
    assert m.total_variance() > float(m.variance(f).sum())             # worst case over data sets
    with pytest.raises(ValueError):
        m.variance(0.3)

    x = np.random.default_rng(5).choice(4, size=3000)
    reports = m.randomize(x, words("asym-decoder", 3000, m))
    u = m.row_estimates(reports)
    st = CategoricalStats(m, joint=True)
    st.add([reports[0].slice(0, 1000)])
    st2 = CategoricalStats(m, joint=True)
    st2.add([reports[0].slice(1000)])
    st.merge(st2)
    total, sq = st.sums()
    np.testing.assert_allclose(total, u.sum(axis=0), rtol=1e-12)
    np.testing.assert_allclose(sq, (u ** 2).sum(axis=0), rtol=1e-12)
    np.testing.assert_allclose(st.covariance(), np.cov(u, rowvar=False) / len(u), rtol=1e-9, atol=1e-15)


# -- output, alphabet, spec ------------------------------------------------------------------

def test_output_labels_invalid_reports_and_pure_protocol_hooks():
    """Gouweleeuw et al., JOS 1998: the published value is a category label of the domain."""
    m = Matrix(2.0, CATS4, ASYM)
    assert m.words_per_row == 2 and m.kind == "categorical" and m.summary_size == 4
    out = m.randomize(np.array([0, 1, 2, 3]), words("labels", 4, m))
    assert out[0].type == m.output_fields("region")[0].type
    assert set(out[0].dictionary_decode().to_pylist()) <= set(CATS4)
    assert m.count_invalid(out) == 0
    bad = [pa.array(["north", "up", None, "west"])]
    assert m.count_invalid(bad) == 2
    assert m.summarize(bad).tolist() == [1, 0, 0, 1]
    u = m.row_estimates(bad)
    assert (u[1:3] == 0).all() and np.array_equal(u[0], m.inverse[0])
    assert m.support(bad).sum(axis=1).tolist() == [1, 0, 0, 1]
    with pytest.raises(NotImplementedError, match="not a pure protocol"):
        _ = m.p_star
    with pytest.raises(NotImplementedError):
        _ = m.q_star


def test_spec_round_trip_rebuilds_the_same_channel():
    """Gouweleeuw et al., JOS 1998: the manifest records eps, categories and the supplied matrix
    exactly, and rebuilding gives the identical realized channel (docs/formulas.md section 11)."""
    odd = [[0.1 / 3, 0.7 - 0.1 / 3, 0.3], [0.2, 0.3, 0.5], [0.25, 0.125, 0.625]]
    odd[0][2] = 1.0 - odd[0][0] - odd[0][1]
    m = Matrix(3.0, ["a", "b", "c"], np.array(odd))
    spec = json.loads(json.dumps(m.to_spec()))
    assert spec == {"mechanism": "matrix", "epsilon": 3.0, "categories": ["a", "b", "c"], "matrix": odd}
    m2 = build(spec)
    assert isinstance(m2, Matrix) and m2.to_spec() == m.to_spec()
    assert np.array_equal(m2.channel(), m.channel()) and m2.actual_epsilon == m.actual_epsilon
    with pytest.raises(PolicyError):
        Matrix.from_spec({**spec, "mechanism": "grr"})
    with pytest.raises(PolicyError, match="field 'matrix'"):
        build({k: v for k, v in spec.items() if k != "matrix"})
