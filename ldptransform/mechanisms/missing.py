"""Missingness as an answer of a numeric column released as a number (``missing: as-answer``).

A numeric column whose values may be missing releases two reports per row, randomized
independently given the row:

* a **missing flag**: two-value randomized response (``GRR`` over the labels ``present`` and
  ``missing``) at ``flag_epsilon`` (the policy's ``missing_epsilon``);
* the **value**, through the column's mean mechanism (``value_epsilon`` = the column's eps minus
  the flag's), a missing row's value replaced by a fixed point, the middle of the bounds, before
  randomizing (so the value report of a row says nothing about whether it is missing beyond
  what the value channel allows between two inputs of the bounds).

The pair is one mechanism, ``MissingFlag``: sequential composition of two channels on the same
row, so its eps is the sum of the two and the worst likelihood ratio of the pair is at most the
product of the two realized ratios (an exact rational upper bound, compared with a certified
lower bound of e^eps as for every threshold sampler; docs/formulas.md section 10.4).

Decoding (``decoders.MissingAnswerDecoder``), with m = the middle of the bounds, a_i = v_i - m
(the row's value report, shifted) and u_i = (1[flag_i = present] - q*) / (p* - q*) (the row's
unbiased present indicator):

* share missing: 1 - mean(u), SE from the spread of the u_i;
* mean among rows with a value: m + sum(a) / sum(u).  Since E[a_i] = (x_i - m) 1[present] (a
  missing row's value is m), the numerator is unbiased for sum over present rows of (x - m) and
  the denominator for their count: a ratio of two unbiased sums, with a delta-method SE from the
  additive sums n, sum a, sum a^2, sum u, sum u^2, sum a u.  This is preferred to the per-row
  product sum(v u) / sum(u): both are consistent, but the product multiplies the two noises
  (its numerator's per-row variance is about E[v^2] E[u^2]), while here the flag's noise enters
  only through the denominator, scaled by the distance of the mean from m.

With a distribution mechanism for the value (``MissingFlagDistribution``; one whose decoded buckets
are linear in per-row unbiased estimates, ``supports_missing_flag``): the value's statistics are
kept apart by the flag's report, and the distribution among rows with a value is the decoded one
less the share missing at the bucket of the middle of the bounds, divided by the present share
(``decoders.MissingDistributionDecoder``, delta-method covariance with the value mechanism's
``flag_cross_covariance``).

The spec of the pair is the value mechanism's spec at the column's eps with one more entry,
``missing_answer``: {value_epsilon, flag_epsilon, fill}; ``base.build`` rebuilds the pair from it.
The formulas, and the coverage measured by tests/test_missing_answer.py, are in docs/formulas.md
section 18.
"""

from __future__ import annotations

from fractions import Fraction
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import PolicyError
from .base import DistributionMechanism, MeanMechanism, Mechanism, PerRowColumn, check_epsilon, registry

if TYPE_CHECKING:
    from .categorical import GRR
    from .decoders import MissingAnswerDecoder, MissingDistributionDecoder

#: The labels of the missing flag's two answers (code 0: the row has a value; code 1: missing).
FLAG_LABELS = ("present", "missing")
#: The suffix of the flag's extract column (``<column>__missing``).
FLAG_SUFFIX = "__missing"
#: The per-row reader's columns of a value with a missing flag: ``<column>=<missing>`` (the label of
#: the share missing in ``ldpt estimate``, the policy's missing label) and ``<column>*present``.
MISSING_SHARE_LABEL = "<missing>"
PRESENT_SUFFIX = "*present"
#: The share of the column's eps the flag gets when the policy gives no missing_epsilon: a rule
#: of thumb of ours (common practice, no source).  With the ratio estimator above, the flag's noise
#: enters the mean among rows with a value only through the share present, so most of the eps
#: goes to the value.
DEFAULT_FLAG_SHARE = 0.25
#: How far the pair's stated eps may be from the sum of its two parts (rounding of the split).
EPS_SUM_TOLERANCE = 1e-9


