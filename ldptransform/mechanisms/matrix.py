"""Post-randomization with a transition matrix the steward supplies ("matrix").

Source: J. M. Gouweleeuw, P. Kooiman, L. C. R. J. Willenborg, P.-P. de Wolf, "Post
Randomisation for Statistical Disclosure Control: Theory and Implementation", Journal of
Official Statistics 14(4), 1998.  Each row's true category x is replaced by category y with
probability P[x, y] (rows of P = true category, columns = published category, both in the
order of the mechanism's categories; each row sums to 1), independently across rows.

Local differential privacy (docs/formulas.md section 11 [D]): the channel is eps-LDP iff in every
published column l the largest entry is at most e^eps times the smallest, so the eps a matrix
gives is max over l of ln(max_x P[x, l] / min_x P[x, l]).  A zero entry makes that ratio
unbounded, so every entry must be strictly positive (many classical post-randomization
designs that only swap "nearby" categories are therefore not LDP).  The matrix must also be
fixed in advance: a matrix computed from the confidential data itself (for instance an
"invariant" matrix built from the data's own distribution) makes the randomizer depend on the
data, and the LDP statement no longer holds as it stands.

Sampling is exact: P is held as whole-number masses in units of 2^-50
(``random.variates.integer_masses``) and sampled by integer comparison with the top 50 bits of one
PRF word (``random.variates.draw_index``).  That realized matrix is ``channel()``; the privacy check
(``max_log_ratio``) and the decoder use it, not the floats of the policy file (they differ by
a few units of 2^-50 per entry).

Decoding solves the linear system: with W = P^{-1}, the per-row estimate u(y) = W[y] (row y
of W) is unbiased, because E[u(Y) | x] = sum_y P[x, y] W[y] = (P W)[x] = e_x.  Summed over
rows this is the moment estimator T^ = (P^T)^{-1} T* of the paper (T* = histogram of the
published categories).  Unlike the "pure" protocols (docs/formulas.md section 0.3), the variance
of the estimates depends on the whole true distribution, not on f_v alone, and the total
variance is data-dependent; ``total_variance`` returns its worst case over data sets.
"""

from __future__ import annotations

import math
from fractions import Fraction
from functools import cached_property
from numbers import Real
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel, ConfigDict, Field

from ..errors import PolicyError
from ..random.variates import SAMPLING_BITS, draw_index, guide_table, integer_masses, masses_ratio, sampling_table
from .base import Mechanism, register, worst_channel_pairs
from .categorical import FrequencyOracle, _as_strings
from .fit import HullFit


# A k x k matrix is written into the policy and the manifest; 1024 categories is already a
# million entries.  (The shared sampler itself allows up to 8192 rows.)
MAX_MATRIX_CATEGORIES = 1024
ROW_SUM_TOLERANCE = 1e-9
MAX_CONDITION = 1e8
# Relative slack on the column's eps for float round-off only (the eps of the realized
# integer masses is compared with the column's eps).
EPS_ROUNDOFF = 1e-12
# integer_masses needs e^eps to be finite; any matrix beyond this is refused anyway.
_MAX_TARGET_EPS = 700.0
_UNIT = float(1 << SAMPLING_BITS)
MATRIX_HULL_MAX_K = 1024    # the fit test works on the k x k channel (the mechanism's own cap)


