"""Subset selection: a categorical frequency oracle whose report is a set of m values.

Sources: M. Ye, A. Barg, "Optimal Schemes for Discrete Distribution Estimation under Locally
Differential Privacy", IEEE Transactions on Information Theory 64(8), 2018; S. Wang, L. Huang,
P. Wang, Y. Nie, H. Xu, W. Yang, X.-Y. Li, C. Qiao, "Mutual Information Optimally Local Private
Discrete Distribution Estimation", arXiv:1607.08025, 2016.  Restated in docs/formulas.md
sections 3.2 and 4.

The report is a subset S of the k values with |S| = m and P(S | x) proportional to e^eps if
x is in S and to 1 otherwise.  In the terms of docs/formulas.md section 0.3 (support = S):
p* = mE/(mE + k - m), q* = m[(m-1)E + k - m] / ((k-1)(mE + k - m)), E = e^eps.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator
from fractions import Fraction
from functools import cached_property
from typing import Annotated, Any, ClassVar

import numpy as np
import pyarrow as pa
from pydantic import BaseModel, ConfigDict, Field

from ..errors import PolicyError
from ..random.variates import THRESHOLD_ONE, exp_lower_bound, odds_threshold, to_below, words_below
from .base import register
from .categorical import FrequencyOracle, _as_strings, bits_to_strings, strings_to_bits
from .fit import SupportBoundsFit

# Rows x values handled at once (int32 permutation / bool bit matrices of this many entries).
_CHUNK_ELEMENTS = 1 << 22
MAX_CHANNEL_SUBSETS = 50_000


class SubsetParams(BaseModel):
    """Policy fields of ``subset``: the subset size."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    subset_size: Annotated[int, Field(strict=True)] | None = Field(
        None, description="size m of the reported subsets (default: the m with the lowest total variance)")


def _total_variance_curve(epsilon: float, k: int) -> np.ndarray:
    """n * sum_v Var(f_v) for m = 1..k-1 (docs/formulas.md section 4, [D]):
    (k-1)[(mE+k-m)^2 - (mE^2+k-m)] / (m(k-m)(E-1)^2), evaluated with t = e^-eps after
    dividing through by E^2 (no overflow at any finite eps, no cancellation: the bracket is
    m(m-1)E^2 + 2m(k-m)E + (k-m)(k-m-1), a sum of non-negative terms)."""
    t = math.exp(-epsilon)
    m = np.arange(1, k, dtype=float)
    num = m * (m - 1) + 2 * m * (k - m) * t + (k - m) * (k - m - 1) * t * t
    return (k - 1) * num / (m * (k - m) * (1 - t) ** 2)