class MissingFlag(Mechanism):
    """A mean mechanism's value report plus a randomized-response flag of missingness (module
    docstring).  ``kind`` numeric, ``family`` mean; its decoder is a ``MissingAnswerDecoder``."""

    name: ClassVar[str] = "missing-flag"
    kind: ClassVar[str] = "numeric"
    family: ClassVar[str] = "mean"

    def __init__(self, value: Mechanism, flag_epsilon: float, epsilon: float | None = None) -> None:
        from .categorical import GRR

        if not isinstance(value, (MeanMechanism, DistributionMechanism)):
            raise PolicyError(f"missing: as-answer on a numeric column needs a mean or distribution mechanism for the "
                              f"value, not {value.name}")
        if isinstance(value, DistributionMechanism) and not value.supports_missing_flag:
            takers = [n for n, c in registry().items()
                      if issubclass(c, DistributionMechanism) and c.supports_missing_flag]
            raise PolicyError(f"missing: as-answer without bins needs a value mechanism whose decoded distribution can "
                              f"be corrected for the rows without a value; {value.name} cannot (its decoder smooths, "
                              f"so its estimates are not linear in the reports). Use mechanism "
                              f"{' or '.join(takers) or 'a mean mechanism'}, or add bins: [edges] to release the "
                              "column as bins with a <missing> bin")
        if value.variable_draws:
            raise PolicyError(f"missing: as-answer needs a value mechanism with a fixed number of random words per "
                              f"row; {value.name} draws a variable number. Leave mechanism out, or name another "
                              "mean mechanism")
        if value.second_layer_of is not None:
            raise PolicyError("missing: as-answer does not combine with a second randomization layer; remove "
                              "rerandomize_epsilon")
        fe = check_epsilon(flag_epsilon, "missing flag")
        self.value = value
        self.no_interval = value.no_interval
        self.flag: GRR = GRR(fe, list(FLAG_LABELS))
        self.lo, self.hi = float(value.lo), float(value.hi)
        self.fill = (self.lo + self.hi) / 2.0
        total = value.epsilon + fe if epsilon is None else check_epsilon(epsilon, "missing-flag pair")
        if abs(total - (value.epsilon + fe)) > EPS_SUM_TOLERANCE * max(1.0, total):
            raise PolicyError(f"missing flag: the stated epsilon {total!r} is not the sum of the value's eps "
                              f"{value.epsilon!r} and the flag's {fe!r}")
        self.epsilon = total

    # -- spec -------------------------------------------------------------------------
    def to_spec(self) -> dict[str, Any]:
        spec = dict(self.value.to_spec())
        spec["epsilon"] = self.epsilon
        spec["missing_answer"] = {"value_epsilon": self.value.epsilon, "flag_epsilon": self.flag.epsilon,
                                  "fill": self.fill}
        return spec

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> MissingFlag:
        from .base import build

        layer = spec.get("missing_answer")
        if not isinstance(layer, dict) or set(layer) != {"value_epsilon", "flag_epsilon", "fill"}:
            raise PolicyError(f"mechanism {spec.get('mechanism')}: missing_answer must give value_epsilon, "
                              f"flag_epsilon and fill, got {layer!r}")
        inner = {k: v for k, v in spec.items() if k != "missing_answer"}
        inner["epsilon"] = layer["value_epsilon"]
        built = with_missing_flag(build(inner), layer["flag_epsilon"], spec.get("epsilon"))
        if built.fill != layer["fill"]:
            raise PolicyError(f"mechanism {spec.get('mechanism')}: missing_answer fill {layer['fill']!r} is not the "
                              f"middle of the bounds ({built.fill!r})")
        return built

    @property
    def label(self) -> str:
        return f"{self.value.name} + missing flag"

    def describe(self) -> str:
        return f"{self.value.name} (eps {self.value.epsilon:g}) with a missing flag (grr, eps {self.flag.epsilon:g})"

    # -- randomization ------------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return self.value.words_per_row + self.flag.words_per_row

    def output_fields(self, column: str) -> list[pa.Field]:
        flag = pa.field(column + FLAG_SUFFIX, pa.dictionary(pa.int32(), pa.string()))
        return [*self.value.output_fields(column), flag]

    def output_meaning(self, field_name: str) -> str:
        if field_name.endswith(FLAG_SUFFIX):
            return (f"randomized missing flag: 'present' or 'missing', randomized response at eps "
                    f"{self.flag.epsilon:g} (the true answer kept with probability e^eps / (e^eps + 1))")
        return (self.value.output_meaning(field_name) + f"; a row without a value is randomized as "
                f"{self.fill:g}, the middle of the bounds")

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        """``x``: values in column units, NaN where the row has none."""
        x = np.asarray(x, dtype=float)
        missing = np.isnan(x)
        w = self.value.words_per_row
        reports = self.value.randomize(np.where(missing, self.fill, x), words[:, :w])
        flag = self.flag.randomize(missing.astype(np.int64), words[:, w:])
        return [*reports, *flag]

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        k = len(arrays) - 1
        bad_value = self.value.count_invalid(arrays[:k])
        return max(bad_value, self.flag.count_invalid(arrays[k:]))

    # -- analysis -----------------------------------------------------------------------
    def max_log_ratio(self) -> float:
        """The sum of the two channels' worst log ratios (the pair's outputs are independent given
        the row, so a ratio of the pair is a product of the two; an upper bound)."""
        return self.value.max_log_ratio() + self.flag.max_log_ratio()

    def realized_ratio(self) -> Fraction | None:
        """The product of the two realized ratios (exact rationals): an exact rational upper bound
        of the pair's worst ratio.  None when the value mechanism gives none."""
        rv = self.value.realized_ratio()
        rf = self.flag.realized_ratio()
        if rv is None or rf is None:
            return None
        return rv * rf

    def flag_estimates(self, arrays: list[pa.Array]) -> np.ndarray:
        """Per row: the unbiased present indicator u = (1[flag = present] - q*) / (p* - q*)."""
        return self.flag.row_estimates(arrays[-1:])[:, 0]

    def value_estimates(self, arrays: list[pa.Array]) -> np.ndarray:
        """Per row: the value report (column units), unbiased for the value, or for the middle of
        the bounds where the row has none."""
        arr = arrays[0]
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        return np.asarray(pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False), dtype=float)

    def decoder(self, *, joint: bool = False) -> MissingAnswerDecoder:
        from .decoders import MissingAnswerDecoder

        return MissingAnswerDecoder(self)

    # -- per-row estimates (the partner's reader) -------------------------------------------
    def per_row_columns(self, column: str) -> list[PerRowColumn]:
        """``<column>=<missing>``: the row's unbiased missing indicator 1 - u, whose mean is the share
        missing; ``<column>*present``: the row's value times its present indicator (0 without a value),
        (a - m) + m u with a the value report and m the fill, unbiased because the flag is randomized
        apart from the value; its mean over that of 1 - ``<column>=<missing>`` is the decoder's mean
        among rows with a value, m + sum(a - m) / sum(u)."""
        return [*self._missing_column(column),
                PerRowColumn(f"{column}{PRESENT_SUFFIX}",
                             f"unbiased estimate of the row's {column} times 1[{column} present] (0 for a row "
                             f"without a value): its mean estimates the sum of {column} over rows with a value "
                             f"divided by all rows; divided by 1 minus the mean of {column}={MISSING_SHARE_LABEL} it "
                             f"gives the mean of {column} among rows with a value (a ratio, as ldpt estimate "
                             "computes it)")]

    def _missing_column(self, column: str) -> list[PerRowColumn]:
        return [PerRowColumn(f"{column}={MISSING_SHARE_LABEL}",
                             f"unbiased estimate of 1[{column} missing] for the row (from its randomized flag): its "
                             f"mean over rows estimates the share of rows with {column} missing")]

    def per_row_values(self, arrays: list[pa.Array]) -> np.ndarray:
        u = self.flag_estimates(arrays)
        a = self.value_estimates(arrays)
        return np.column_stack([1.0 - u, (a - self.fill) + self.fill * u])

    def grouped_mean_refusal(self) -> str:
        return ("its value reports count a missing value as the middle of the bounds, so a mean of them within a "
                "group is not the mean among rows with a value; the column's own estimate gives the mean among rows "
                "with a value and the share missing")

    def no_fit_reason(self) -> str:
        return ("no goodness-of-fit test for a value with a missing flag: the two reports of a row are tested by "
                "neither the value mechanism's test nor the flag's on their own")

    # -- planning -----------------------------------------------------------------------
    def missing_share_row_variance(self, missing_code: int | None = None) -> float:
        """Worst case over data of n * Var of the share missing as ``ldpt estimate`` reports it:
        the flag's noise p*(1-p*)/(p*-q*)^2 (q* = 1 - p* for two answers) plus the spread of the
        true indicator, at most 1/4 (half the rows missing)."""
        p, q = self.flag.p_star, self.flag.q_star
        return float(p * (1 - p) / (p - q) ** 2 + 0.25)

    def mean_row_variance(self) -> float:
        """n * Var of the mean among rows with a value, when every row has one, worst case over
        data: by the delta method n Var = Var(a) - 2 R Cov(a, u) + R^2 Var(u) <= (sd_a + |R| sd_u)^2
        with |R| <= (hi - lo) / 2, sd_a^2 the value mechanism's worst case (``mean_row_variance``)
        and sd_u^2 the flag's noise.  With a share s of rows having a value it is about 1/s^2 times
        this (the ratio's denominator)."""
        p, q = self.flag.p_star, self.flag.q_star
        sd_a = float(np.sqrt(float(self.value.mean_row_variance() or 0.0)))
        sd_u = float(np.sqrt(p * (1 - p))) / (p - q)
        return (sd_a + (self.hi - self.lo) / 2.0 * sd_u) ** 2

    def efficiency(self) -> float | None:
        return None

    def audit_pairs(self) -> list[tuple[Any, Any]]:
        return [(self.lo, self.hi), (self.lo, float("nan"))]

    def audit_ordered(self) -> bool:
        return False

    def audit_outcomes(self, arrays: list[pa.Array], pair: tuple[Any, Any]) -> np.ndarray:
        """What the value report says about the pair (the value mechanism's own outcome, a missing
        input read as the middle of the bounds), joined with the flag's report."""
        inner = tuple(self.fill if isinstance(v, float) and np.isnan(v) else v for v in pair)
        value = self.value.audit_outcomes(arrays[:-1], (inner[0], inner[1]))
        flag = self.flag.reported_codes(arrays[-1:])
        return np.char.add(np.char.add(value.astype(str), "|"), np.asarray(flag).astype(str)).astype(object)


