"""Categorical frequency oracles: GRR, SUE, OUE and OLH.

Source for all four: T. Wang, J. Blocki, N. Li, S. Jha, "Locally Differentially Private
Protocols for Frequency Estimation", USENIX Security 2017.  Generalized randomized
response with k = 2 is Warner's randomized response (S. L. Warner, JASA 1965).

Inputs are integer codes 0..k-1 (the policy's categories, in order, plus any extra
category the policy asks for, such as one for missing values).
"""

from __future__ import annotations

import functools
import math
from fractions import Fraction
from functools import cached_property
from typing import Annotated, Any, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel, ConfigDict, Field

from ..errors import PolicyError
from ..random.variates import (
    THRESHOLD_ONE,
    exp_lower_bound,
    grr_thresholds,
    randomized_response,
    second_threshold,
    symmetric_thresholds,
    keep_masses,
    keep_or_other,
    keep_threshold,
    to_below,
    words_below,
)
from .base import Mechanism, PerRowColumn, certified_epsilon, check_epsilon, register
from .decoders import FrequencyDecoder
from .bounds import frequency_lower_bound
from .fit import (
    SUPPORT_CHUNK,
    FitResult,
    FitStats,
    HullFit,
    _norm_two_sided,
    _pearson_result,
    _result,
    unusable_results,
)

MAX_CATEGORIES = 1 << 20
MASS_ONE = 1 << 128         # grr and olh state their channel in units of 2^-128 (``variates.keep_masses``)
BUCKET_GROUPS = 4096        # olh fit test: reported buckets are counted in at most this many groups
# the audit's outcomes of a frequency report for a pair (a, b): index 2 * [supports a] + [supports b]
AUDIT_SUPPORT_LABELS = np.array(["supports neither", "supports b only", "supports a only", "supports both"],
                                dtype=object)


