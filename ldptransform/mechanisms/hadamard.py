"""Hadamard response: a categorical frequency oracle with a short report and fast decoding.

Source: J. Acharya, Z. Sun, H. Zhang, "Hadamard Response: Estimating Distributions Privately,
Efficiently, and with Little Communication", AISTATS 2019 (arXiv:1802.04705).  Only the basic
(high-privacy) construction is implemented, as restated in docs/formulas.md section 3.1:

* K = the smallest power of two with K >= k + 1; the Sylvester Hadamard matrix of order K has
  entries H[i][j] = (-1)^popcount(i AND j).
* Value x in 0..k-1 uses row x + 1 (row 0 is all ones); its set is
  C_x = {j in [K] : popcount((x+1) AND j) even}, |C_x| = K/2, and two different sets share
  exactly K/4 elements.
* With probability e^eps/(e^eps+1) the report is a uniform element of C_x, otherwise a uniform
  element of its complement: Q(y|x) = 2E/(K(E+1)) for y in C_x and 2/(K(E+1)) otherwise
  (E = e^eps), so every ratio is E, 1 or 1/E.
* A report y supports the values v with y in C_v: p* = E/(E+1), q* = 1/2 (two different sets
  share half of each other), and the exact n*Var of a frequency estimate is
  ((E+1)/(E-1))^2 - f_v (docs/formulas.md sections 0.3 and 3.1).

Decoding keeps the histogram of the K possible reports (``summarize``); the support counts of
all k values are one fast Walsh-Hadamard transform of it (O(K log K), no K x K matrix).
"""

from __future__ import annotations

import math
from fractions import Fraction
from functools import cached_property
from typing import ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..random.variates import THRESHOLD_ONE, exp_lower_bound, odds_threshold, words_below
from .base import register
from .categorical import FrequencyOracle
from .fit import FitResult, SupportBoundsFit, _result

# Rows x values handled at once when a decoding function builds an (n, k) matrix: the
# temporaries are int32 / uint8 arrays of this many elements (16 MB at most each).
_CHUNK_ELEMENTS = 1 << 22
MAX_CHANNEL_OUTPUTS = 8192


def _fold_parity(a: np.ndarray) -> np.ndarray:
    """Parity of the number of set bits of each non-negative integer below 2^32 (xor folding).
    Modifies ``a`` in place (callers pass a temporary) and returns a bool array."""
    for s in (16, 8, 4, 2, 1):
        a ^= a >> s
    return (a & 1).astype(bool)


def odd_parity(a: np.ndarray) -> np.ndarray:
    """True where popcount(a) is odd, for a fresh array ``a`` of non-negative integers < 2^32
    (``a`` may be overwritten).  Uses numpy's bit count where it exists (numpy >= 2.0)."""
    if hasattr(np, "bitwise_count"):
        return (np.bitwise_count(a) & 1).astype(bool)
    return _fold_parity(a)


def fwht(c: np.ndarray) -> np.ndarray:
    """Fast Walsh-Hadamard transform in natural (Sylvester) order: returns H @ c with
    H[i][j] = (-1)^popcount(i AND j), for a vector whose length is a power of two.
    Integer input stays integer (exact); log2(K) vectorized butterfly stages."""
    a = np.array(c, copy=True)
    K = a.shape[0]
    if K & (K - 1) or K == 0:
        raise ValueError("fwht: the length must be a power of two")
    h = 1
    while h < K:
        a = a.reshape(-1, 2, h)
        a = np.stack((a[:, 0, :] + a[:, 1, :], a[:, 0, :] - a[:, 1, :]), axis=1)
        h *= 2
    return a.reshape(K)


