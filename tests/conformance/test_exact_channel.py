"""Exact thresholds: the channel every threshold sampler realizes is at most e^eps, in exact
rational arithmetic (docs/formulas.md section 10.4).

The threshold samplers (grr, oue, sue, olh, hadamard, subset) turn a 64-bit PRF word w into an
event by the integer comparison ``w < T``, so the realized probabilities are T / 2^64 exactly.
For each of them, over a grid of eps (0.01 .. 10) and domain sizes (2 .. 4096), this file

* reads the integer thresholds the mechanism samples with (``thresholds``) and checks, with
  crafted words on both sides of every threshold, that the sampler really switches there;
* recomputes the realized channel's worst likelihood ratio from those integers with
  ``fractions.Fraction`` (here, not with the mechanism's ``realized_ratio``), and checks it is at
  most a certified lower bound of e^eps, and that it agrees with the mechanism's own figures;
* shows that the check can fail: the thresholds the samplers used before (the float
  probability rounded up to the 2^-53 grid, with the other category reduced modulo k-1) break
  it at many points of the grid, by up to about 1e-12 relative;
* checks that ``validate`` reports a realized channel above e^eps.

How e^eps is certified (``_exp_bounds``, independent of the package's bounds, which it is also
compared with): eps is a binary float, so x = Fraction(eps) is exactly the number the
mechanism uses.  The partial sum S_n = sum_{j<=n} x^j / j! (exact rationals, every term
positive) is below e^x; once n + 2 > 2x each further term is at most half the one before,
so the tail is at most 2 x^(n+1) / (n+1)! and S_n plus that is above e^x.  The sum runs until
that tail is below 2^-200 S_n, so lower and upper bound are within 2^-200 relative.
"""

from __future__ import annotations

import itertools
import math
from fractions import Fraction
from types import SimpleNamespace
from typing import Any, cast

import numpy as np
import pytest

from ldptransform.mechanisms import GRR, OLH, OUE, SUE, HadamardResponse, SubsetSelection, registry
from ldptransform.mechanisms.hadamard import odd_parity
from ldptransform.random.variates import _rounded_masses, exp_bounds, integer_masses, masses_ratio
from ldptransform.validate import _channel_issues

W = 1 << 64
EPS_GRID = (0.01, 0.1, 1.0, 4.0, 8.0, 10.0)
K_GRID = (2, 3, 5, 16, 100, 1000, 4096)
GRID = [(e, k) for e in EPS_GRID for k in K_GRID]


def cats(k: int) -> list[str]:
    return [f"c{i}" for i in range(k)]


def _exp_bounds(eps: float) -> tuple[Fraction, Fraction]:
    """Certified lo <= e^eps <= hi by the plain Taylor series (module docstring)."""
    x = Fraction(eps)
    term, total, n = Fraction(1), Fraction(1), 0
    while True:
        n += 1
        term = term * x / n
        total += term
        nxt = term * x / (n + 1)
        if n + 2 > 2 * x and 2 * nxt < total / (1 << 200):
            return total, total + 2 * nxt


_BOUNDS = {e: _exp_bounds(e) for e in EPS_GRID}


def lower(eps: float) -> Fraction:
    return _BOUNDS[eps][0]


def upper(eps: float) -> Fraction:
    return _BOUNDS[eps][1]


def test_certified_bounds_of_e_to_the_eps() -> None:
    """The test's bounds bracket math.exp within float precision, are within 2^-190 of each
    other, and overlap the package's bounds (each interval certified its own way)."""
    for e in EPS_GRID:
        lo, hi = _BOUNDS[e]
        assert lo < hi and (hi - lo) / lo < Fraction(1, 1 << 190)
        assert abs(float(lo) / math.exp(e) - 1) < 4e-16
        plo, phi = exp_bounds(e)
        assert plo <= hi and lo <= phi and plo < phi


# -- the realized channel, recomputed from the integer thresholds --------------------------------