class FrequencyOracle(Mechanism):
    """Shared logic of the 'pure' protocols (support sets with constant p*, q*).  The family base
    of the categorical mechanisms: its decoder (``decoder``, a ``FrequencyDecoder``) reads them
    through ``summarize`` / ``decode_sums`` / ``decode_covariance``."""

    kind: ClassVar[str] = "categorical"
    family: ClassVar[str] = "frequency"

    def __init__(self, epsilon: float, categories: list[str]) -> None:
        self.epsilon = check_epsilon(epsilon, f"mechanism {self.name}")
        cats = [str(c) for c in categories]
        if len(cats) < 2:
            raise PolicyError(f"mechanism {self.name}: needs at least 2 categories, got {len(cats)}")
        if len(set(cats)) != len(cats):
            raise PolicyError(f"mechanism {self.name}: categories must be distinct")
        if len(cats) > MAX_CATEGORIES:
            raise PolicyError(f"mechanism {self.name}: at most {MAX_CATEGORIES} categories")
        self.categories = cats
        self.k = len(cats)

    # p*, q* ----------------------------------------------------------------------
    @property
    def p_star(self) -> float:
        raise NotImplementedError

    @property
    def q_star(self) -> float:
        raise NotImplementedError

    def to_spec(self) -> dict[str, Any]:
        return self._layer_spec({"mechanism": self.name, "epsilon": self.epsilon, "categories": list(self.categories)})

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> FrequencyOracle:
        cls._check_family(spec)
        return cls(spec["epsilon"], spec["categories"])

    # decoding ----------------------------------------------------------------------
    def decoder(self, *, joint: bool = False) -> FrequencyDecoder:
        """The reports' additive summary (``summarize``); with ``joint``, also the co-support
        counts that ``decode_covariance`` needs (binned columns: range and quantile SEs)."""
        return FrequencyDecoder(self, joint=joint)

    def support(self, arrays: list[pa.Array]) -> np.ndarray:
        """Boolean matrix of shape (n, k): entry (i, v) is 1[v in S(y_i)]."""
        raise NotImplementedError

    def support_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        """Integer vector of shape (k,): number of rows whose report supports each value."""
        return self.support(arrays).sum(axis=0, dtype=np.int64)

    def audit_ordered(self) -> bool:
        return False

    def audit_outcomes(self, arrays: list[pa.Array], pair: tuple[Any, Any]) -> np.ndarray:
        """For the audit (base.Mechanism.audit_outcomes): what a report says about the pair (a, b) of
        codes, whether it supports a and whether it supports b (the events of the support counts)."""
        S = self.support(arrays)
        a, b = int(pair[0]), int(pair[1])
        return AUDIT_SUPPORT_LABELS[S[:, a].astype(np.int64) * 2 + S[:, b]]

    # The likelihood decoder (mechanisms/likelihood.py, ``estimate(decoder="likelihood")``) reads an
    # oracle whose reports reduce to a finite channel: ``likelihood_channel`` (k x M, P(cell | x) as
    # the sampler realizes it) and ``likelihood_counts`` (the reports per cell, additive).  An oracle
    # that cannot sets ``likelihood_reason`` (or overrides ``likelihood_refusal`` for a size cap).
    likelihood_reason: ClassVar[str] = (
        "its reports do not reduce to a finite channel with a fixed matrix that the likelihood decoder could read")

    def likelihood_refusal(self) -> str:
        """Why the likelihood decoder cannot read this oracle's reports ('' when it can)."""
        if self.likelihood_reason:
            return self.likelihood_reason
        from .likelihood import MAX_CHANNEL_ENTRIES

        size = self.k * self.likelihood_cells
        if size > MAX_CHANNEL_ENTRIES:
            return (f"its channel has {self.k} categories x {self.likelihood_cells} report cells = {size} entries, "
                    f"above the {MAX_CHANNEL_ENTRIES} the likelihood decoder and its bootstrap work on")
        return ""

    @property
    def likelihood_cells(self) -> int:
        """M: the number of cells of ``likelihood_channel`` (oracles the likelihood decoder reads)."""
        raise NotImplementedError(self.likelihood_reason)

    def likelihood_channel(self) -> np.ndarray:
        """P(cell j | category x), shape (k, M), rows summing to 1, as the sampler realizes it."""
        raise NotImplementedError(self.likelihood_reason)

    def likelihood_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        """int64 counts of the reports in each of the M cells (malformed reports left out)."""
        raise NotImplementedError(self.likelihood_reason)

    # The decoder's additive summary of a batch of reports.  By default the support counts;
    # a mechanism with a small output alphabet may keep the histogram of its outputs instead
    # and turn it into support counts when decoding (hadamard: one fast Walsh-Hadamard
    # transform), and a mechanism that is not a pure protocol (matrix) overrides the decoding.
    @property
    def summary_size(self) -> int:
        return self.k

    def summarize(self, arrays: list[pa.Array]) -> np.ndarray:
        """Additive int64 summary of the reports in ``arrays`` (rows that did not report removed)."""
        return self.support_counts(arrays)

    def support_from_summary(self, summary: np.ndarray, n: int) -> np.ndarray:
        return np.asarray(summary)

    def decode_sums(self, summary: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
        """(sum of u_v, sum of u_v^2) over n reports, per value v, from their summary."""
        p, q = self.p_star, self.q_star
        d = p - q
        s = np.asarray(self.support_from_summary(summary, n), dtype=float)
        return (s - n * q) / d, (s * (1 - q) ** 2 + (n - s) * q ** 2) / d ** 2

    def decode_covariance(self, summary: np.ndarray, n: int, cosupport: np.ndarray | None) -> np.ndarray:
        """Covariance matrix of the frequency estimates (docs/formulas.md section 0.3); ``cosupport``
        counts the reports supporting both v and w (None: reports support one value each)."""
        from ..distribution import frequency_covariance

        s = self.support_from_summary(summary, n)
        return frequency_covariance(self.p_star, self.q_star, n, s, cosupport)

    def row_estimates(self, arrays: list[pa.Array]) -> np.ndarray:
        """Per-row unbiased indicator estimates, shape (n, k)."""
        s = self.support(arrays)
        p, q = self.p_star, self.q_star
        return (s - q) / (p - q)

    def per_row_columns(self, column: str) -> list[PerRowColumn]:
        """One column per category, ``<column>=<category>``: the row's unbiased indicator estimate."""
        return [PerRowColumn(f"{column}={c}", f"unbiased estimate of 1[{_value_text(column, c)}] for the row: its "
                                              f"mean over rows estimates the share of rows with "
                                              f"{_value_text(column, c)}")
                for c in self.categories]

    def per_row_values(self, arrays: list[pa.Array]) -> np.ndarray:
        """``row_estimates``: the per-row values whose sums the decoder keeps (``decode_sums``)."""
        return np.asarray(self.row_estimates(arrays), dtype=float)

    def variance(self, freq: np.ndarray | float) -> np.ndarray:
        """Exact n*Var of each frequency estimate for a fixed data set with frequencies ``freq``.

        n*Var(f_v) = [q*(1-q*) + f_v (p*-q*)(1-p*-q*)] / (p*-q*)^2  (Wang et al. 2017, restated
        in docs/formulas.md section 0.3; exact because the per-row reports are independent).
        """
        p, q = self.p_star, self.q_star
        f = np.asarray(freq, dtype=float)
        return (q * (1 - q) + f * (p - q) * (1 - p - q)) / (p - q) ** 2

    def total_variance(self) -> float:
        """n * sum_v Var(f_v): the expected squared L2 error of the whole frequency vector
        times n.  Data-independent, because the exact variance is linear in f and sum f = 1."""
        p, q = self.p_star, self.q_star
        return float(self.k * q * (1 - q) / (p - q) ** 2 + (1 - p - q) / (p - q))

    def approx_variance(self) -> float:
        """The 'f small' n*Var used in the paper's comparisons: q*(1-q*)/(p*-q*)^2."""
        p, q = self.p_star, self.q_star
        return q * (1 - q) / (p - q) ** 2

    # planning ----------------------------------------------------------------------
    def frequency_row_variance(self) -> float:
        """n * (mean over values of Var of a share) as ``ldpt estimate`` reports it, worst case over
        data: (noise summed over values + the spread 1 - sum f^2, largest for equal shares) / k
        (docs/formulas.md sections 0.3 and 0.4)."""
        k = self.k
        return (self.total_variance() + 1.0 - 1.0 / k) / k

    def missing_share_row_variance(self, missing_code: int | None) -> float | None:
        """Worst case over data of n * Var of one share as ``ldpt estimate`` reports it (the <missing>
        category's): the exact noise variance, linear in the share f (``variance``), plus the spread
        f (1 - f), maximized over f in [0, 1]."""
        if missing_code is None:
            return None
        a = float(self.variance(0.0))
        b = float(self.variance(1.0)) - a
        f = min(max((b + 1.0) / 2.0, 0.0), 1.0)
        return a + b * f + f * (1.0 - f)

    def efficiency(self) -> float:
        """Lower bound on the total variance of any eps-LDP frequency estimator over this one's
        (mechanisms/bounds.py)."""
        return frequency_lower_bound(self.epsilon, self.k) / self.total_variance()

    def _labels_dictionary(self, codes: np.ndarray) -> pa.Array:
        return pa.DictionaryArray.from_arrays(pa.array(codes.astype(np.int32)), pa.array(self.categories))


@register
class GRR(FrequencyOracle):
    """Generalized (k-ary) randomized response: keep the value w.p. e^eps/(e^eps+k-1), else
    report one of the other k-1 values uniformly.  Output: the reported category label.

    Sampling (docs/formulas.md section 10.4): two words per row (``variates.keep_or_other``):
    word 0 < Tk keeps the value; otherwise word 1 mod (k-1) numbers the other value reported when
    word 1 < a (k-1) (a = floor(2^64/(k-1)): each other value exactly a of the 2^64 words), the
    r = 2^64 - a (k-1) words left over keeping the value too.  So the realized channel is exact,
    with masses (``thresholds``) own = Tk 2^64 + (2^64 - Tk) r and other = (2^64 - Tk) a in
    units of 2^-128.  Tk is the largest
    threshold with own / other at most a certified lower bound of e^eps (``keep_threshold``): the
    realized ratio is at most e^eps exactly, and p*, q* are the realized own / 2^128,
    other / 2^128 (within a few units of 2^-64 of the ideal values, for any k)."""

    name: ClassVar[str] = "grr"

    @cached_property
    def keep_threshold(self) -> int:
        """Tk: word 0 < Tk keeps the value (``variates.keep_threshold``)."""
        return keep_threshold(exp_lower_bound(self.epsilon), self.k)

    @cached_property
    def thresholds(self) -> tuple[int, int]:
        """(own, other): the realized masses, in units of 2^-128, of reporting the value itself and
        each other value (own + (k-1) other = 2^128; ``variates.keep_masses``)."""
        return keep_masses(self.keep_threshold, self.k)

    def _threshold_ratio(self) -> Fraction:
        Tp, Tq = self.thresholds
        return Fraction(max(Tp, Tq), min(Tp, Tq))

    @property
    def p_star(self) -> float:
        return self.thresholds[0] / MASS_ONE

    @property
    def q_star(self) -> float:
        return self.thresholds[1] / MASS_ONE

    @property
    def words_per_row(self) -> int:
        return 2

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.dictionary(pa.int32(), pa.string()))]

    def output_meaning(self, field_name: str) -> str:
        return "reported category (randomized response over the mechanism's categories)"

    def randomize_codes(self, x: np.ndarray, words: np.ndarray) -> np.ndarray:
        """Reported codes from the first two words of each row (``variates.keep_or_other``)."""
        return keep_or_other(words[:, 0], words[:, 1], x, self.keep_threshold, self.k)

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return [self._labels_dictionary(self.randomize_codes(x, words))]

    def reported_codes(self, arrays: list[pa.Array]) -> np.ndarray:
        codes = pc.index_in(_as_strings(arrays[0]), value_set=pa.array(self.categories))
        return codes.to_numpy(zero_copy_only=False)

    def support(self, arrays: list[pa.Array]) -> np.ndarray:
        codes = self.reported_codes(arrays)
        return codes[:, None] == np.arange(self.k)[None, :]

    def support_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        codes = self.reported_codes(arrays)
        codes = codes[~np.isnan(codes)] if codes.dtype.kind == "f" else codes
        return np.bincount(codes.astype(np.int64), minlength=self.k)[: self.k]

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        codes = pc.index_in(_as_strings(arrays[0]), value_set=pa.array(self.categories))
        return int(codes.null_count)

    def channel(self) -> np.ndarray:
        p, q = self.p_star, self.q_star
        return np.full((self.k, self.k), q) + np.eye(self.k) * (p - q)

    # the likelihood decoder: the cells are the reported categories
    likelihood_reason: ClassVar[str] = ""

    @property
    def likelihood_cells(self) -> int:
        return self.k

    def likelihood_channel(self) -> np.ndarray:
        return self.channel()

    def likelihood_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        return self.support_counts(arrays).astype(np.int64)

    def max_log_ratio(self) -> float:
        return math.log(self._threshold_ratio())

    # second layer (memoized columns; docs/formulas.md section 9.3) ---------------------------
    supports_second_layer: ClassVar[bool] = True

    @property
    def second_layer_words_per_row(self) -> int:
        return 1

    def second_layer_thresholds(self, epsilon2: float) -> tuple[int, int]:
        """(Lp, Lq): k-ary RR at eps2 on the reported category, as integer masses in units of 2^-64
        rounded toward privacy (``grr_thresholds``): kept w.p. Lp / 2^64, each other category
        Lq / 2^64 exactly."""
        return _layer_thresholds("grr", float(epsilon2), self.k)

    def second_layer_ratio(self, epsilon2: float) -> Fraction:
        """The exact worst likelihood ratio of the composite (this channel's thresholds, then the
        layer's): k-ary RR with masses p' = Tp Lp + (k-1) Tq Lq, q' = Tq Lp + Tp Lq + (k-2) Tq Lq
        (units of 2^-192: (Tp, Tq) are the masses of ``thresholds``, in units of 2^-128)."""
        (Tp, Tq), (Lp, Lq), k = self.thresholds, self.second_layer_thresholds(epsilon2), self.k
        p2 = Tp * Lp + (k - 1) * Tq * Lq
        q2 = Tq * Lp + Tp * Lq + (k - 2) * Tq * Lq
        return Fraction(max(p2, q2), min(p2, q2))

    def composite_epsilon(self, epsilon2: float) -> float:
        """k-ary RR then k-ary RR is k-ary RR at eps' = ln(p'/q') (``second_layer_ratio``), stated as
        the smallest float whose certified e^eps' is at least the exact ratio."""
        return certified_epsilon(self.second_layer_ratio(epsilon2))

    def rerandomize(self, reports: list[pa.Array], words: np.ndarray, epsilon2: float) -> list[pa.Array]:
        """k-ary RR on the reported category from one word per row (``randomized_response``)."""
        arr = reports[0]
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if pa.types.is_dictionary(arr.type) and arr.dictionary.equals(pa.array(self.categories)):
            codes = np.asarray(arr.indices.to_numpy(zero_copy_only=False)).astype(np.int64)
        else:
            codes = np.asarray(self.reported_codes([arr])).astype(np.int64)
        return [self._labels_dictionary(randomized_response(words[:, 0], codes,
                                                            *self.second_layer_thresholds(epsilon2)))]

    def fit_test(self) -> HullFit:
        """The reported labels against the hull of the k x k channel (no data-independent feature
        exists: the support size is always 1)."""
        cats = pa.array(self.categories)

        def index(arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray]:
            codes = pc.index_in(_as_strings(arrays[0]), value_set=cats)
            bad = np.asarray(pc.is_null(codes).to_numpy(zero_copy_only=False))
            return np.asarray(pc.fill_null(codes, 0).to_numpy(zero_copy_only=False)).astype(np.int64), bad

        return HullFit(self, self.channel(), index, "reported categories")