class MissingFlagDistribution(MissingFlag):
    """A distribution mechanism's value report plus the missing flag (``family`` distribution): decoded
    as the share missing and the distribution among rows with a value (``MissingDistributionDecoder``),
    the value mechanism's statistics kept apart by the flag's report so that the covariance of its
    decoded buckets with the present share is known (``flag_cross_covariance``)."""

    kind: ClassVar[str] = "distribution"
    family: ClassVar[str] = "distribution"
    value: DistributionMechanism

    def decoder(self, *, joint: bool = False) -> MissingDistributionDecoder:  # type: ignore[override]
        from .decoders import MissingDistributionDecoder

        return MissingDistributionDecoder(self)

    def mean_row_variance(self) -> float | None:   # type: ignore[override]
        return None   # the mean is read off the decoded distribution (plan simulates it)

    def per_row_columns(self, column: str) -> list[PerRowColumn]:
        """Only the share missing: the value's distribution has no per-row estimate."""
        return self._missing_column(column)

    def per_row_values(self, arrays: list[pa.Array]) -> np.ndarray:
        return (1.0 - self.flag_estimates(arrays))[:, None]

    def per_row_note(self, column: str) -> str:
        return (f"{column}: its values are left out (the share missing is given): {self.value.per_row_reason}; the "
                "distribution among rows with a value comes from ldpt estimate")

    def fill_bucket(self) -> int:
        """The bucket of the decoded distribution that holds the middle of the bounds."""
        return int(self.value.bucket_of(np.array([self.fill]))[0])


def with_missing_flag(value: Mechanism, flag_epsilon: float, epsilon: float | None = None) -> MissingFlag:
    """The pair of ``value`` (a mean or distribution mechanism at its own eps) and a missing flag at
    ``flag_epsilon``."""
    if isinstance(value, DistributionMechanism):
        return MissingFlagDistribution(value, flag_epsilon, epsilon)
    return MissingFlag(value, flag_epsilon, epsilon)