def keep_channel(Tk: int, outputs: int) -> tuple[Fraction, int, int]:
    """grr and olh: word 0 < Tk keeps the value, else word 1 mod c numbers the other value when
    word 1 < a c (a = floor(2^64 / c), c = outputs - 1), and the r = 2^64 - a c words left over
    keep it too.
    Exact masses in units of 2^-128: own = Tk 2^64 + (2^64 - Tk) r, each other value
    (2^64 - Tk) a; every column holds own once and other for the other inputs.  Returns the worst
    ratio and the two masses."""
    c = outputs - 1
    a, r = divmod(W, c)
    own, other = Tk * W + (W - Tk) * r, (W - Tk) * a
    assert own + c * other == W * W and own >= 1 and other >= 1
    return Fraction(max(own, other), min(own, other)), own, other


def unary_ratio(Tp: int, Tq: int) -> Fraction:
    """Independent bits, P(1) = Tp / 2^64 at the row's value and Tq / 2^64 elsewhere: two inputs
    differ in two positions, so the ratio of an output is a(b_x)/b(b_x) * b(b_x')/a(b_x')."""
    a = {1: Fraction(Tp, W), 0: Fraction(W - Tp, W)}
    b = {1: Fraction(Tq, W), 0: Fraction(W - Tq, W)}
    return max(a[u] / b[u] * b[v] / a[v] for u in (0, 1) for v in (0, 1))