class _UnaryEncoding(FrequencyOracle):
    """One-hot encode, then flip each bit independently: 1 stays 1 w.p. p, 0 becomes 1 w.p. q.
    Output: one string of k characters '0'/'1'; character j is the bit of category j.

    Sampling (docs/formulas.md section 10.4): bit j is ``word j < T`` with the integer threshold
    T = Tp at the row's value and Tq elsewhere (``thresholds``), so p* = Tp / 2^64 and
    q* = Tq / 2^64 exactly; the thresholds are rounded toward privacy, so that the realized worst
    ratio Tp (2^64 - Tq) / (Tq (2^64 - Tp)) is at most e^eps exactly."""

    @cached_property
    def thresholds(self) -> tuple[int, int]:
        """(Tp, Tq): the probabilities of a 1 at the row's value and elsewhere, in units of 2^-64."""
        raise NotImplementedError

    def _threshold_ratio(self) -> Fraction:
        # Two inputs differ in two bit positions: the ratio is (a(b_x) / b(b_x)) (b(b_x') / a(b_x'))
        # with a(1) = Tp, a(0) = 2^64 - Tp, b(1) = Tq, b(0) = 2^64 - Tq; its largest value over the bits.
        Tp, Tq = self.thresholds
        W = THRESHOLD_ONE
        r = [Fraction(Tp, Tq), Fraction(W - Tp, W - Tq)]
        return max(r) * max(1 / v for v in r)

    @property
    def p_star(self) -> float:
        return self.thresholds[0] / THRESHOLD_ONE

    @property
    def q_star(self) -> float:
        return self.thresholds[1] / THRESHOLD_ONE

    @property
    def words_per_row(self) -> int:
        return self.k

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.string())]

    def output_meaning(self, field_name: str) -> str:
        return "report bits: character j is the randomized bit of category j of the mechanism's categories"

    def randomize_bits(self, x: np.ndarray, words: np.ndarray) -> np.ndarray:
        # bit j = word j < (Tp if j == x else Tq): probabilities Tp / 2^64 and Tq / 2^64 exactly
        rows = np.arange(x.shape[0])
        Tp, Tq = self.thresholds
        bits = words_below(words, Tq)
        bits[rows, x] = words_below(words[rows, x], Tp)
        return bits

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return [bits_to_strings(self.randomize_bits(x, words))]

    def support(self, arrays: list[pa.Array]) -> np.ndarray:
        bits, bad = strings_to_bits(arrays[0], self.k)
        if bad.any():
            bits[bad] = False
        return bits

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        _, bad = strings_to_bits(arrays[0], self.k)
        return int(bad.sum())

    def channel(self) -> np.ndarray:
        """Exact P(bit vector | input) over all 2^k outputs (k <= 12), columns in binary order
        with bit j of the output index = character j of the report."""
        if self.k > 12:
            raise ValueError("the full channel of a unary encoding is enumerated only for k <= 12")
        outs = (np.arange(1 << self.k)[:, None] >> np.arange(self.k)[None, :]) & 1  # (2^k, k)
        P = np.empty((self.k, 1 << self.k))
        for x in range(self.k):
            prob1 = np.full(self.k, self.q_star)
            prob1[x] = self.p_star
            P[x] = np.prod(np.where(outs == 1, prob1, 1 - prob1), axis=1)
        return P

    # the likelihood decoder: the cells are the 2^k bit vectors (index: bit j = character j), k <= 12
    likelihood_reason: ClassVar[str] = ""

    def likelihood_refusal(self) -> str:
        if self.k > 12:
            return (f"its reports are bit vectors over the {self.k} categories, and the likelihood decoder enumerates "
                    "the 2^k possible reports only for at most 12 categories")
        return super().likelihood_refusal()

    @property
    def likelihood_cells(self) -> int:
        return 1 << self.k

    def likelihood_channel(self) -> np.ndarray:
        return self.channel()

    def likelihood_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        bits, bad = strings_to_bits(arrays[0], self.k)
        index = bits[~bad].astype(np.int64) @ (np.int64(1) << np.arange(self.k, dtype=np.int64))
        return np.bincount(index, minlength=1 << self.k).astype(np.int64)

    def max_log_ratio(self) -> float:
        # Two inputs differ in two bit positions; the worst output has 1 at x and 0 at x'
        # (the realized integer channel: ``realized_ratio``).
        return math.log(self._threshold_ratio())

    def fit_test(self) -> OnesCountFit:
        """The number of ones per report has a data-independent distribution."""
        return OnesCountFit(self)

    # second layer (memoized columns; docs/formulas.md section 9.3) ---------------------------
    supports_second_layer: ClassVar[bool] = True

    @property
    def second_layer_words_per_row(self) -> int:
        return self.k

    def second_layer_thresholds(self, epsilon2: float) -> tuple[int, int]:
        """(Lk, Lf), Lk + Lf = 2^64: every bit kept w.p. Lk / 2^64, else flipped, with squared odds
        (Lk / Lf)^2 at most e^eps2 (``symmetric_thresholds``, rounded toward privacy): on a one-hot
        vector the layer alone is eps2-LDP."""
        return _layer_thresholds("symmetric", float(epsilon2), 2)

    def second_layer_ratio(self, epsilon2: float) -> Fraction:
        """The exact worst likelihood ratio of the composite: a unary encoding whose bit is 1 with
        mass P = Tp Lk + (2^64 - Tp) Lf at the row's value and Q = Tq Lk + (2^64 - Tq) Lf elsewhere
        (units of 2^-128); the worst output has 1 at x and 0 at x'."""
        (Tp, Tq), (Lk, Lf), W2 = self.thresholds, self.second_layer_thresholds(epsilon2), THRESHOLD_ONE ** 2
        P = Tp * Lk + (THRESHOLD_ONE - Tp) * Lf
        Q = Tq * Lk + (THRESHOLD_ONE - Tq) * Lf
        r = [Fraction(P, Q), Fraction(W2 - P, W2 - Q)]
        return max(r) * max(1 / v for v in r)

    def composite_epsilon(self, epsilon2: float) -> float:
        """The composite is a unary encoding with p' = P / 2^128, q' = Q / 2^128 (``second_layer_ratio``);
        p = 1/2 gives p' = 1/2 (oue), q = 1 - p gives q' = 1 - p' (sue): the family is kept.  Stated
        as the smallest float whose certified e^eps' is at least the exact ratio."""
        return certified_epsilon(self.second_layer_ratio(epsilon2))

    def rerandomize(self, reports: list[pa.Array], words: np.ndarray, epsilon2: float) -> list[pa.Array]:
        """Every bit of the report kept when its word is below Lk, else flipped."""
        bits, _ = strings_to_bits(reports[0], self.k)
        keep = words_below(words, self.second_layer_thresholds(epsilon2)[0])
        return [bits_to_strings(bits ^ ~keep)]