def read_indices(arr: pa.Array, size: int) -> tuple[np.ndarray, np.ndarray]:
    """A column of output indices -> (int64 indices, bad-row mask).  A row is bad if it is
    null, not an integer in 0..size-1 (floats must be integral; strings must be plain digits),
    or of another type.  Bad rows get index 0 in the first array."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    n = len(arr)
    t = arr.type
    if pa.types.is_integer(t):
        y = np.asarray(pc.fill_null(pc.cast(arr, pa.int64(), safe=False), -1).to_numpy(zero_copy_only=False),
                       dtype=np.int64)
    elif pa.types.is_floating(t):
        f = np.asarray(pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False), dtype=float)  # nulls -> nan
        with np.errstate(invalid="ignore"):
            ok = np.isfinite(f) & (f == np.floor(f)) & (f >= 0) & (f < size)
        y = np.where(ok, f, -1).astype(np.int64)
    elif pa.types.is_string(t) or pa.types.is_large_string(t):
        ok = pc.fill_null(pc.match_substring_regex(arr, r"^[0-9]{1,12}$"), False)
        y = np.asarray(pc.cast(pc.if_else(ok, arr, pa.scalar("-1", t)), pa.int64()).to_numpy(zero_copy_only=False),
                       dtype=np.int64)
    else:
        y = np.full(n, -1, dtype=np.int64)
    bad = (y < 0) | (y >= size)
    return np.where(bad, 0, y), bad


@register
class HadamardResponse(FrequencyOracle):
    """Hadamard response (Acharya, Sun, Zhang, AISTATS 2019), basic construction.

    K = smallest power of two >= k + 1 outputs; value x uses Hadamard row x + 1 and the set C_x
    of the K/2 outputs where that row is +1.  With probability e^eps/(e^eps+1) the report is a
    uniform element of C_x, else a uniform element of its complement.  p* = e^eps/(e^eps+1),
    q* = 1/2.  Output: one int32 column, the reported index y in 0..K-1.

    Sampling: word 0 picks the half, C_x iff word 0 < Tp (``thresholds``): P(C_x) = Tp / 2^64
    exactly, Tp the largest integer with Tp / (2^64 - Tp) at most a certified lower bound of e^eps
    (rounded toward privacy: the realized ratio is at most e^eps exactly, and p* = Tp / 2^64 is
    within 2^-64 of the ideal E/(E+1); docs/formulas.md section 10.4); the top log2(K) bits
    of word 1 give u uniform on [K] exactly; if u lies in the wrong half,
    the lowest set bit of x + 1 is flipped in u.  That flip changes the parity of
    popcount((x+1) AND u) and is a bijection between the two halves, so the report is exactly
    uniform on the wanted half.

    Decoding: the decoder keeps the histogram of the K outputs (``summary_size`` = K); the
    support counts follow from one fast Walsh-Hadamard transform, s_v = (c_0' + c_(v+1)') / 2
    with c' = H c, in O(K log K).

    Only the basic construction (sets of half of the outputs) is implemented.  Its exact
    n*Var is ((E+1)/(E-1))^2 - f_v (E = e^eps): excellent at small eps, but far from optimal
    at large eps, where it tends to 1 - f_v while other oracles' variance keeps falling
    towards 0.  The paper's blocked generalization for larger eps (several smaller Hadamard
    blocks, sets smaller than half of the outputs) is not implemented: its parameters were not
    confirmed (docs/formulas.md section 3.1, tagged [M]).
    """

    name: ClassVar[str] = "hadamard"

    def __init__(self, epsilon: float, categories: list[str]) -> None:
        super().__init__(epsilon, categories)
        self.K = 1 << self.k.bit_length()      # smallest power of two >= k + 1
        self.log2K = self.K.bit_length() - 1

    # p*, q* -------------------------------------------------------------------------
    @cached_property
    def thresholds(self) -> tuple[int]:
        """(Tp,): the probability of reporting from C_x, in units of 2^-64."""
        return (odds_threshold(exp_lower_bound(self.epsilon)),)

    def realized_ratio(self) -> Fraction:
        # Q(y|x) is 2 Tp / (K 2^64) or 2 (2^64 - Tp) / (K 2^64): every ratio is r, 1 or 1/r
        (Tp,) = self.thresholds
        a, b = Tp, THRESHOLD_ONE - Tp
        return Fraction(max(a, b), min(a, b))

    @property
    def p_star(self) -> float:
        return self.thresholds[0] / THRESHOLD_ONE

    @property
    def q_star(self) -> float:
        return 0.5

    def describe(self) -> str:
        return (f"hadamard (basic construction: {self.K} outputs, each value supported by {self.K // 2}; "
                f"n*Var per value {self.approx_variance():.4g} - f)")

    # randomization --------------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return 2

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.int32())]

    def output_meaning(self, field_name: str) -> str:
        return ("reported output index y in 0..K-1, K the smallest power of two above the number of categories; "
                "category j is supported when row j+1 of the K x K Hadamard matrix is +1 at y")

    def randomize_index(self, x: np.ndarray, words: np.ndarray) -> np.ndarray:
        """Reported output indices (int64) for codes ``x`` and words of shape (n, 2)."""
        want_in = words_below(words[:, 0], self.thresholds[0])    # report from C_x
        u = (words[:, 1] >> np.uint64(64 - self.log2K)).astype(np.int64)   # uniform on [K]
        r = np.asarray(x, dtype=np.int64) + 1                      # Hadamard row of x
        in_set = ~odd_parity(r & u)
        low = r & -r                                               # lowest set bit of x + 1
        return np.where(in_set == want_in, u, u ^ low)

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return [pa.array(self.randomize_index(x, words).astype(np.int32))]

    # decoding --------------------------------------------------------------------------
    @property
    def summary_size(self) -> int:
        return self.K

    def summarize(self, arrays: list[pa.Array]) -> np.ndarray:
        """Histogram (int64, length K) of the valid reports; malformed rows are left out."""
        y, bad = read_indices(arrays[0], self.K)
        return np.bincount(y[~bad], minlength=self.K).astype(np.int64)

    def support_from_summary(self, summary: np.ndarray, n: int) -> np.ndarray:
        """Support counts s_v = #{reports y in C_v} from the histogram c of the reports, via
        one fast Walsh-Hadamard transform: (H c)[j] = sum_y c_y (-1)^popcount(j AND y), so
        (H c)[0] + (H c)[v+1] = 2 s_v.  (H c)[0] is the number of valid reports, which is n
        when no row is malformed; a malformed row (left out of the histogram) supports nothing,
        as in ``support``."""
        c = np.asarray(summary, dtype=np.int64)
        if c.shape != (self.K,):
            raise ValueError(f"hadamard: a summary has {self.K} entries, got shape {c.shape}")
        h = fwht(c)
        return (h[0] + h[1: self.k + 1]) // 2

    def support_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        return self.support_from_summary(self.summarize(arrays), len(arrays[0]))

    def support(self, arrays: list[pa.Array]) -> np.ndarray:
        """(n, k) booleans: 1[y_i in C_v] by parity of popcount((v+1) AND y_i), in row chunks
        of at most 2^22 entries; malformed rows support nothing."""
        y, bad = read_indices(arrays[0], self.K)
        n = len(y)
        out = np.empty((n, self.k), dtype=bool)
        rows_v = np.arange(1, self.k + 1, dtype=np.int32)[None, :]
        y32 = y.astype(np.int32)
        step = max(1, _CHUNK_ELEMENTS // self.k)
        for s in range(0, n, step):
            e = min(n, s + step)
            out[s:e] = ~odd_parity(y32[s:e, None] & rows_v)
        out[bad] = False
        return out

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        return int(read_indices(arrays[0], self.K)[1].sum())

    # analysis ---------------------------------------------------------------------------
    def channel(self) -> np.ndarray:
        """Exact P(y | x), shape (k, K); column y is the output index.  For tests (K <= 8192)."""
        if self.K > MAX_CHANNEL_OUTPUTS:
            raise ValueError(f"the channel of hadamard is built only for K <= {MAX_CHANNEL_OUTPUTS} outputs")
        rows = np.arange(1, self.k + 1, dtype=np.int64)[:, None]
        ys = np.arange(self.K, dtype=np.int64)[None, :]
        in_set = ~odd_parity(rows & ys)
        (Tp,) = self.thresholds
        p, p_out = Tp / THRESHOLD_ONE, (THRESHOLD_ONE - Tp) / THRESHOLD_ONE
        return np.where(in_set, p, p_out) * (2.0 / self.K)

    # the likelihood decoder (mechanisms/likelihood.py): the cells are the K output indices
    likelihood_reason: ClassVar[str] = ""

    @property
    def likelihood_cells(self) -> int:
        return self.K

    def likelihood_channel(self) -> np.ndarray:
        return self.channel()

    def likelihood_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        return self.summarize(arrays)

    def max_log_ratio(self) -> float:
        # Q(y|x) is 2p/K or 2(1-p)/K with p = Tp / 2^64: every ratio is p/(1-p), 1 or its inverse,
        # and p/(1-p) <= e^eps occurs (two different sets differ in K/2 outputs).
        return math.log(self.realized_ratio())

    def fit_test(self) -> HadamardFit:
        """The count of reports at output 0 (exactly binomial whatever the data) and the support
        bounds of every frequency oracle."""
        return HadamardFit(self)


# -- goodness of fit (mechanisms/fit.py) ---------------------------------------------------------

class HadamardFit(SupportBoundsFit):
    """``hadamard``: output 0 lies in every value's set C_x (row x+1 of the Hadamard matrix is +1
    in column 0), so P(y = 0) = 2 p* / K for every input: the count of zeros is exactly
    Binomial(n, 2 p*/K) whatever the data, a two-sided exact test of eps.  q* = 1/2 at every
    eps, so the support floor sees nothing; the ceiling still applies."""

    mechanism: HadamardResponse

    TESTS = 2

    def _tests(self, alpha: float, good: int) -> list[FitResult]:
        from scipy.stats import binomtest

        m = self.mechanism
        zeros = int(self.stats["summary"][0])
        r = 2 * m.p_star / m.K
        t = binomtest(zeros, good, r)
        name = (f"the share of reports at output 0 equals 2 p* / K = {r:.5g}, as {m.name} at eps {m.epsilon:g} "
                f"with K = {m.K} implies for every input")
        out = [_result(name, "zero-output", zeros, None, "exact binomial, two-sided", t.pvalue, alpha, self.rows, 0,
                       f"{zeros} of {good} reports at output 0, expected {good * r:.1f}",
                       observed=zeros / good, expected=r)]
        return out + super()._tests(alpha, good)
