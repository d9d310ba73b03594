"""Variates: numbers of a given law made from the words of a bit source (bits.py).

Everything here is a pure function of the words it is given, so a release's outputs depend
only on which words a row draws (never on batching), and every function is exact or states
its (negligible) deviation.  All of it is vectorized over rows.

- ``to_unit``: uniforms on the 2^-53 grid in [0, 1); ``unit_below``: the comparison
  ``to_unit(w) < t`` as one integer comparison; ``to_below``: integers in [0, bound).
- ``choose_m_of_d``: a uniform m-subset of d positions per row, from one word per position
  (the column choice of ``budget.strategy: sample``).
- The integer-mass sampler of a finite channel (inputs x outputs): ``integer_masses`` holds
  the channel as whole-number masses in units of 2^-SAMPLING_BITS, ``sampling_table`` their
  cumulative sums, ``guide_table`` a guide over equal slices of [0, 2^SAMPLING_BITS), and
  ``draw_index`` draws an output per row by exact integer comparison of the top
  SAMPLING_BITS bits of one word with the cumulative masses (inverse-CDF sampling, the
  guide replacing most of the binary search).
- Exact thresholds (``THRESHOLD_ONE`` = 2^64): a threshold sampler draws an event of
  probability T/2^64 exactly as ``word < T`` (``words_below``), and ``exp_bounds`` /
  ``exp_lower_bound`` give certified rational bounds of e^eps, so the integer thresholds of
  every threshold sampler can be rounded toward privacy and checked in exact rational
  arithmetic (``keep_threshold`` and ``keep_or_other``, ``grr_thresholds`` and
  ``randomized_response``, ``odds_threshold``, ``symmetric_thresholds``, ``second_threshold``;
  docs/formulas.md section 10.4).
- Exact rejection samplers over a variable number of words per row (``RowDraws``: each
  row's own draw counter over a ``draw(rows, j)`` function): ``uniform_below`` (exactly
  uniform integers below m), ``bernoulli_exp`` (Bernoulli(exp(-num/den))) and
  ``discrete_laplace`` (two-sided geometric noise), integer arithmetic only, after C. L.
  Canonne, G. Kamath, T. Steinke, "The Discrete Gaussian for Differential Privacy", NeurIPS
  2020 (docs/formulas.md section 10.3).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from fractions import Fraction
from functools import lru_cache

import numpy as np

_U53 = 1.0 / (1 << 53)


def to_unit(words: np.ndarray) -> np.ndarray:
    """uint64 words -> floats uniform on the 2^-53 grid in [0, 1)."""
    return (words >> np.uint64(11)).astype(np.float64) * _U53


def unit_below(words: np.ndarray, t: float) -> np.ndarray:
    """``to_unit(words) < t`` exactly, by one integer comparison (no float array).

    to_unit(w) = m * 2^-53 with m = w >> 11, and for integer m, m * 2^-53 < t iff
    m < ceil(t * 2^53) iff w < ceil(t * 2^53) * 2^11 (all exact for 0 < t < 1).
    """
    t = float(t)
    if not t > 0.0:
        return np.zeros(words.shape, dtype=bool)
    if t >= 1.0:
        return np.ones(words.shape, dtype=bool)
    return words < np.uint64(math.ceil(t * (1 << 53)) << 11)


def to_below(words: np.ndarray, bound: int) -> np.ndarray:
    """uint64 words -> integers in [0, bound) by reduction modulo ``bound``.

    Each value has probability within bound / 2^64 of 1/bound (below 2^-32 relative for
    every bound the tool uses), far below anything a release of any size can detect.
    """
    return (words % np.uint64(bound)).astype(np.int64)


def choose_m_of_d(words: np.ndarray, m: int) -> np.ndarray:
    """Boolean matrix (n, d): True at the m positions of each row with the smallest words.

    The d words of a row are i.i.d. uniform, so their order is a uniform random permutation
    and its first m positions a uniform m-subset (chosen without replacement; ties have
    probability about d^2/2^65 and are broken by position)."""
    n = words.shape[0]
    chosen = np.argsort(words, axis=1, kind="stable")[:, :m]
    mask = np.zeros(words.shape, dtype=bool)
    mask[np.arange(n)[:, None], chosen] = True
    return mask


# -- exact thresholds -----------------------------------------------------------------------------

#: A threshold sampler's event of probability T / THRESHOLD_ONE is ``word < T`` for a uniform 64-bit
#: word: exact, so the channel it realizes has rational probabilities with denominator 2^64.
THRESHOLD_ONE = 1 << 64

_EXP_BITS = 320      # bits after the binary point kept by the certified bounds of e^x
#: e^x for x above EXP_CAP is bounded below by e^EXP_CAP (2^184): no 64-bit threshold can tell
#: the difference (odds above 2^64 are not realizable), and the bound stays cheap.
EXP_CAP = 128.0


def _floor_to(v: Fraction) -> Fraction:
    return Fraction(math.floor(v * (1 << _EXP_BITS)), 1 << _EXP_BITS)


def _ceil_to(v: Fraction) -> Fraction:
    return Fraction(math.ceil(v * (1 << _EXP_BITS)), 1 << _EXP_BITS)


@lru_cache(maxsize=4096)
def exp_bounds(x: float) -> tuple[Fraction, Fraction]:
    """Certified rationals lo <= e^x <= hi for a float 0 <= x <= EXP_CAP (x read exactly as the
    rational it is), with hi / lo - 1 below 2^-300.

    Certificate: y = x / 2^s <= 1/2 (exact); S = sum_{j<=n} y^j / j! (exact rationals, all terms
    >= 0) is a lower bound of e^y, and the tail sum_{j>n} y^j / j! is at most
    2 y^(n+1) / (n+1)! (each further term is at most y/(n+2) <= 1/2 of the one before), so
    S + 2 y^(n+1)/(n+1)! is an upper bound.  The bounds are rounded down and up to multiples of
    2^-320 and squared s times, rounding down and up again (squaring is increasing on positive
    numbers), which gives bounds of (e^y)^(2^s) = e^x."""
    if not (0.0 <= x <= EXP_CAP):
        raise ValueError(f"exp_bounds: x must be in [0, {EXP_CAP}], got {x!r}")
    q = Fraction(x)
    s = 0
    while q > Fraction(1, 2) * (1 << s):
        s += 1
    y = q / (1 << s)
    term, total, j = Fraction(1), Fraction(1), 0
    tiny = Fraction(1, 1 << (_EXP_BITS + 16))
    while term > tiny or j < 2:
        j += 1
        term = term * y / j
        total += term
    tail = 2 * term * y / (j + 1)
    lo, hi = _floor_to(total), _ceil_to(total + tail)
    for _ in range(s):
        lo, hi = _floor_to(lo * lo), _ceil_to(hi * hi)
    return lo, hi


def exp_lower_bound(x: float) -> Fraction:
    """A certified rational lower bound of e^x for x >= 0 (``exp_bounds``; above EXP_CAP the bound
    of e^EXP_CAP, which is below e^x since e^x increases)."""
    return exp_bounds(min(float(x), EXP_CAP))[0]


def words_below(words: np.ndarray, T: int) -> np.ndarray:
    """``words < T`` for uint64 words and an integer threshold 0 <= T <= 2^64: True with
    probability exactly T / 2^64 for a uniform word."""
    if T <= 0:
        return np.zeros(words.shape, dtype=bool)
    if T >= THRESHOLD_ONE:
        return np.ones(words.shape, dtype=bool)
    return words < np.uint64(T)


def _smallest(pred: Callable[[int], bool], lo: int, hi: int) -> int:
    """The smallest integer t in [lo, hi] with pred(t), for a pred that is monotone (False then
    True) and true at hi: a binary search, each step an exact comparison."""
    while lo < hi:
        mid = (lo + hi) // 2
        if pred(mid):
            hi = mid
        else:
            lo = mid + 1
    return lo


def grr_thresholds(bound: Fraction, outputs: int) -> tuple[int, int]:
    """Integer masses (Tp, Tq), Tp + (outputs - 1) Tq = 2^64, of randomized response over
    ``outputs`` values whose realized ratio Tp / Tq is at most ``bound`` (a certified lower bound
    of e^eps): the smallest Tq with 2^64 - (outputs - 1) Tq <= bound Tq, i.e.
    Tq = ceil(2^64 / (bound + outputs - 1)): the realized channel closest to the ideal one
    (Tq / 2^64 is within 2^-64 above 1 / (e^eps + outputs - 1), up to the bound's 2^-300)."""
    W, c = THRESHOLD_ONE, outputs - 1
    Tq = math.ceil(Fraction(W) / (bound + c))
    Tp = W - c * Tq
    if not (1 <= Tq and 1 <= Tp and Tp <= bound * Tq):
        raise ArithmeticError("grr_thresholds: no valid integer thresholds (a bug)")
    return Tp, Tq


def randomized_response(words: np.ndarray, x: np.ndarray, Tp: int, Tq: int) -> np.ndarray:
    """Randomized response over Tp + (c) Tq = 2^64 (``grr_thresholds``) from one uint64 word per
    row: w < Tp keeps x; otherwise the other value number (w - Tp) // Tq in 0..c-1 (exactly
    uniform: each holds Tq words), shifted past x.  Output int64 codes."""
    tp = np.uint64(Tp)
    other = ((np.maximum(words, tp) - tp) // np.uint64(Tq)).astype(np.int64)
    x = np.asarray(x, dtype=np.int64)
    other += other >= x
    return np.where(words < tp, x, other)


def keep_masses(Tk: int, outputs: int) -> tuple[int, int]:
    """The exact channel of ``keep_or_other`` with keep threshold Tk, as integer masses in units
    of 2^-128: (own, other), own + (outputs - 1) other = 2^128.  The other value is word 2's
    residue w mod c for w < a c, a = floor(2^64 / c), c = outputs - 1, so each other value has
    exactly a of the 2^64 words; the r = 2^64 - a c words left over report the row's own value."""
    W, c = THRESHOLD_ONE, outputs - 1
    a, r = divmod(W, c)
    return Tk * W + (W - Tk) * r, (W - Tk) * a


def keep_threshold(bound: Fraction, outputs: int) -> int:
    """The largest keep threshold Tk (at most 2^64 - 1) of ``keep_or_other`` over ``outputs``
    values whose realized ratio own / other (``keep_masses``) is at most ``bound`` (a certified
    lower bound of e^eps): Tk = floor(2^64 (bound a - r) / (2^64 - r + bound a)).  One unit of
    Tk moves the ratio by about (ratio + c)^2 / (c 2^64): the realized channel is the ideal one
    to within a few units of 2^-64 for any number of outputs."""
    W, c = THRESHOLD_ONE, outputs - 1
    a, r = divmod(W, c)
    Tk = min(math.floor(W * (bound * a - r) / (W - r + bound * a)), W - 1)
    own, other = keep_masses(Tk, outputs)
    if not (Tk >= 0 and own <= bound * other and other <= bound * own):
        raise ArithmeticError("keep_threshold: no valid integer threshold (a bug)")
    return Tk


def keep_or_other(w_keep: np.ndarray, w_other: np.ndarray, x: np.ndarray, Tk: int, outputs: int) -> np.ndarray:
    """Randomized response over ``outputs`` values from two uint64 words per row: the row's own
    value x when w_keep < Tk or w_other >= a c (the r left-over words), else the other value
    number w_other mod c (0..c-1, each exactly a of the words below a c), shifted past x.  The
    channel is exactly ``keep_masses`` (the other values exactly uniform).  Output int64 codes."""
    W, c = THRESHOLD_ONE, outputs - 1
    a, r = divmod(W, c)
    x = np.asarray(x, dtype=np.int64)
    own = words_below(w_keep, Tk)
    if c == 1:
        j = np.zeros(x.shape, dtype=np.int64)
    else:
        j = (w_other % np.uint64(c)).astype(np.int64)
        if r:
            own |= w_other >= np.uint64(a * c)
    j += j >= x
    return np.where(own, x, j)


def odds_threshold(bound: Fraction) -> int:
    """The largest integer T with T / (2^64 - T) <= ``bound``: floor(bound 2^64 / (bound + 1)),
    at most 2^64 - 1 (both outcomes stay possible)."""
    W = THRESHOLD_ONE
    T = min(math.floor(bound * W / (bound + 1)), W - 1)
    if not (T >= 1 and Fraction(T, W - T) <= bound):
        raise ArithmeticError("odds_threshold: no valid integer threshold (a bug)")
    return T


def second_threshold(Tp: int, bound: Fraction) -> int:
    """For a fixed first threshold Tp (probability Tp / 2^64 of a bit), the smallest integer Tq such
    that two bits of probabilities Tp and Tq realize a worst ratio
    Tp (2^64 - Tq) / (Tq (2^64 - Tp)) at most ``bound`` (unary encoding, Tp >= Tq)."""
    W = THRESHOLD_ONE
    Tq = _smallest(lambda t: Tp * (W - t) <= bound * t * (W - Tp), 1, Tp)
    if not Tp * (W - Tq) <= bound * Tq * (W - Tp):
        raise ArithmeticError("second_threshold: no valid integer threshold (a bug)")
    return Tq


def symmetric_thresholds(bound: Fraction) -> tuple[int, int]:
    """(Tp, Tq), Tp + Tq = 2^64, with the smallest Tq whose squared odds ((2^64 - Tq) / Tq)^2 are
    at most ``bound`` (symmetric unary encoding: p = 1 - q)."""
    W = THRESHOLD_ONE
    Tq = _smallest(lambda t: (W - t) * (W - t) <= bound * t * t, 1, W // 2)
    if not (W - Tq) * (W - Tq) <= bound * Tq * Tq:
        raise ArithmeticError("symmetric_thresholds: no valid integer threshold (a bug)")
    return W - Tq, Tq


# -- the integer-mass sampler of a finite channel ------------------------------------------------

# The channel is stored and sampled as integer masses in units of 2^-SAMPLING_BITS; the
# uniform is the top SAMPLING_BITS bits of a word.  50 bits keep a flattened threshold table
# of R rows, R * 2^50, below 2^63 for R <= 8192.
SAMPLING_BITS = 50


def _rounded_masses(Q: np.ndarray, epsilon: float) -> np.ndarray:
    """``integer_masses`` before its exact rounding toward privacy (float arithmetic only)."""
    S = float(1 << SAMPLING_BITS)
    X = np.asarray(Q, dtype=float) * S
    F = np.floor(X)
    X -= F
    np.cumsum(X, axis=1, out=X)
    np.round(X, out=X)
    F[:, 0] += X[:, 0]
    F[:, 1:] += np.diff(X, axis=1)
    del X
    need = np.ceil(F.max(axis=0) / math.exp(epsilon))
    np.maximum(F, need[None, :], out=F)
    F[np.arange(F.shape[0]), F.argmax(axis=1)] += S - F.sum(axis=1)
    return F


def integer_masses(Q: np.ndarray, epsilon: float) -> np.ndarray:
    """A finite channel ``Q`` (inputs x outputs, rows summing to 1) as whole-number masses in
    units of 2^-SAMPLING_BITS, held exactly in float64: what ``draw_index`` realizes.

    Each mass is within one unit of the float channel (cumulative rounding of the remainders
    keeps every row's total); then, per output, masses are raised to ceil(max / e^eps) so no
    input gets more than e^eps times the mass of another, and each row's few units of surplus
    come off its largest cell.  Without this a cell of tiny probability could be realized as 0
    for one input and > 0 for another (an unbounded privacy loss).  Finally the masses are
    rounded toward privacy in exact arithmetic (``_certify_masses``): the realized worst ratio is
    at most e^eps exactly (docs/formulas.md section 10.4)."""
    return _certify_masses(_rounded_masses(Q, epsilon), epsilon)


def masses_ratio(F: np.ndarray) -> Fraction | None:
    """The exact worst column ratio max_i F[i, j] / min_i F[i, j] of integer masses (inputs x
    outputs; columns with no mass left out), or None if some output is possible for one input
    and not for another.  The float ratios pick the candidates (within 1e-9 of the largest);
    those are compared as exact rationals."""
    mx, mn = F.max(axis=0), F.min(axis=0)
    used = mx > 0
    if (mn[used] <= 0).any():
        return None
    if not used.any():
        return Fraction(1)
    r = mx[used] / mn[used]
    cand = np.flatnonzero(used)[r >= r.max() * (1 - 1e-9)]
    return max(Fraction(int(mx[j]), int(mn[j])) for j in cand)


def _certify_masses(F: np.ndarray, epsilon: float) -> np.ndarray:
    """Round ``integer_masses`` toward privacy in exact arithmetic (docs/formulas.md section 10.4):
    every column whose largest mass exceeds L times its smallest, L a certified lower bound of
    e^eps, has its small masses raised to ceil(largest / L) (integer arithmetic), and each row
    gives its few units of surplus back from its largest cell; repeated until no column exceeds.
    Columns whose float ratio is more than 1e-9 below e^eps cannot exceed (float error is below
    1e-15) and are not looked at; the others (few) are checked one by one with Python integers.
    A channel that already meets L exactly is returned unchanged."""
    S = float(1 << SAMPLING_BITS)
    L = exp_lower_bound(epsilon)
    num, den = L.numerator, L.denominator
    margin = math.exp(min(epsilon, EXP_CAP)) * (1 - 1e-9)
    rows = np.arange(F.shape[0])
    for _ in range(16):
        mx, mn = F.max(axis=0), F.min(axis=0)
        changed = False
        for j in np.flatnonzero(mx > mn * margin):
            big, small = int(mx[j]), int(mn[j])
            if big * den > num * small:
                np.maximum(F[:, j], float(-(-big * den // num)), out=F[:, j])
                changed = True
        if not changed:
            return F
        F[rows, F.argmax(axis=1)] += S - F.sum(axis=1)
    raise ArithmeticError("integer_masses: the masses did not settle within e^eps (a bug)")


def sampling_table(F: np.ndarray) -> np.ndarray:
    """Row i's integer cumulative masses (``integer_masses``) offset by i * 2^SAMPLING_BITS,
    flattened (int64; needs rows * 2^SAMPLING_BITS < 2^63, i.e. at most 8192 rows)."""
    cum = np.cumsum(F, axis=1).astype(np.int64)  # exact: sums <= 2^50
    cum += np.arange(cum.shape[0], dtype=np.int64)[:, None] << SAMPLING_BITS
    return cum.ravel()


GUIDE_BITS = 11            # slices of [0, 2^SAMPLING_BITS) per input row in a guide table
GUIDE_MAX_ENTRIES = 1 << 22  # at most 16 MiB of int32 per table; larger channels search without a guide


def guide_table(table: np.ndarray, M: int) -> np.ndarray | None:
    """For each input row i of a ``sampling_table`` and each of 2^GUIDE_BITS equal slices of
    [0, 2^SAMPLING_BITS): the number of row i's cumulative masses <= the slice's start, i.e. the
    smallest output any u in the slice can draw.  ``draw_index`` starts there and steps forward,
    which replaces a binary search over the whole table by one look-up and a step or two (the
    same output: a guide table for inverse-CDF sampling).  None for tables too small to gain
    or too large to index this way."""
    R = table.size // M
    if table.size <= 64 or R * (1 << GUIDE_BITS) > GUIDE_MAX_ENTRIES:
        return None
    width = 1 << (SAMPLING_BITS - GUIDE_BITS)
    starts = ((np.arange(R, dtype=np.int64)[:, None] << SAMPLING_BITS)
              + np.arange(1 << GUIDE_BITS, dtype=np.int64)[None, :] * width)
    counts = np.searchsorted(table, starts.ravel(), side="right").reshape(R, 1 << GUIDE_BITS)
    return (counts - np.arange(R, dtype=np.int64)[:, None] * M).astype(np.int32)


def draw_index(table: np.ndarray, i: np.ndarray, words: np.ndarray, M: int,
               guide: np.ndarray | None = None) -> np.ndarray:
    """Output index for input row ``i`` of a channel with ``M`` outputs, by exact integer
    comparison of the top SAMPLING_BITS bits of each PRF word with the cumulative masses:
    output j iff cum[i, j-1] <= u < cum[i, j], u uniform on [0, 2^SAMPLING_BITS).  With
    ``guide`` (``guide_table`` of the same table) the search starts at the guide's entry and
    steps forward; without, it is a binary search.  Both give the same index."""
    u = (words >> np.uint64(64 - SAMPLING_BITS)).astype(np.int64)
    keys = (i << SAMPLING_BITS) + u
    if guide is not None and keys.size > 64:
        # the guide entry is at most M - 1 and row i's last cumulative mass (i + 1) * 2^BITS is
        # above every key of row i, so the steps never leave the row: no bounds checks needed
        base = i * M
        pos = base + guide.reshape(-1)[(i << GUIDE_BITS) | (u >> (SAMPLING_BITS - GUIDE_BITS))]
        idx = np.flatnonzero(table[pos] <= keys)
        while idx.size:  # cumulative masses within the slice that are still <= u: step past them
            pos[idx] += 1
            idx = idx[table[pos[idx]] <= keys[idx]]
        pos -= base
        return pos
    if table.size > 64 and keys.size > 64:
        # Same search on sorted keys (then put back in row order): the table is walked in
        # order instead of at random, several times faster for large grids; same result.
        order = np.argsort(keys)
        pos = np.empty_like(keys)
        pos[order] = np.searchsorted(table, keys[order], side="right")
    else:
        pos = np.searchsorted(table, keys, side="right")
    pos -= i * M
    return np.clip(pos, 0, M - 1)


# -- exact rejection samplers (a variable number of words per row) ------------------------------

#: ``draw(rows, j)``: word j of each listed row (uint64, shape of ``rows``)
Draw = Callable[[np.ndarray, np.ndarray], np.ndarray]

# Safety nets against a broken ``draw`` (constant words would loop for ever).  With PRF
# words neither is reachable: K >= 2^16 has probability below 1/(2^16 - 1)!, and a row
# needs more than 2^20 words with probability far below 2^-1000.
_K_LIMIT = 1 << 16
_DRAW_LIMIT = 1 << 20
_U64_MAX = np.uint64(0xFFFFFFFFFFFFFFFF)


class RowDraws:
    """Per-row draw counters over one batch of ``n`` rows: ``next(rows)`` gives each listed
    row (no repeats) its next word from ``draw`` and advances that row's counter."""

    __slots__ = ("counter", "draw")

    def __init__(self, n: int, draw: Draw) -> None:
        self.counter = np.zeros(n, dtype=np.int64)
        self.draw = draw

    def next(self, rows: np.ndarray) -> np.ndarray:
        j = self.counter[rows]
        if j.size and int(j.max()) >= _DRAW_LIMIT:
            raise RuntimeError("exact sampler: a row used more than 2^20 random words; the draw "
                               "function does not return pseudorandom words (a bug, not a data problem)")
        w = np.asarray(self.draw(rows, j))
        if w.shape != rows.shape or w.dtype != np.uint64:
            raise RuntimeError(f"exact sampler: draw returned {w.dtype} of shape {w.shape}, "
                               f"expected uint64 of shape {rows.shape}")
        self.counter[rows] = j + 1
        return w


def uniform_below(src: RowDraws, rows: np.ndarray, m: np.ndarray | int) -> np.ndarray:
    """Exactly uniform integers in [0, m) (uint64), one per row of ``rows``, by rejection:
    a word w is accepted iff w < floor(2^64/m) * m (i.e. w <= 2^64 - 1 - (2^64 mod m)),
    then reduced mod m; rejected rows draw again.  ``m`` >= 1, scalar or per row."""
    m = np.broadcast_to(np.asarray(m, dtype=np.uint64), rows.shape)
    rem = (_U64_MAX % m + np.uint64(1)) % m  # 2^64 mod m, without overflow
    limit = _U64_MAX - rem
    out = np.empty(rows.shape, dtype=np.uint64)
    pending = np.arange(rows.size)
    while pending.size:
        w = src.next(rows[pending])
        ok = w <= limit[pending]
        took = pending[ok]
        out[took] = w[ok] % m[took]
        pending = pending[~ok]
    return out


def bernoulli_exp(src: RowDraws, rows: np.ndarray, num: np.ndarray | int | np.integer,
                  den: np.ndarray | int | np.integer) -> np.ndarray:
    """Exact Bernoulli(exp(-num/den)) per row, 0 <= num <= den (Canonne, Kamath, Steinke,
    NeurIPS 2020): K = 1; while Bernoulli(gamma/K) succeeds, K += 1; result is K odd.
    Bernoulli(gamma/K) is [uniform integer below den*K] < num, exactly."""
    num = np.broadcast_to(np.asarray(num, dtype=np.uint64), rows.shape)
    den = np.broadcast_to(np.asarray(den, dtype=np.uint64), rows.shape)
    K = np.ones(rows.shape, dtype=np.uint64)
    result = np.empty(rows.shape, dtype=bool)
    active = np.arange(rows.size)
    while active.size:
        if int(K[active].max()) >= _K_LIMIT:
            raise RuntimeError("exact sampler: Bernoulli loop ran past 2^16 steps; the draw "
                               "function does not return pseudorandom words (a bug, not a data problem)")
        u = uniform_below(src, rows[active], den[active] * K[active])
        hit = u < num[active]
        done = active[~hit]
        result[done] = (K[done] & np.uint64(1)) == np.uint64(1)
        active = active[hit]
        K[active] += np.uint64(1)
    return result


def discrete_laplace(src: RowDraws, n: int, s: int, t: int) -> np.ndarray:
    """Exact two-sided geometric noise, P(Z = z) proportional to exp(-|z| s/t), for rows
    0..n-1 of ``src`` (int64), by the rejection sampler of Canonne, Kamath, Steinke
    (NeurIPS 2020).  Every row follows the sequential algorithm with its own words."""
    Z = np.zeros(n, dtype=np.int64)
    pending = np.arange(n, dtype=np.int64)
    ones = np.uint64(1)
    while pending.size:
        U = uniform_below(src, pending, t)
        D = bernoulli_exp(src, pending, U, t)
        keep, U = pending[D], U[D].astype(np.int64)
        V = np.zeros(keep.size, dtype=np.int64)
        active = np.arange(keep.size)
        while active.size:  # V = successes of Bernoulli(exp(-1)) before the first failure
            A = bernoulli_exp(src, keep[active], ones, ones)
            active = active[A]
            V[active] += 1
        if V.size and int(V.max()) > (np.iinfo(np.int64).max - t) // t:
            raise RuntimeError("exact sampler: geometric count out of range; the draw function "
                               "does not return pseudorandom words (a bug, not a data problem)")
        Y = (U + t * V) // s
        B = uniform_below(src, keep, 2) == ones
        reject = B & (Y == 0)
        acc = ~reject
        Z[keep[acc]] = np.where(B[acc], -Y[acc], Y[acc])
        pending = np.sort(np.concatenate([pending[~D], keep[reject]]))
    return Z