@register
class SUE(_UnaryEncoding):
    """Symmetric unary encoding: p = e^(eps/2)/(e^(eps/2)+1), q = 1 - p.  Realized as
    Tp + Tq = 2^64 with the smallest Tq whose squared odds ((2^64 - Tq) / Tq)^2 are at most a
    certified lower bound of e^eps (docs/formulas.md section 10.4)."""

    name: ClassVar[str] = "sue"

    @cached_property
    def thresholds(self) -> tuple[int, int]:
        return symmetric_thresholds(exp_lower_bound(self.epsilon))


@register
class OUE(_UnaryEncoding):
    """Optimized unary encoding: p = 1/2, q = 1/(e^eps+1).  Realized as Tp = 2^63 (p = 1/2
    exactly) and the smallest Tq with (2^64 - Tq) / Tq at most a certified lower bound of e^eps
    (docs/formulas.md section 10.4)."""

    name: ClassVar[str] = "oue"

    @cached_property
    def thresholds(self) -> tuple[int, int]:
        Tp = THRESHOLD_ONE // 2
        return Tp, second_threshold(Tp, exp_lower_bound(self.epsilon))


@functools.lru_cache(maxsize=64)
def _layer_thresholds(kind: str, epsilon2: float, outputs: int) -> tuple[int, int]:
    """The second layer's integer thresholds at eps2 (cached: the certified bound of e^eps2 is
    computed once per layer, not per batch)."""
    bound = exp_lower_bound(epsilon2)
    return grr_thresholds(bound, outputs) if kind == "grr" else symmetric_thresholds(bound)