def check_keep_sampler(codes: Any, Tk: int, outputs: int, x: int) -> None:
    """The sampler's output as a function of its two words switches exactly at Tk (word 0) and at
    a c (word 1): words 0 below Tk keep x; above, word 1 below a c gives the other value number
    word 1 mod c, and word 1 >= a c keeps x."""
    c = outputs - 1
    a, r = divmod(W, c)
    cases = [(0, W - 1), (Tk - 1, 0), (Tk - 1, W - 1)]
    cases += [(w0, v) for w0 in (Tk, W - 1) for j in sorted({0, c // 2, c - 1}) for v in (j, a * c - c + j)]
    if r:
        cases += [(Tk, a * c), (W - 1, W - 1)]
    w0 = np.array([u for u, _ in cases], dtype=np.uint64)
    w1 = np.array([v for _, v in cases], dtype=np.uint64)
    for (u, v), y in zip(cases, codes(w0, w1, x)):
        if u < Tk or v >= a * c:
            assert y == x, (u, v, y)
        else:
            j = v % c
            assert y == j + (j >= x), (u, v, y)


@pytest.mark.parametrize("eps,k", GRID)
def test_grr_realized_channel(eps: float, k: int) -> None:
    m = GRR(eps, cats(k))
    ratio, own, other = keep_channel(m.keep_threshold, k)
    assert ratio <= lower(eps) and m.thresholds == (own, other)
    assert m.realized_ratio() == ratio and math.log(ratio) == pytest.approx(m.max_log_ratio(), abs=1e-12)
    assert (m.p_star, m.q_star) == (own / W ** 2, other / W ** 2)

    def codes(w0: np.ndarray, w1: np.ndarray, x: int) -> np.ndarray:
        return m.randomize_codes(np.full(len(w0), x), np.stack([w0, w1], axis=1))
    check_keep_sampler(codes, m.keep_threshold, k, k // 2)


@pytest.mark.parametrize("eps,k", GRID)
def test_olh_realized_channel(eps: float, k: int) -> None:
    """Given the seed (drawn independently of x) olh is grr's sampler on its g buckets; the
    largest hash range (2^30 - 1) at eps 0.01 is where a one-word scheme would be too coarse."""
    for g in sorted({OLH.best_hash_range(eps), 2, 1000, (1 << 30) - 1}):
        m = OLH(eps, cats(k), g)
        ratio, own, other = keep_channel(m.keep_threshold, g)
        assert ratio <= lower(eps) and m.realized_ratio() == ratio and m.thresholds == (own, other)
        assert m.p_star == own / W ** 2
        # the realized ratio is the ideal e^eps to within 1e-9 relative even with 2^30 buckets
        assert float(ratio / lower(eps)) > 1 - 1e-9

        def codes(w0: np.ndarray, w1: np.ndarray, x: int, m: OLH = m) -> np.ndarray:
            words = np.zeros((len(w0), 4), dtype=np.uint64)
            words[:, 2], words[:, 3] = w0, w1     # words 0, 1 = 0: a = 1, b = 0, H(v) = floor(v g / P)
            h = int(m.hash_values(np.array([HASH_SEED], dtype=np.uint64), np.array([x]))[0])
            y = m.randomize(np.full(len(w0), x), words)[1].to_numpy()
            return np.where(y == h, 0, np.where(y < h, y + 1, y))  # bucket y as rr with h first
        check_keep_sampler(codes, m.keep_threshold, g, 0)


HASH_SEED = (1 << 31) - 1   # a = 1, b = 0 (seed a*P + b)


@pytest.mark.parametrize("eps,k", GRID)
@pytest.mark.parametrize("cls", [OUE, SUE])
def test_unary_realized_channel(cls: type[OUE] | type[SUE], eps: float, k: int) -> None:
    m = cls(eps, cats(k))
    Tp, Tq = m.thresholds
    if cls is OUE:
        assert Tp == W // 2
    else:
        assert Tp + Tq == W
    ratio = unary_ratio(Tp, Tq)
    assert ratio <= lower(eps) and m.realized_ratio() == ratio
    assert (m.p_star, m.q_star) == (Tp / W, Tq / W)
    x = k - 1
    for T, pos in ((Tp, x), (Tq, 0 if x else 1)):
        words = np.full((4, k), W - 1, dtype=np.uint64)
        words[:, pos] = [0, T - 1, T, W - 1]
        bits = m.randomize_bits(np.full(4, x), words)
        assert bits[:, pos].tolist() == [True, True, False, False]


@pytest.mark.parametrize("eps,k", GRID)
def test_hadamard_realized_channel(eps: float, k: int) -> None:
    m = HadamardResponse(eps, cats(k))
    (Tp,) = m.thresholds
    # Q(y|x) = 2 Tp / (K 2^64) on C_x, 2 (2^64 - Tp) / (K 2^64) off it (u is exactly uniform)
    ratio = Fraction(max(Tp, W - Tp), min(Tp, W - Tp))
    assert ratio <= lower(eps) and m.realized_ratio() == ratio and m.p_star == Tp / W
    words = np.zeros((3, 2), dtype=np.uint64)
    words[:, 0] = [Tp - 1, Tp, W - 1]
    y = m.randomize_index(np.zeros(3, dtype=np.int64), words)
    assert (~odd_parity(y & 1)).tolist() == [True, False, False]    # y in C_0 (Hadamard row 1)


def subset_ratio_bound(k: int, msize: int, Tp: int) -> Fraction:
    """An upper bound of the realized worst ratio of subset, computed from the exact word counts
    of every shuffle step (no relaxation): step i reduces a word modulo n_i = k-1-i, so each of its
    positions has a_i or a_i + 1 words (a_i = floor(2^64 / n_i)); a set of s picks has probability
    between s! prod a_i / 2^64^s and s! prod h_i / 2^64^s (h_i = a_i + 1 unless n_i divides 2^64)."""
    complement = 2 * msize > k
    s_in, s_out = (k - msize, k - 1 - msize) if complement else (msize - 1, msize)

    def extremes(s: int) -> tuple[Fraction, Fraction]:
        lo = hi = math.factorial(s)          # integer products, one division at the end
        for i in range(s):
            a, r = divmod(W, k - 1 - i)
            lo *= a
            hi *= a + (r > 0)
        return Fraction(lo, W ** s), Fraction(hi, W ** s)

    (lo_in, hi_in), (lo_out, hi_out) = extremes(s_in), extremes(s_out)
    p, q = Fraction(Tp, W), Fraction(W - Tp, W)
    return max(p * hi_in / (q * lo_out), q * hi_out / (p * lo_in), hi_in / lo_in, hi_out / lo_out)


def subset_sizes(eps: float, k: int) -> list[int]:
    return sorted({SubsetSelection.best_subset_size(eps, k), 1, k - 1, max(1, k // 2)})


@pytest.mark.parametrize("eps,k", GRID)
def test_subset_realized_channel(eps: float, k: int) -> None:
    for msize in subset_sizes(eps, k):
        m = SubsetSelection(eps, cats(k), msize)
        (Tp,) = m.thresholds
        bound = subset_ratio_bound(k, msize, Tp)
        assert bound <= m.realized_ratio() <= lower(eps)
        assert m.p_star == Tp / W
        words = np.zeros((2, m.words_per_row), dtype=np.uint64)
        words[:, 0] = [Tp - 1, Tp]
        bits = m.randomize_bits(np.zeros(2, dtype=np.int64), words)
        assert bits[:, 0].tolist() == [True, False]


@pytest.mark.parametrize("eps", EPS_GRID)
@pytest.mark.parametrize("k,msize", [(2, 1), (4, 1), (4, 3), (5, 2), (5, 3), (6, 3), (6, 4)])
def test_subset_exact_channel_by_enumeration(eps: float, k: int, msize: int) -> None:
    """Small domains: the exact realized channel, every shuffle sequence weighted by its exact
    number of words (step i: residue t of n_i = k-1-i has a_i + 1 words if t < 2^64 mod n_i,
    else a_i), run through the sampler itself; its worst ratio is at most the mechanism's bound,
    which is at most e^eps."""
    m = SubsetSelection(eps, cats(k), msize)
    (Tp,) = m.thresholds
    D = m.words_per_row - 1
    steps = [k - 1 - i for i in range(D)]
    seqs = list(itertools.product(*[range(n) for n in steps]))
    weight = []
    for seq in seqs:
        wgt = Fraction(1)
        for t, n in zip(seq, steps):
            a, r = divmod(W, n)
            wgt *= Fraction(a + (t < r), W)
        weight.append(wgt)
    assert sum(weight) == 1
    chan: dict[tuple[int, str], Fraction] = {}
    for word0, branch in ((0, Fraction(Tp, W)), (W - 1, Fraction(W - Tp, W))):
        for x in range(k):
            words = np.zeros((len(seqs), 1 + D), dtype=np.uint64)
            words[:, 0] = word0
            if D:
                words[:, 1:] = np.array(seqs, dtype=np.uint64)
            reports = m.randomize(np.full(len(seqs), x), words)[0].to_pylist()
            for rep, wgt in zip(reports, weight):
                chan[(x, rep)] = chan.get((x, rep), Fraction(0)) + branch * wgt
    outs = {rep for _, rep in chan}
    assert len(outs) == math.comb(k, msize)
    worst = max(max(chan[(x, s)] for x in range(k)) / min(chan[(x, s)] for x in range(k)) for s in outs)
    assert worst <= m.realized_ratio() <= lower(eps)


# -- the check can fail: the float-rounded thresholds used before --------------------------------

def old_grr_ratio(eps: float, k: int) -> Fraction:
    """The previous grr: keep iff (w >> 11) 2^-53 < p (p the float e^eps/(e^eps+k-1)), so
    P(keep) = ceil(p 2^53) / 2^53; the other value by a second word modulo k-1, so the rarest
    other value has floor(2^64 / (k-1)) words.  Its worst ratio is at least P(keep) over that."""
    e = math.exp(eps)
    P = Fraction(math.ceil(e / (e + k - 1) * (1 << 53)), 1 << 53)
    return P / ((1 - P) * Fraction(W // (k - 1), W))


def old_hadamard_ratio(eps: float) -> Fraction:
    P = Fraction(math.ceil(1.0 / (1.0 + math.exp(-eps)) * (1 << 53)), 1 << 53)
    return P / (1 - P)


def test_old_float_rounded_thresholds_fail_the_exact_check() -> None:
    """Rounding the float probability up to the 2^-53 grid realizes ratios above e^eps (above
    the certified upper bound, so certainly above) at most points of the grid: the exact check
    above would have failed.  The largest excess is about 1e-12 relative."""
    grr_bad = [(e, k) for e, k in GRID if old_grr_ratio(e, k) > upper(e)]
    had_bad = [e for e in EPS_GRID if old_hadamard_ratio(e) > upper(e)]
    assert len(grr_bad) >= len(GRID) // 2 and len(had_bad) >= len(EPS_GRID) - 1
    worst = max(float(old_grr_ratio(e, k) / lower(e)) - 1 for e, k in GRID)
    assert 1e-13 < worst < 1e-11
    for e, k in grr_bad:
        new = GRR(e, cats(k)).realized_ratio()
        assert new is not None and new <= lower(e) < old_grr_ratio(e, k)


# -- validate reports the realized channel ---------------------------------------------------------

def _manifest(spec: dict[str, Any]) -> Any:
    return cast(Any, SimpleNamespace(columns=[SimpleNamespace(name="site", mechanism=spec)]))


def test_validate_checks_the_realized_channel(monkeypatch: pytest.MonkeyPatch) -> None:
    """``validate``'s privacy check passes the real thresholds and reports a channel whose integer
    thresholds realize a ratio above e^eps (the old grr at eps 10, k 2), although its float eps
    (``max_log_ratio``) is within the usual 1e-9."""
    spec = GRR(10.0, cats(2)).to_spec()
    issues: list[str] = []
    assert _channel_issues(_manifest(spec), issues) == 10.0 and issues == []
    monkeypatch.setattr(GRR, "realized_ratio", lambda self: old_grr_ratio(10.0, 2))
    assert abs(math.log(old_grr_ratio(10.0, 2)) - 10.0) < 1e-9
    _channel_issues(_manifest(spec), issues)
    assert len(issues) == 1 and "integer thresholds realize" in issues[0] and "'site'" in issues[0]


# -- utility: the realized channels are the ideal ones to within about 1e-12 ----------------------

def test_utility_loss_is_negligible() -> None:
    """The realized p*, q* against the ideal ones (float formulas): the total variance
    n sum_v Var(f_v) moves by less than 2e-10 relative anywhere on the grid for grr, oue, sue,
    hadamard and subset (measured: 9.1e-11, subset at eps 0.01 with k = 4096, whose odds absorb
    the shuffle's modulo bias of about 2 min(m, k-m) k / 2^64), and by less than 2e-8 for olh with
    up to 2^30 - 1 buckets (measured: 9.1e-9 at eps 0.01, where p* is 9.4e-10 and one unit of its
    threshold is 2^-64)."""
    worst, worst_olh = 0.0, 0.0
    for eps, k in GRID:
        e = math.exp(eps)
        ideal = {"grr": (e / (e + k - 1), 1 / (e + k - 1)), "oue": (0.5, 1 / (e + 1)),
                 "sue": (math.sqrt(e) / (math.sqrt(e) + 1), 1 / (math.sqrt(e) + 1)),
                 "hadamard": (e / (e + 1), 0.5)}
        for cls in (GRR, OUE, SUE, HadamardResponse):
            m = cls(eps, cats(k))
            p, q = ideal[m.name]
            tv = k * q * (1 - q) / (p - q) ** 2 + (1 - p - q) / (p - q)
            worst = max(worst, abs(m.total_variance() / tv - 1))
        for g in sorted({OLH.best_hash_range(eps), 2, 1000, (1 << 30) - 1}):
            o = OLH(eps, cats(k), g)
            p, c = e / (e + g - 1), o.collision_probability
            q = p * c + (1 - c) * (1 - p) / (g - 1)
            tv = k * q * (1 - q) / (p - q) ** 2 + (1 - p - q) / (p - q)
            worst_olh = max(worst_olh, abs(o.total_variance() / tv - 1))
        for msize in subset_sizes(eps, k):
            s = SubsetSelection(eps, cats(k), msize)
            p = msize * e / (msize * e + k - msize)
            q = msize * ((msize - 1) * e + k - msize) / ((k - 1) * (msize * e + k - msize))
            tv = k * q * (1 - q) / (p - q) ** 2 + (1 - p - q) / (p - q)
            worst = max(worst, abs(s.total_variance() / tv - 1))
    assert worst < 2e-10 and worst_olh < 2e-8, (worst, worst_olh)


def test_a_composite_with_a_second_layer_reports_the_two_layer_ratio() -> None:
    """A memoized column's composite (permanent layer, then a second layer) samples through two
    layers: its realized ratio is the exact ratio of both (``second_layer_ratio``), within the
    certified e^eps of its stated eps; a wrong composite ratio would fail validate's check."""
    for cls in (GRR, OUE, SUE):
        m = cls(1.0, cats(5))
        composite = m.with_second_layer(2.0)
        ratio = composite.realized_ratio()
        assert ratio is not None and ratio == m.second_layer_ratio(2.0) != m.realized_ratio()
        assert ratio <= exp_bounds(composite.epsilon)[0]
        issues: list[str] = []
        _channel_issues(_manifest(composite.to_spec()), issues)
        assert issues == [], issues


@pytest.mark.parametrize("eps", EPS_GRID)
def test_hierarchy_realized_channel(eps: float) -> None:
    """hierarchy reports one data-independent level per row through that level's grr, olh or subset:
    its realized ratio is the worst level's, recomputed here from each level's keep threshold (grr,
    olh); a subset level states its own exact upper bound, at least the bound from its exact word
    counts (as test_subset_realized_channel checks it)."""
    for leaves in (16, 1024):
        m: Any = registry()["hierarchy"].from_policy(eps, (0.0, 100.0), {"branching": 4, "leaves": leaves})
        for o in m.oracles:
            if o.name == "subset":
                assert subset_ratio_bound(o.k, o.m, o.thresholds[0]) <= o.realized_ratio() <= lower(eps)
        worst = max(o.realized_ratio() if o.name == "subset" else
                    keep_channel(o.keep_threshold, o.k if o.name == "grr" else o.g)[0] for o in m.oracles)
        assert m.realized_ratio() == worst <= lower(eps)


# -- the integer-mass sampler of a finite channel (grid mechanisms, square-wave, matrix) ---------

GRID_MECHANISMS = ("two-point", "piecewise", "hybrid", "square-wave")


@pytest.mark.parametrize("eps", EPS_GRID)
@pytest.mark.parametrize("name", GRID_MECHANISMS)
def test_integer_mass_channels_are_within_e_to_the_eps(name: str, eps: float) -> None:
    """The mechanisms sampled by the integer-mass sampler (``draw_index``) realize their masses
    in units of 2^-50 exactly (``channel()`` is those masses over 2^50, exact in float64): the
    worst column ratio, as exact rationals, is at most the certified lower bound of e^eps."""
    m: Any = registry()[name].from_policy(eps, (0.0, 100.0), {})
    F = m.channel() * float(1 << 50)
    assert (F == np.floor(F)).all() and (F.sum(axis=1) == float(1 << 50)).all()
    mx, mn = F.max(axis=0), F.min(axis=0)
    worst = max(Fraction(int(a), int(b)) for a, b in zip(mx, mn) if a > 0)
    assert worst <= lower(eps)
    assert masses_ratio(F) == worst


def test_float_rounded_masses_fail_and_certified_ones_pass() -> None:
    """The float steps of ``integer_masses`` alone (``_rounded_masses``) realize binary randomized
    response at eps 0.1 (two-point's channel) above e^eps (above the certified upper bound);
    the certified masses do not, and differ from them by one unit of 2^-50 per cell at most."""
    e = math.exp(0.1)
    Q = np.array([[e, 1.0], [1.0, e]]) / (e + 1)
    old = _rounded_masses(Q, 0.1)
    new = integer_masses(Q, 0.1)
    old_ratio, new_ratio = masses_ratio(old), masses_ratio(new)
    assert old_ratio is not None and new_ratio is not None
    assert old_ratio > upper(0.1) and new_ratio <= lower(0.1)
    assert np.abs(old - new).max() <= 1 and (new.sum(axis=1) == old.sum(axis=1)).all()