@register
class SubsetSelection(FrequencyOracle):
    """Subset selection (Ye and Barg, IEEE Trans. Inf. Theory 2018; Wang et al., arXiv 2016).

    Output: one string of k characters '0'/'1' (character j is 1 iff category j is in the
    reported subset S), exactly m of them '1'.  Parameter ``subset_size`` (m, 1..k-1; default:
    the m that minimizes the exact total variance n * sum_v Var(f_v), ``best_subset_size``).

    Sampling (docs/formulas.md section 3.2): word 0 decides, by exact integer comparison, whether x
    is in S (probability p* = mE/(mE + k - m)); the other members are a uniform subset of the
    k - 1 other values (m - 1 of them if x is in S, else m), drawn by a partial Fisher-Yates
    shuffle vectorized over rows, one word per step reduced with ``variates.to_below`` (off
    uniform by less than bound/2^64 per step).  When 2m > k the shuffle picks the complement instead
    (the k - m or k - 1 - m other values left out), so a row takes 1 + min(m, k - m) words.
    Given whether x is in S, every subset of that kind is then equally likely, so
    P(S | x) = E/Z for x in S and 1/Z otherwise, Z = C(k-1, m-1) E + C(k-1, m).

    Exact thresholds (docs/formulas.md section 10.4): x is in S iff word 0 < Tp, so p* = Tp / 2^64
    exactly.  The realized channel also carries the modulo bias of the shuffle's steps (step i
    gives each of its n_i = k-1-i positions a_i or a_i + 1 of the 2^64 words, a_i = floor(2^64 / n_i)),
    so ``realized_ratio`` is an exact rational upper bound of the realized worst ratio: the
    ideal ratio's factor C(k-1, m) / C(k-1, m-1) for the choice of the others, times the largest
    and smallest probabilities a set of picks can have (``_pick_bounds``).  Tp is the largest
    integer for which that bound is at most a certified lower bound of e^eps: the realized ratio is
    at most e^eps exactly, and p* is below the ideal value by about 2 min(m, k-m) k / 2^64
    relative at most.  q* = (p* (m-1) + (1-p*) m) / (k-1) is exact for uniform picks; their
    modulo bias moves it by less than min(m, k-m) k / 2^64 relative.
    """

    name: ClassVar[str] = "subset"
    Params: ClassVar[type[BaseModel]] = SubsetParams

    def __init__(self, epsilon: float, categories: list[str], subset_size: int | None = None) -> None:
        super().__init__(epsilon, categories)
        k = self.k
        if subset_size is None:
            subset_size = self.best_subset_size(self.epsilon, k)
        if (isinstance(subset_size, bool) or not isinstance(subset_size, (int, np.integer))
                or not 1 <= subset_size <= k - 1):
            raise PolicyError(
                f"mechanism subset, field subset_size: the size m of the reported subsets must be a whole "
                f"number from 1 to {k - 1} (the number of categories, {k}, minus one), got {subset_size!r}. "
                "Give such a number, or leave subset_size out to use the size with the lowest total variance "
                f"for this epsilon and number of categories (here {self.best_subset_size(self.epsilon, k)}).")
        self.m = int(subset_size)
        # complement mode: shuffle out the values left out of S when that takes fewer steps
        self._complement = 2 * self.m > k
        self._draws = min(self.m, k - self.m)

    @staticmethod
    def best_subset_size(epsilon: float, k: int) -> int:
        """The m in 1..k-1 with the lowest exact total variance n * sum_v Var(f_v) (docs/formulas.md
        section 4), searched exhaustively; within 1e-12 relative of the minimum the smaller m
        wins (a float tie-break, so the choice is reproducible)."""
        if k < 2:
            raise ValueError("best_subset_size: k must be at least 2")
        tv = _total_variance_curve(float(epsilon), int(k))
        best = tv.min()
        return int(np.flatnonzero(tv <= best * (1 + 1e-12))[0]) + 1

    # spec --------------------------------------------------------------------------------
    def to_spec(self) -> dict[str, Any]:
        spec = super().to_spec()
        spec["subset_size"] = self.m
        return spec

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> SubsetSelection:
        cls._check_family(spec)
        return cls(spec["epsilon"], spec["categories"], spec.get("subset_size"))

    def describe(self) -> str:
        return (f"subset (reports a set of {self.m} of the {self.k} values; "
                f"n * total variance {self.total_variance():.4g})")

    # exact thresholds (docs/formulas.md section 10.4) --------------------------------------
    def _pick_sizes(self) -> tuple[int, int]:
        """How many other values the shuffle picks when x is in S and when it is not (the other
        members, or in complement mode the others left out)."""
        k, m = self.k, self.m
        return (k - m, k - 1 - m) if self._complement else (m - 1, m)

    def _pick_bounds(self, s: int, t: int) -> Fraction:
        """An exact upper bound of P(a set of s picks) / P(a set of t picks), |s - t| <= 1, over
        any two such sets.  Step i reduces a word modulo n_i = k-1-i: each position has a_i or h_i
        (= a_i + 1 when n_i does not divide 2^64, else a_i) of the 2^64 words, so a set of s picks
        (its s! orders) has a probability between s! prod_{i<s} a_i / 2^64^s and the same with
        h_i.  With c = min(s, t): prod_{i<c} h_i / a_i <= (1 + 1/a_0)^c <= a_0 / (a_0 - c)
        (a_i >= a_0 = floor(2^64 / (k-1)) and e^u <= 1/(1-u)); the one step more on one side gives
        the factor (c+1) h_c / 2^64 (s > t) or 2^64 / ((c+1) a_c) (t > s)."""
        W, n0 = THRESHOLD_ONE, self.k - 1

        def a_h(i: int) -> tuple[int, int]:
            a, r = divmod(W, n0 - i)
            return a, a + (r > 0)

        c = min(s, t)
        a0 = W // n0
        out = Fraction(a0, a0 - c)
        if s > t:
            out *= Fraction((c + 1) * a_h(c)[1], W)
        elif t > s:
            out *= Fraction(W, (c + 1) * a_h(c)[0])
        return out

    @cached_property
    def thresholds(self) -> tuple[int]:
        """(Tp,): the probability that x is in S, in units of 2^-64: the largest Tp whose bound of
        the realized ratio (x in S against x' not in S) is at most a certified lower bound of e^eps."""
        s_in, s_out = self._pick_sizes()
        return (odds_threshold(exp_lower_bound(self.epsilon) / self._pick_bounds(s_in, s_out)),)

    def realized_ratio(self) -> Fraction:
        """An exact upper bound of the realized worst ratio P(S|x) / P(S|x') over S, x, x': the
        largest of the four cases (x in S and x' not, the reverse, both in S, neither)."""
        (Tp,) = self.thresholds
        odds = Fraction(Tp, THRESHOLD_ONE - Tp)
        s_in, s_out = self._pick_sizes()
        return max(odds * self._pick_bounds(s_in, s_out), self._pick_bounds(s_out, s_in) / odds,
                   self._pick_bounds(s_in, s_in), self._pick_bounds(s_out, s_out))

    # p*, q* --------------------------------------------------------------------------------
    @property
    def p_star(self) -> float:
        return self.thresholds[0] / THRESHOLD_ONE

    @property
    def q_star(self) -> float:
        k, m = self.k, self.m
        Tp = self.thresholds[0]
        return ((m - 1) * Tp + m * (THRESHOLD_ONE - Tp)) / ((k - 1) * THRESHOLD_ONE)

    # randomization -------------------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return 1 + self._draws

    @property
    def output_bytes_per_row(self) -> int:
        """Width of one report in the extract (k characters), whatever words_per_row is."""
        return self.k

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.string())]

    def output_meaning(self, field_name: str) -> str:
        return ("reported subset: character j is 1 if category j of the mechanism's categories is in the row's "
                "randomized subset (exactly subset_size ones per row)")

    def _bits_chunk(self, x: np.ndarray, w: np.ndarray) -> np.ndarray:
        c, k, m, D = len(x), self.k, self.m, self._draws
        N = k - 1                                  # the other values, by position 0..k-2
        incl = words_below(w[:, 0], self.thresholds[0])   # is x in S? (probability Tp / 2^64)
        perm = np.empty((c, N), dtype=np.int32)
        perm[:] = np.arange(N, dtype=np.int32)
        rows = np.arange(c)
        for i in range(D):                         # partial Fisher-Yates, vectorized over rows
            j = i + to_below(w[:, 1 + i], N - i)
            a = perm[:, i].copy()
            perm[:, i] = perm[rows, j]
            perm[rows, j] = a
        pos = perm[:, :D].astype(np.int64)
        vals = pos + (pos >= x[:, None])           # position among the others -> value
        if not self._complement:                   # pick the other members: m-1 or m of them
            take = np.arange(D)[None, :] < np.where(incl, m - 1, m)[:, None]
            bits = np.zeros((c, k), dtype=bool)
            bits[rows[:, None], vals] = take
        else:                                      # pick the others left out: k-m or k-1-m
            drop = np.arange(D)[None, :] < np.where(incl, k - m, k - 1 - m)[:, None]
            bits = np.ones((c, k), dtype=bool)
            bits[rows[:, None], vals] = ~drop
        bits[rows, x] = incl
        return bits

    def randomize_bits(self, x: np.ndarray, words: np.ndarray) -> np.ndarray:
        """(n, k) booleans of the reported subsets; rows in chunks of at most 2^22 entries."""
        x = np.asarray(x, dtype=np.int64)
        n = len(x)
        out = np.empty((n, self.k), dtype=bool)
        step = max(1, _CHUNK_ELEMENTS // self.k)
        for s in range(0, n, step):
            e = min(n, s + step)
            out[s:e] = self._bits_chunk(x[s:e], words[s:e])
        return out

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return [bits_to_strings(self.randomize_bits(x, words))]

    # decoding --------------------------------------------------------------------------------
    def _chunks(self, arrays: list[pa.Array]) -> Iterator[tuple[int, np.ndarray, np.ndarray]]:
        """Yield (start, bits, bad) over row chunks of at most 2^22 characters.  A row is bad
        if it is not a string of k '0'/'1' characters or has a number of '1's other than m."""
        arr = arrays[0]
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if not pa.types.is_integer(arr.type):
            arr = _as_strings(arr)
        n = len(arr)
        step = max(1, _CHUNK_ELEMENTS // self.k)
        for s in range(0, n, step):
            bits, bad = strings_to_bits(arr.slice(s, step), self.k)
            bad |= np.count_nonzero(bits, axis=1) != self.m
            bits[bad] = False
            yield s, bits, bad

    def support(self, arrays: list[pa.Array]) -> np.ndarray:
        """(n, k) booleans: 1[v in S_i]; malformed rows support nothing."""
        n = len(arrays[0])
        out = np.empty((n, self.k), dtype=bool)
        for s, bits, _ in self._chunks(arrays):
            out[s: s + len(bits)] = bits
        return out

    def support_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        counts = np.zeros(self.k, dtype=np.int64)
        for _, bits, _ in self._chunks(arrays):
            counts += bits.sum(axis=0, dtype=np.int64)
        return counts

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        return int(sum(int(bad.sum()) for _, _, bad in self._chunks(arrays)))

    # analysis ----------------------------------------------------------------------------------
    def channel_outputs(self) -> list[str]:
        """All C(k, m) reports, in the column order of ``channel()`` (lexicographic order of the
        members, as itertools.combinations gives them)."""
        self._check_channel_size()
        out = []
        for comb in itertools.combinations(range(self.k), self.m):
            s = ["0"] * self.k
            for j in comb:
                s[j] = "1"
            out.append("".join(s))
        return out

    def _check_channel_size(self) -> None:
        if math.comb(self.k, self.m) > MAX_CHANNEL_SUBSETS:
            raise ValueError(f"the channel of subset is enumerated only up to {MAX_CHANNEL_SUBSETS} subsets "
                             f"(C({self.k}, {self.m}) = {math.comb(self.k, self.m)})")

    def channel(self) -> np.ndarray:
        """Exact P(S | x), shape (k, C(k, m)), columns as in ``channel_outputs()``:
        p*/C(k-1, m-1) if x in S, (1-p*)/C(k-1, m) otherwise (= E/Z and 1/Z)."""
        self._check_channel_size()
        combs = np.array(list(itertools.combinations(range(self.k), self.m)), dtype=np.int64)
        member = np.zeros((len(combs), self.k), dtype=bool)
        member[np.arange(len(combs))[:, None], combs] = True
        (Tp,) = self.thresholds
        hit = Tp / THRESHOLD_ONE / math.comb(self.k - 1, self.m - 1)
        miss = (THRESHOLD_ONE - Tp) / THRESHOLD_ONE / math.comb(self.k - 1, self.m)
        return np.where(member.T, hit, miss)

    # the likelihood decoder (mechanisms/likelihood.py): the cells are the C(k, m) subsets, as bit masks
    # (bit j: category j in the subset) in increasing order
    likelihood_reason: ClassVar[str] = ""

    def likelihood_refusal(self) -> str:
        if math.comb(self.k, self.m) > MAX_CHANNEL_SUBSETS or self.k > 62:
            return (f"its {math.comb(self.k, self.m)} possible reports (subsets of {self.m} of {self.k} categories) "
                    "are too many for the likelihood decoder to enumerate")
        return super().likelihood_refusal()

    @property
    def likelihood_cells(self) -> int:
        return math.comb(self.k, self.m)

    @cached_property
    def _subset_masks(self) -> tuple[np.ndarray, np.ndarray]:
        """(bit masks of ``channel_outputs`` in increasing order, the order that sorts them)."""
        weights = np.int64(1) << np.arange(self.k, dtype=np.int64)
        masks = np.array([sum(int(w) for w, c in zip(weights, s) if c == "1") for s in self.channel_outputs()],
                         dtype=np.int64)
        order = np.argsort(masks, kind="stable")
        return masks[order], order

    def likelihood_channel(self) -> np.ndarray:
        return self.channel()[:, self._subset_masks[1]]

    def likelihood_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        masks = self._subset_masks[0]
        weights = np.int64(1) << np.arange(self.k, dtype=np.int64)
        counts = np.zeros(masks.size, dtype=np.int64)
        for _, bits, bad in self._chunks(arrays):
            m = bits[~bad].astype(np.int64) @ weights
            counts += np.bincount(np.searchsorted(masks, m), minlength=masks.size)
        return counts

    def max_log_ratio(self) -> float:
        # P(S|x)/P(S|x') is r (x in S, x' not), 1 or 1/r, r <= e^eps (r occurs since 1 <= m <= k-1);
        # with the shuffle's modulo bias bounded exactly (``realized_ratio``, an upper bound).
        return math.log(self.realized_ratio())

    def fit_test(self) -> SupportBoundsFit:
        """Every report holds exactly m values, and the support counts obey the binomial floor and
        ceiling (a subset release's data-dependent distribution over C(k, m) outputs is too large
        for the hull test)."""
        return SupportBoundsFit(self)