HASH_PRIME = (1 << 31) - 1  # Mersenne prime 2^31 - 1


class OLHParams(BaseModel):
    """Policy fields of ``olh``: the hash range."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    hash_range: Annotated[int, Field(strict=True)] | None = Field(
        None, description="number of hash buckets g (default near e^eps+1)")


@register
class OLH(FrequencyOracle):
    """Optimized local hashing.

    Each row draws a public hash H(v) = floor(((a*v + b) mod P) * g / P) with P = 2^31 - 1,
    a uniform in 1..P-1 and b uniform in 0..P-1 (the pair is written to the extract as
    ``a*P + b`` in the column ``<name>__hash``), then applies GRR over the g buckets to H(x)
    (column ``<name>``).  For v != x the pair (a*v+b, a*x+b) mod P is uniform over distinct
    pairs, so the collision probability c = P(H(v) = H(x)) is computed exactly from the
    bucket sizes (it is 1/g up to O(1/P)), and q* uses that exact c: the estimator is
    exactly unbiased, not only up to hashing error.  g defaults to the integer near
    e^eps + 1 with the lower variance.

    Sampling: words 0 and 1 give a and b (reduced modulo P - 1 and P: each within 2^-33 relative
    of uniform, which moves q* by as little, and no privacy loss, the seed being drawn independently
    of x); words 2 and 3 are randomized response over the g buckets as grr samples it
    (``variates.keep_or_other``, threshold rounded toward privacy): exact masses own and other in
    units of 2^-128 (``thresholds``) with own / other at most e^eps exactly, p* = own / 2^128
    (docs/formulas.md section 10.4).
    """

    name: ClassVar[str] = "olh"
    Params: ClassVar[type[BaseModel]] = OLHParams
    likelihood_reason: ClassVar[str] = (
        "its reports carry a per-row public hash seed: which categories a report supports depends on that row's "
        "seed, so the reports do not reduce to one finite channel, and the parametric bootstrap of the likelihood "
        "decoder has no exact distribution of the supported sets to draw from")
    second_layer_reason: ClassVar[str] = (
        "mechanism olh writes its public hash seed as part of the memoized report: the seed stays the same for a "
        "person and value in every release, so it would remain an exact linkage key and still show every change "
        "of value, whatever a second layer did to the reported bucket")

    def __init__(self, epsilon: float, categories: list[str], hash_range: int | None = None) -> None:
        super().__init__(epsilon, categories)
        if self.k >= HASH_PRIME:
            raise PolicyError(f"mechanism olh: at most {HASH_PRIME - 1} categories")
        if hash_range is None:
            hash_range = self.best_hash_range(self.epsilon)
        if isinstance(hash_range, bool) or not isinstance(hash_range, int) or not 2 <= hash_range < (1 << 30):
            raise PolicyError(f"mechanism olh: hash_range must be an integer from 2 to 2^30, got {hash_range!r}")
        self.g = int(hash_range)

    @staticmethod
    def best_hash_range(epsilon: float) -> int:
        e = math.exp(epsilon)
        if e + 1 >= (1 << 30) - 1:
            return (1 << 30) - 1
        cands = {max(2, math.floor(e) + 1), max(2, math.ceil(e) + 1)}
        return min(sorted(cands), key=lambda g: (e - 1 + g) ** 2 / ((e - 1) ** 2 * (g - 1)))

    def to_spec(self) -> dict[str, Any]:
        spec = super().to_spec()
        spec["hash_range"] = self.g
        return spec

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> OLH:
        cls._check_family(spec)
        return cls(spec["epsilon"], spec["categories"], spec.get("hash_range"))

    @cached_property
    def collision_probability(self) -> float:
        # Bucket j holds the z with floor(z*g/P) = j: ceil((j+1)P/g) - ceil(jP/g) values, i.e.
        # floor(P/g) or floor(P/g)+1; with P = a*g + r exactly r buckets hold a+1 (sizes add to P).
        P, g = HASH_PRIME, self.g
        a, r = divmod(P, g)
        pairs = r * (a + 1) * a + (g - r) * a * (a - 1)   # sum of size*(size-1), exact integers
        return pairs / (P * (P - 1))

    @cached_property
    def keep_threshold(self) -> int:
        """Tk: word 2 < Tk reports the row's own bucket (``variates.keep_threshold``)."""
        return keep_threshold(exp_lower_bound(self.epsilon), self.g)

    @cached_property
    def thresholds(self) -> tuple[int, int]:
        """(own, other), own + (g-1) other = 2^128: the realized masses in units of 2^-128 of
        reporting the row's own bucket and each other bucket (``variates.keep_masses``)."""
        return keep_masses(self.keep_threshold, self.g)

    def realized_ratio(self) -> Fraction:
        # Given the seed (drawn independently of x) the channel is randomized response on g buckets.
        Tp, Tq = self.thresholds
        return Fraction(max(Tp, Tq), min(Tp, Tq))

    @property
    def p_star(self) -> float:
        return self.thresholds[0] / MASS_ONE

    @property
    def q_star(self) -> float:
        p, c = self.p_star, self.collision_probability
        return p * c + (1 - c) * self.thresholds[1] / MASS_ONE

    @property
    def words_per_row(self) -> int:
        return 4

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column + "__hash", pa.int64()), pa.field(column, pa.int32())]

    def output_meaning(self, field_name: str) -> str:
        if field_name.endswith("__hash"):
            return "public hash seed a*P+b of this row (P = 2^31-1)"
        return "reported hash bucket (randomized response over the hash_range buckets)"

    def hash_values(self, seeds: np.ndarray, v: np.ndarray) -> np.ndarray:
        """H_seed(v) for broadcastable uint64 ``seeds`` and ``v``."""
        P = np.uint64(HASH_PRIME)
        a, b = seeds // P, seeds % P
        z = (a * v.astype(np.uint64) + b) % P
        return ((z * np.uint64(self.g)) // P).astype(np.int64)

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        P = np.uint64(HASH_PRIME)
        a = to_below(words[:, 0], HASH_PRIME - 1).astype(np.uint64) + np.uint64(1)
        b = to_below(words[:, 1], HASH_PRIME).astype(np.uint64)
        seeds = a * P + b
        h = self.hash_values(seeds, x)
        y = keep_or_other(words[:, 2], words[:, 3], h, self.keep_threshold, self.g)   # exact masses (section 10.4)
        return [pa.array(seeds.astype(np.int64)), pa.array(y.astype(np.int32))]

    def _decode_inputs(self, arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        seeds_arr = pc.cast(arrays[0], pa.int64(), safe=False)
        y_arr = pc.cast(arrays[1], pa.int64(), safe=False)
        null = np.asarray(pc.or_(pc.is_null(seeds_arr), pc.is_null(y_arr)))
        seeds = np.asarray(pc.fill_null(seeds_arr, 0).to_numpy(zero_copy_only=False))
        y = np.asarray(pc.fill_null(y_arr, -1).to_numpy(zero_copy_only=False))
        P = HASH_PRIME
        bad = null | (seeds < P) | (seeds >= P * P) | (y < 0) | (y >= self.g)
        return seeds.astype(np.uint64), y, bad

    def support(self, arrays: list[pa.Array]) -> np.ndarray:
        seeds, y, bad = self._decode_inputs(arrays)
        out = np.empty((len(y), self.k), dtype=bool)
        v = np.arange(self.k, dtype=np.uint64)
        step = max(1, (1 << 22) // max(self.k, 1))  # bound the temporary n*k matrix
        for s in range(0, len(y), step):
            e = min(s + step, len(y))
            out[s:e] = self.hash_values(seeds[s:e, None], v[None, :]) == y[s:e, None]
        out[bad] = False
        return out

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        return int(self._decode_inputs(arrays)[2].sum())

    def channel_given_seeds(self, seeds: np.ndarray) -> np.ndarray:
        """P(y | x, seed) for each seed: array of shape (len(seeds), k, g)."""
        h = self.hash_values(seeds[:, None], np.arange(self.k, dtype=np.uint64)[None, :])  # (s, k)
        p = self.p_star
        q = self.thresholds[1] / MASS_ONE
        out = np.full((len(seeds), self.k, self.g), q)
        s_idx, x_idx = np.meshgrid(np.arange(len(seeds)), np.arange(self.k), indexing="ij")
        out[s_idx, x_idx, h] = p
        return out

    def max_log_ratio(self) -> float:
        # The seed is drawn independently of x; given the seed the channel is GRR on g buckets.
        return math.log(self.realized_ratio())

    def fit_test(self) -> SupportSizeFit:
        """The support size's mean and the reported buckets' distribution are data-independent."""
        return SupportSizeFit(self)


def _value_text(column: str, label: str) -> str:
    """``column = label`` in words (the labels the policy adds: a missing value, another category)."""
    if label == "<missing>":
        return f"{column} missing"
    if label == "<other>":
        return f"{column} not one of its listed categories"
    return f"{column} = {label}"


def _as_strings(arr: pa.Array) -> pa.Array:
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type)):
        arr = pc.cast(arr, pa.string())
    return arr


def bits_to_strings(bits: np.ndarray) -> pa.Array:
    """(n, k) booleans -> string array of '0'/'1' characters, built without a Python loop."""
    n, k = bits.shape
    data = (bits.astype(np.uint8) + np.uint8(48)).tobytes()
    if n * k < (1 << 31) - 1:
        offsets = np.arange(0, (n + 1) * k, k, dtype=np.int32)
        return pa.StringArray.from_buffers(n, pa.py_buffer(offsets.tobytes()), pa.py_buffer(data))
    offsets = np.arange(0, (n + 1) * k, k, dtype=np.int64)
    return pa.LargeStringArray.from_buffers(n, pa.py_buffer(offsets.tobytes()), pa.py_buffer(data))


def strings_to_bits(arr: pa.Array, k: int) -> tuple[np.ndarray, np.ndarray]:
    """String array of '0'/'1' reports -> ((n, k) booleans, (n,) bad-row mask).

    Integers (a CSV read by a tool that dropped leading zeros) are left-padded back to k
    characters.  A row is bad if it is null, has another length, or has other characters.
    """
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_integer(arr.type):
        arr = pc.utf8_lpad(pc.cast(arr, pa.string()), width=k, padding="0")
    arr = _as_strings(arr)
    n = len(arr)
    lengths = pc.fill_null(pc.binary_length(arr), -1).to_numpy(zero_copy_only=False)
    ok = lengths == k
    if ok.all() and arr.null_count == 0:
        offsets_dtype = np.int64 if pa.types.is_large_string(arr.type) else np.int32
        offs = np.frombuffer(arr.buffers()[1], dtype=offsets_dtype)[arr.offset: arr.offset + n + 1]
        raw = np.frombuffer(arr.buffers()[2], dtype=np.uint8)[offs[0]: offs[-1]].reshape(n, k)
    else:
        fixed = pc.if_else(pa.array(ok), arr, pa.scalar("0" * k))
        ones, bad = strings_to_bits(fixed, k)
        return ones, bad | ~ok
    ones = raw == 49
    bad = ~(ones | (raw == 48)).all(axis=1)
    return ones, bad


# -- goodness of fit (mechanisms/fit.py) ---------------------------------------------------------

class OnesCountFit(FitStats):
    """``oue``/``sue``: histogram of the number of ones per report (length k+1)."""

    mechanism: _UnaryEncoding
    TESTS = 2

    def __init__(self, mechanism: _UnaryEncoding) -> None:
        super().__init__(mechanism)
        self.stats["hist"] = np.zeros(mechanism.k + 1, dtype=np.int64)

    def _add(self, arrays: list[pa.Array]) -> None:
        k = self.mechanism.k
        arr = arrays[0]
        n = len(arr)
        step = max(1, SUPPORT_CHUNK // max(k, 1))
        for s in range(0, n, step):                     # chunks of rows bound the (rows, k) matrix
            bits, bad = strings_to_bits(arr.slice(s, step), k)
            ones = bits[~bad].sum(axis=1)
            self.stats["hist"] += np.bincount(ones, minlength=k + 1)
            self.stats["impossible"] += int(bad.sum())
        self.stats["rows"] += n

    def pmf(self) -> np.ndarray:
        """Exact P(T = t), t = 0..k: Bernoulli(p*) + Binomial(k-1, q*) (independent bits)."""
        from scipy.stats import binom

        m = self.mechanism
        b = binom.pmf(np.arange(m.k), m.k - 1, m.q_star)
        out = np.zeros(m.k + 1)
        out[:-1] += (1 - m.p_star) * b
        out[1:] += m.p_star * b
        return out

    def results(self, alpha: float) -> list[FitResult]:
        m = self.mechanism
        n, bad = self.rows, self.impossible
        p, q, k = m.p_star, m.q_star, m.k
        mean_name = (f"the mean number of ones per report equals p* + (k-1) q* = {p + (k - 1) * q:.6g}, as "
                     f"{m.name} at eps {m.epsilon:g} with k = {k} implies for every input")
        hist_name = ("the number of ones per report follows Bernoulli(p*) + Binomial(k-1, q*), as "
                     f"{m.name} at eps {m.epsilon:g} with k = {k} implies for every input")
        ref_mean = "standard normal, two-sided (exact null variance)"
        ref_hist = "chi-square, df = pooled cells - 1 (simple null)"
        good = n - bad
        unusable = unusable_results([(mean_name, "ones-mean", ref_mean), (hist_name, "ones-histogram", ref_hist)],
                                    alpha, n, bad, good)
        if unusable is not None:
            return unusable
        h = self.stats["hist"].astype(float)
        t = np.arange(k + 1)
        mu, var = p + (k - 1) * q, p * (1 - p) + (k - 1) * q * (1 - q)
        mean = float((h * t).sum() / good)
        z = (mean - mu) / math.sqrt(var / good)
        out = [_result(mean_name, "ones-mean", z, None, ref_mean, _norm_two_sided(z), alpha, n, 0,
                       f"mean {mean:.5g} ones per report over {good} reports, expected {mu:.5g} (SE "
                       f"{math.sqrt(var / good):.2g}): z = {z:.2f}", observed=mean, expected=mu)]
        out.append(_pearson_result(hist_name, "ones-histogram", ref_hist, h, self.pmf(), alpha, n, good,
                                   "cells of the ones count"))
        return out


def _bucket_groups(m: OLH) -> tuple[np.ndarray, np.ndarray]:
    """Group boundaries (bucket indices, length G+1) of at most BUCKET_GROUPS adjacent buckets and
    the exact probability of each group under the declared mechanism, for every input:
    P(y in group) = p* S/P + (cnt - S/P)(1-p*)/(g-1), S = hash inputs z in the group's buckets."""
    g, P = m.g, HASH_PRIME
    G = min(g, BUCKET_GROUPS)
    jb = (np.arange(G + 1, dtype=np.int64) * g) // G
    zstart = -((-jb * P) // g)                       # ceil(j P / g): first z of bucket j
    S = np.diff(zstart).astype(float)
    cnt = np.diff(jb).astype(float)
    p = m.p_star
    other = (1 - p) / (g - 1)
    return jb, p * S / P + (cnt - S / P) * other


class SupportSizeFit(FitStats):
    """``olh``: histogram of the support size |S(y)| over 0..k, and of the reported bucket
    (grouped).  Also usable level by level inside ``HierarchyFit``."""

    mechanism: OLH

    TESTS = 2

    def __init__(self, mechanism: OLH) -> None:
        super().__init__(mechanism)
        self.stats["sizes"] = np.zeros(mechanism.k + 1, dtype=np.int64)
        self._jb, self._gprob = _bucket_groups(mechanism)
        self.stats["buckets"] = np.zeros(len(self._gprob), dtype=np.int64)

    def _add(self, arrays: list[pa.Array]) -> None:
        seeds, y, bad = self.mechanism._decode_inputs(arrays)
        self.add_decoded(seeds, y, bad)

    def add_decoded(self, seeds: np.ndarray, y: np.ndarray, bad: np.ndarray) -> None:
        """Rows already parsed: uint64 hash seeds, reported buckets, impossible-row mask."""
        m = self.mechanism
        self.stats["rows"] += len(y)
        self.stats["impossible"] += int(bad.sum())
        seeds, y = seeds[~bad], np.asarray(y[~bad], dtype=np.int64)
        v = np.arange(m.k, dtype=np.uint64)
        step = max(1, SUPPORT_CHUNK // max(m.k, 1))
        for s in range(0, len(y), step):                # chunks bound the (rows, k) hash matrix
            size = (m.hash_values(seeds[s: s + step, None], v[None, :]) == y[s: s + step, None]).sum(axis=1)
            self.stats["sizes"] += np.bincount(size, minlength=m.k + 1)
        grp = np.searchsorted(self._jb, y, side="right") - 1
        self.stats["buckets"] += np.bincount(grp, minlength=len(self._gprob))

    def results(self, alpha: float) -> list[FitResult]:
        m = self.mechanism
        n, bad = self.rows, self.impossible
        p, q, k = m.p_star, m.q_star, m.k
        mu = p + (k - 1) * q
        mean_name = (f"the mean number of categories a report supports equals p* + (k-1) q* = {mu:.6g}, as "
                     f"{m.name} at eps {m.epsilon:g} with k = {k} and hash range {m.g} implies for every input")
        bucket_name = (f"the reported buckets follow the data-independent distribution of {m.name} with hash "
                       f"range {m.g} at eps {m.epsilon:g}")
        ref_mean = "standard normal, two-sided (variance estimated from the reports; asymptotic)"
        ref_b = "chi-square, df = pooled cells - 1 (simple null)"
        h = self.stats["sizes"].astype(float)
        good = int(h.sum())
        unusable = unusable_results([(mean_name, "support-mean", ref_mean), (bucket_name, "bucket-histogram", ref_b)],
                                    alpha, n, bad, good)
        if unusable is not None:
            return unusable
        t = np.arange(k + 1, dtype=float)
        mean = float((h * t).sum() / good)
        var = float((h * (t - mean) ** 2).sum() / (good - 1))
        if var > 0:
            se = math.sqrt(var / good)
            z = (mean - mu) / se
            pval = _norm_two_sided(z)
        else:
            se, z = 0.0, (0.0 if abs(mean - mu) < 1e-12 else math.copysign(math.inf, mean - mu))
            pval = 1.0 if z == 0 else 0.0
        out = [_result(mean_name, "support-mean", z, None, ref_mean, pval, alpha, n, 0,
                       f"mean support size {mean:.5g} over {good} reports, expected {mu:.5g} (SE {se:.2g}): "
                       f"z = {z:.2f}", observed=mean, expected=mu)]
        out.append(_pearson_result(bucket_name, "bucket-histogram", ref_b, self.stats["buckets"], self._gprob,
                                   alpha, n, good, "groups of reported buckets"))
        return out