class MatrixParams(BaseModel):
    """Policy fields of ``matrix``: the transition matrix (required)."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    matrix: Any = Field(description="transition probabilities, one row per true category and one column per "
                                    "published category, in the order of categories (then <missing>, <other> if "
                                    "added); rows sum to 1, every entry > 0")


def grr_matrix(epsilon: float, k: int) -> np.ndarray:
    """The transition matrix of generalized randomized response over k categories: e^eps/(e^eps+k-1)
    on the diagonal, 1/(e^eps+k-1) off it (Wang, Blocki, Li, Jha, USENIX Security 2017; its
    column ratio is exactly e^eps, docs/formulas.md section 11 [D])."""
    e = math.exp(float(epsilon))
    k = int(k)
    P = np.full((k, k), 1.0 / (e + k - 1))
    np.fill_diagonal(P, e / (e + k - 1))
    return P


@register
class Matrix(FrequencyOracle):
    """Post-randomization with the steward's k x k transition matrix (module docstring).

    Output: one column of published category labels (dictionary-encoded strings, as GRR).
    Two PRF words per row; word 1 drives the draw, word 0 is reserved (unused)."""

    name: ClassVar[str] = "matrix"
    Params: ClassVar[type[BaseModel]] = MatrixParams
    accepts_binned: ClassVar[bool] = False
    binned_refusal: ClassVar[str] = "its transition matrix is given only on a categorical column"

    @classmethod
    def missing_field_message(cls, field: str, domain: Any) -> str:
        domain = [str(d) for d in domain]
        return (f"mechanism matrix needs the transition matrix: give matrix: [[...], ...] with one row and one column "
                f"per value ({len(domain)}: {', '.join(domain)})")

    def __init__(self, epsilon: float, categories: list[str], matrix: Any) -> None:
        super().__init__(epsilon, categories)
        if self.k > MAX_MATRIX_CATEGORIES:
            raise PolicyError(f"mechanism matrix, field 'categories': at most {MAX_MATRIX_CATEGORIES} categories "
                              f"(the k x k matrix is written into the policy and the manifest), got {self.k}; "
                              "merge categories or use another categorical mechanism")
        self._supplied = self._check_matrix(matrix)
        self._check_conditioning()
        self._realize()

    # -- validation ----------------------------------------------------------------
    def _label(self, i: int) -> str:
        return f"{i} ({self.categories[i]!r})"

    def _shape_hint(self) -> str:
        k = self.k
        cats = ", ".join(repr(c) for c in self.categories[:20]) + (", ..." if k > 20 else "")
        return (f"give {k} rows of {k} numbers, one row per true category and one column per published "
                f"category, both in the order {cats}")

    def _check_matrix(self, matrix: Any) -> list[list[float]]:
        k = self.k
        head = "mechanism matrix, field 'matrix'"
        if isinstance(matrix, np.ndarray):
            if matrix.ndim != 2 or matrix.dtype.kind not in "iuf":
                raise PolicyError(f"{head}: the transition matrix must be a 2-dimensional array of numbers; "
                                  + self._shape_hint())
            matrix = matrix.tolist()
        if isinstance(matrix, (str, bytes)) or not isinstance(matrix, (list, tuple)):
            raise PolicyError(f"{head}: the transition matrix must be a list of rows, got "
                              f"{type(matrix).__name__}; " + self._shape_hint())
        if len(matrix) != k:
            raise PolicyError(f"{head}: the transition matrix has {len(matrix)} rows but the column has {k} "
                              "categories (including any category added for missing or unknown values); "
                              + self._shape_hint())
        return [self._check_row(head, i, row) for i, row in enumerate(matrix)]

    def _check_row(self, head: str, i: int, row: Any) -> list[float]:
        k = self.k
        if isinstance(row, (str, bytes)) or not isinstance(row, (list, tuple)) or len(row) != k:
            got = f"{len(row)} entries" if isinstance(row, (list, tuple)) else f"a {type(row).__name__}"
            raise PolicyError(f"{head}: row {self._label(i)} has {got}, but the matrix must be {k} x {k}; "
                              + self._shape_hint())
        out = [self._check_entry(head, i, j, v) for j, v in enumerate(row)]
        s = math.fsum(out)
        if abs(s - 1.0) > ROW_SUM_TOLERANCE:
            raise PolicyError(
                f"{head}: row {self._label(i)} sums to {s:.12g}, not 1 (allowed difference "
                f"{ROW_SUM_TOLERANCE:g}); each row holds the probabilities of publishing each category for "
                "that true category, so it must sum to 1. Rescale the row (divide each entry by its sum)")
        return out

    def _check_entry(self, head: str, i: int, j: int, v: Any) -> float:
        if isinstance(v, bool) or not isinstance(v, Real):
            raise PolicyError(f"{head}: entry row {self._label(i)}, column {self._label(j)} is "
                              f"{type(v).__name__}, not a number; write each probability as a number "
                              "such as 0.05")
        fv = float(v)
        if not math.isfinite(fv):
            raise PolicyError(f"{head}: entry row {self._label(i)}, column {self._label(j)} is not a "
                              "finite number; write each probability as a number strictly between 0 and 1")
        if not fv > 0.0:
            raise PolicyError(
                f"{head}: entry row {self._label(i)}, column {self._label(j)} is {fv:g}; every entry "
                "must be strictly positive, because a zero (or negative) probability of publishing a "
                "category for one true category but not for another gives an unbounded likelihood "
                "ratio (no local differential privacy at any eps). Give that entry a positive "
                "probability and take it from the other entries of its row so the row still sums to 1")
        if fv < 1.0 / _UNIT:
            raise PolicyError(
                f"{head}: entry row {self._label(i)}, column {self._label(j)} is {fv:.3g}, below the "
                f"sampler's resolution 2^-{SAMPLING_BITS} (about {1.0 / _UNIT:.2g}), so it cannot be "
                "realized as given; such an entry would in any case give an eps above 30. Raise it "
                "(taking the mass from the other entries of its row)")
        return fv

    @cached_property
    def _normalized(self) -> np.ndarray:
        P = np.array(self._supplied, dtype=float)
        return P / P.sum(axis=1, keepdims=True)

    def _check_conditioning(self) -> None:
        cond = float(np.linalg.cond(self._normalized))
        if not (math.isfinite(cond) and cond <= MAX_CONDITION):
            what = "singular (not invertible)" if not math.isfinite(cond) or cond > 1e15 else "ill-conditioned"
            cond_text = "infinite" if not math.isfinite(cond) else f"{cond:.3g}"
            raise PolicyError(
                f"mechanism matrix, field 'matrix': the transition matrix is {what} (condition number "
                f"{cond_text}, allowed up to {MAX_CONDITION:g}). The frequencies are decoded by inverting it, and a "
                "nearly singular matrix would amplify the noise without bound (for example two rows that are "
                "equal or nearly equal make those two true categories indistinguishable). Make the rows "
                "clearly different, for example give each row's own category a larger share")

    # -- the realized channel --------------------------------------------------------
    def _realize(self) -> None:
        P = self._normalized
        with np.errstate(divide="ignore"):
            eps_float = float(np.max(np.log(P.max(axis=0)) - np.log(P.min(axis=0))))
        limit = self.epsilon * (1.0 + EPS_ROUNDOFF)
        # A matrix within the column's eps is realized so that no column ratio exceeds the
        # column's e^eps (integer_masses raises the smallest masses by at most a unit or two);
        # one beyond it is realized faithfully, only to measure the eps it really gives.
        target = min(eps_float, self.epsilon) if eps_float <= limit else eps_float
        F = integer_masses(P, min(target, _MAX_TARGET_EPS))
        ratios = np.log(F.max(axis=0)) - np.log(F.min(axis=0))
        col = int(np.argmax(ratios))
        actual = float(ratios[col])
        if not actual <= limit:
            hi, lo = int(np.argmax(F[:, col])), int(np.argmin(F[:, col]))
            need = math.ceil(actual * 1e6) / 1e6
            raise PolicyError(
                f"mechanism matrix, field 'matrix': the transition matrix gives eps = {actual:.10g}, above the "
                f"column's eps {self.epsilon:g}. The worst published category is column {self._label(col)}: its "
                f"entry in row {self._label(hi)} is {math.exp(actual):.6g} times its entry in row "
                f"{self._label(lo)}, and local differential privacy allows at most e^eps = "
                f"{math.exp(self.epsilon):.6g} within a column. Raise the column's epsilon to at least {need:.6f}, "
                f"or flatten column {col} of the matrix (bring its largest and smallest entries closer together, "
                "keeping each row's sum at 1)")
        self._masses = F
        self._actual_epsilon = actual

    @cached_property
    def _table(self) -> np.ndarray:
        return sampling_table(self._masses)

    @cached_property
    def _guide(self) -> np.ndarray | None:
        return guide_table(self._table, self.k)

    def channel(self) -> np.ndarray:
        """Exact P(published y | true x) as realized by the sampler, shape (k, k)."""
        return self._masses / _UNIT

    # the likelihood decoder (mechanisms/likelihood.py): the cells are the published categories
    likelihood_reason: ClassVar[str] = ""

    @property
    def likelihood_cells(self) -> int:
        return self.k

    def likelihood_channel(self) -> np.ndarray:
        return self.channel()

    def likelihood_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        return self.support_counts(arrays)

    @cached_property
    def inverse(self) -> np.ndarray:
        """W = P^{-1} of the realized channel: row y is the per-row unbiased estimate for report y."""
        return np.linalg.inv(self.channel())

    @cached_property
    def second_moments(self) -> np.ndarray:
        """M2[x, v] = E[u_v(Y)^2 | x] = sum_y P[x, y] W[y, v]^2, shape (k, k)."""
        return self.channel() @ (self.inverse ** 2)

    @property
    def actual_epsilon(self) -> float:
        """The eps the realized matrix gives: max over published columns of ln(max/min)."""
        return self._actual_epsilon

    def max_log_ratio(self) -> float:
        return self._actual_epsilon

    def realized_ratio(self) -> Fraction | None:
        """The exact worst ratio of the integer masses the sampler realizes (docs/formulas.md 10.4)."""
        return masses_ratio(self._masses)

    @property
    def matrix(self) -> list[list[float]]:
        """The transition matrix as supplied (floats, rows = true, columns = published)."""
        return [list(r) for r in self._supplied]

    # -- spec ----------------------------------------------------------------------
    def to_spec(self) -> dict[str, Any]:
        spec = super().to_spec()
        spec["matrix"] = self.matrix
        return spec

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> Matrix:
        cls._check_family(spec)
        if "matrix" not in spec:
            raise PolicyError("mechanism matrix, field 'matrix': the spec has no transition matrix; give matrix: "
                              "[[...], ...] with one row and one column per category")
        return cls(spec["epsilon"], spec["categories"], spec["matrix"])

    # -- not a pure protocol --------------------------------------------------------
    @property
    def p_star(self) -> float:
        raise NotImplementedError("mechanism matrix is not a pure protocol: a general transition matrix has no "
                                  "single p* and q*; use decode_sums, decode_covariance, row_estimates and variance")

    @property
    def q_star(self) -> float:
        return self.p_star

    def approx_variance(self) -> float:
        raise NotImplementedError("mechanism matrix has no 'f small' variance (no p*, q*); use variance(freq) "
                                  "or total_variance()")

    # -- randomization ---------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return 2

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.dictionary(pa.int32(), pa.string()))]

    def output_meaning(self, field_name: str) -> str:
        return "reported category (drawn from the row of the policy's transition matrix for the true category)"

    def randomize_codes(self, x: np.ndarray, words: np.ndarray) -> np.ndarray:
        """Published code for each true code x (0..k-1), drawn with PRF word 1 of each row."""
        i = np.asarray(x, dtype=np.int64)
        return draw_index(self._table, i, words[:, 1], self.k, self._guide)

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return [self._labels_dictionary(self.randomize_codes(x, words))]

    # -- decoding --------------------------------------------------------------------
    def reported_codes(self, arrays: list[pa.Array]) -> np.ndarray:
        """int64 codes of the published labels; -1 where the label is null or not a category."""
        codes = pc.index_in(_as_strings(arrays[0]), value_set=pa.array(self.categories))
        return np.asarray(pc.fill_null(codes, -1).to_numpy(zero_copy_only=False), dtype=np.int64)

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        return int((self.reported_codes(arrays) < 0).sum())

    def support(self, arrays: list[pa.Array]) -> np.ndarray:
        """One-hot (n, k) of the published category (all False for an invalid report)."""
        codes = self.reported_codes(arrays)
        return codes[:, None] == np.arange(self.k)[None, :]

    def support_counts(self, arrays: list[pa.Array]) -> np.ndarray:
        codes = self.reported_codes(arrays)
        return np.bincount(codes[codes >= 0], minlength=self.k)[: self.k].astype(np.int64)

    def summarize(self, arrays: list[pa.Array]) -> np.ndarray:
        """Histogram of the published categories (length k); invalid reports are left out, so
        they count in n with a zero per-row estimate (the same as ``row_estimates``)."""
        return self.support_counts(arrays)

    def decode_sums(self, summary: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
        """(sum of u_v, sum of u_v^2) over the reports with histogram ``summary``: (c W, c W^2)."""
        c = np.asarray(summary, dtype=float)
        W = self.inverse
        return c @ W, c @ (W ** 2)

    def decode_covariance(self, summary: np.ndarray, n: int, cosupport: np.ndarray | None) -> np.ndarray:
        """Sample covariance of the per-row estimates u(y) = W[y], divided by n (the convention of
        ``distribution.frequency_covariance``); from the histogram alone (``cosupport`` is not needed:
        each report is one category)."""
        c = np.asarray(summary, dtype=float)
        W = self.inverse
        if n < 2:
            return np.full((self.k, self.k), np.nan)
        s = W.T @ c
        return (W.T @ (c[:, None] * W) - np.outer(s, s) / n) / ((n - 1) * n)

    def row_estimates(self, arrays: list[pa.Array]) -> np.ndarray:
        """Per-row unbiased estimates W[y], shape (n, k); zeros for an invalid report."""
        codes = self.reported_codes(arrays)
        out = self.inverse[np.maximum(codes, 0)]
        out[codes < 0] = 0.0
        return out

    def variance(self, freq: np.ndarray | float) -> np.ndarray:
        """Exact n*Var of each frequency estimate for a fixed data set with frequency vector ``freq``
        (length k, or an array whose last axis has length k).

        Per row with true value x: Var(u_v | x) = E[u_v^2 | x] - (E[u_v | x])^2 = M2[x, v] - 1[x = v],
        with M2 = P W^2 (elementwise square).  Rows are independent, so
        n*Var(f_v) = sum_x f_x M2[x, v] - f_v.  Unlike a pure protocol this depends on the whole
        vector, not on f_v alone."""
        f = np.asarray(freq, dtype=float)
        if f.ndim == 0 or f.shape[-1] != self.k:
            raise ValueError(f"mechanism matrix: variance needs the whole frequency vector (last axis of length "
                             f"{self.k}), got shape {f.shape}")
        return f @ self.second_moments - f

    def missing_share_row_variance(self, missing_code: int | None) -> float | None:
        """An upper bound over data sets of n * Var of the <missing> share as ``ldpt estimate`` reports
        it: sum_x f_x M2[x, v] - f_v^2 <= max over x of M2[x, v] (the variance depends on the whole
        frequency vector here, see ``variance``)."""
        if missing_code is None:
            return None
        return float(np.max(self.second_moments[:, missing_code]))

    def total_variance(self) -> float:
        """Worst case over data sets of n * sum_v Var(f_v) (expected squared L2 error of the frequency
        vector, times n).  It is linear in the true frequencies, so the worst case is all rows in one
        category: max over x of sum_v M2[x, v] - 1.  Data-dependent, unlike the pure protocols, whose
        total variance is the same for every data set."""
        return float(np.max(self.second_moments.sum(axis=1) - 1.0))

    def describe(self) -> str:
        return f"matrix (eps actually {self._actual_epsilon:.6g})"

    # -- planning and goodness of fit -------------------------------------------------
    def fixed_epsilon(self) -> float:
        """The steward's matrix fixes the noise: the declared eps only caps it."""
        return float(self._actual_epsilon)

    def fixed_noise_note(self, meets: bool, rows: int) -> str:
        actual = self.fixed_epsilon()
        if meets:
            return f"the matrix gives eps {actual:.4g}; its precision does not depend on the declared eps"
        return (f"the matrix fixes the noise (it gives eps {actual:.4g}); it misses the target at {rows} rows at any "
                "declared eps: more rows or a less noisy matrix are needed")

    def fit_test(self) -> HullFit | None:
        """The published categories against the realized k x k channel (k <= 1024).  The outputs
        have no order, so adjacent pooling merges categories in the declared order."""
        if self.k > MATRIX_HULL_MAX_K:
            return None

        def index(arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray]:
            codes = self.reported_codes(arrays)
            return np.where(codes < 0, 0, codes), codes < 0

        return HullFit(self, self.channel(), index, "reported categories")

    # -- empirical audit (audit.py) --------------------------------------------------------
    def audit_pairs(self) -> list[tuple[Any, Any]]:
        """The steward's matrix need not treat its categories alike: the two pairs of codes with
        the largest ratio of the realized channel."""
        return worst_channel_pairs(self.channel(), list(range(self.k)))

    def audit_outcomes(self, arrays: list[pa.Array], pair: tuple[Any, Any]) -> np.ndarray:
        """Each published category is an outcome (the best event may include categories other than
        the pair's own): the base's reported labels, not the support events of the pure protocols."""
        return Mechanism.audit_outcomes(self, arrays, pair)
