"""Decoders: the additive sufficient statistics of one column's reports, one class per family.

A mechanism hands out a fresh decoder with ``Mechanism.decoder(joint=...)`` (each family base
implements it once); the decoder is filled batch by batch with ``add(arrays)`` (the column's
output arrays, rows that did not report already removed), combined with another decoder of the
same mechanism by ``merge(other)`` (batches, files and workers merge by addition, so the
result equals that of one decoder fed the concatenated reports), and read by its result
method:

* ``FrequencyDecoder`` (frequency oracles): the reports' additive summary (by default the
  support counts; with ``joint``, also the co-support counts behind the covariance of the
  frequency estimates, docs/formulas.md section 0.3).  ``frequencies`` gives per value the
  unbiased share (1[v in S(y)] - q*) / (p* - q*) averaged over rows, its SE and interval,
  the estimated count and the consistent share; ``estimates`` and ``covariance`` the raw arrays.
* ``MeanDecoder`` (mean mechanisms): each written value is the row's unbiased estimate; keeps
  n, sum and sum of squares around the middle of the bounds (numerical accuracy).  ``mean``.
* ``DistributionDecoder`` (distribution mechanisms): the mechanism's additive count vector;
  ``distribution`` decodes it (CDF, quantiles, range shares).

The standard error of an average of per-row estimates is their sample standard deviation over
sqrt(n) (``moments``).  Decoders hold only numpy arrays, numbers and their mechanism, so they
pickle (the dask engine ships them between processes).  Nothing here depends on which
mechanism of a family fills a decoder.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import UsageError
from ..results import FrequencyResult, MeanResult

if TYPE_CHECKING:
    from typing import Self

    from .base import DistributionMechanism, MeanMechanism
    from .categorical import FrequencyOracle

CONSISTENCY_METHODS = ("norm-sub", "norm-mul", "norm")


# -- consistency (post-processing of frequency estimates to a valid distribution) ------------

def norm_sub(est: np.ndarray) -> np.ndarray:
    """Norm-Sub: subtract one delta from every value and clip at 0 so the result sums to 1
    (the Euclidean projection onto the probability simplex).  Wang, Lopuhaä-Zwakenberg,
    Li, Škorić, Li, "Locally Differentially Private Frequency Estimation with Consistency",
    NDSS 2020."""
    v = np.asarray(est, dtype=float)
    u = np.sort(v)[::-1]
    css = np.cumsum(u) - 1.0
    j = np.arange(1, v.size + 1)
    cond = u - css / j > 0
    if not cond.any():
        return np.full_like(v, 1.0 / v.size)
    r = j[cond][-1]
    delta = css[r - 1] / r
    return np.maximum(v - delta, 0.0)


def norm_mul(est: np.ndarray) -> np.ndarray:
    """Norm-Mul: clip negatives to 0, then rescale to sum to 1 (same NDSS 2020 paper)."""
    v = np.maximum(np.asarray(est, dtype=float), 0.0)
    s = v.sum()
    return v / s if s > 0 else np.full_like(v, 1.0 / v.size)


def norm_additive(est: np.ndarray) -> np.ndarray:
    """Norm: add the same delta to every value so that they sum to 1 (unbiased, may stay
    negative; same NDSS 2020 paper)."""
    v = np.asarray(est, dtype=float)
    return v + (1.0 - v.sum()) / v.size


def consistent(est: np.ndarray, method: str) -> np.ndarray:
    if method == "norm-sub":
        return norm_sub(est)
    if method == "norm-mul":
        return norm_mul(est)
    if method == "norm":
        return norm_additive(est)
    raise UsageError(f"--consistency must be one of {', '.join(CONSISTENCY_METHODS)}, got {method!r}")


# -- averages of per-row estimates --------------------------------------------------------------

def moments(total: np.ndarray | float, sq: np.ndarray | float, n: int) -> tuple[Any, Any]:
    """(mean, SE of the mean) from sum and sum of squares of n per-row values."""
    if n == 0:
        return None, None
    mean = np.asarray(total, dtype=float) / n
    var_rows = np.maximum(np.asarray(sq, dtype=float) - np.asarray(total, dtype=float) ** 2 / n, 0.0) / max(n - 1, 1)
    return mean, np.sqrt(var_rows / n)


def interval(est: float | None, se: float | None, z: float) -> tuple[Any, Any, Any, Any]:
    """(estimate, se, ci_low, ci_high) of a normal-approximation interval (all None without an SE)."""
    if est is None or se is None:
        return None, None, None, None
    return float(est), float(se), float(est - z * se), float(est + z * se)


def mean_result(est: float | None, se: float | None, z: float, estimand: str = "") -> MeanResult:
    return MeanResult(*interval(est, se, z), estimand=estimand)


def numeric_values(arrays: list[pa.Array]) -> np.ndarray:
    """The written values of a numeric report column as float64."""
    arr = arrays[0]
    return np.asarray(pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False), dtype=float)


# -- the decoders -------------------------------------------------------------------------------

class Decoder(ABC):
    """A column's additive sufficient statistics: ``add`` a batch of reports, ``merge`` another
    decoder of the same mechanism (both return the decoder); ``n`` counts the reports added."""

    #: the family of the mechanisms it reads (``mechanisms.base.FAMILIES``)
    family: ClassVar[str]
    mechanism: Any
    n: int

    @abstractmethod
    def add(self, arrays: list[pa.Array]) -> Self:
        """Add the reports in ``arrays`` (the column's output arrays, one entry per report)."""

    @abstractmethod
    def merge(self, other: Self) -> Self:
        """Add the statistics of ``other`` (a decoder of the same mechanism)."""


@dataclass
class FrequencyDecoder(Decoder):
    """Support counts of a frequency oracle's reports (and, with ``joint``, co-support counts)."""

    family: ClassVar[str] = "frequency"
    mechanism: FrequencyOracle
    n: int = 0                                      # rows that reported this column
    support: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    joint: bool = False                             # also keep co-support counts (binned columns: range SEs)
    cosupport: np.ndarray = field(default_factory=lambda: np.zeros((0, 0), dtype=np.int64))

    def __post_init__(self) -> None:
        if self.support.size == 0:
            self.support = np.zeros(self.mechanism.summary_size, dtype=np.int64)
        if self.joint and self.cosupport.size == 0:
            self.cosupport = np.zeros((self.mechanism.k, self.mechanism.k), dtype=np.int64)

    def add(self, arrays: list[pa.Array]) -> Self:
        self.n += len(arrays[0])
        self.support += self.mechanism.summarize(arrays)
        if self.joint:
            si = self.mechanism.support(arrays).astype(np.int64)
            self.cosupport += si.T @ si       # reports supporting both v and w
        return self

    def merge(self, other: Self) -> Self:
        self.n += other.n
        self.support += other.support
        if self.joint:
            self.cosupport += other.cosupport
        return self

    def sums(self) -> tuple[np.ndarray, np.ndarray]:
        """(sum of u_v, sum of u_v^2) over the reporting rows, per value v."""
        return self.mechanism.decode_sums(self.support, self.n)

    def estimates(self) -> tuple[np.ndarray | None, np.ndarray | None]:
        """(unbiased share, its SE) per value; (None, None) before any report."""
        total, sq = self.sums()
        return moments(total, sq, self.n)

    def covariance(self) -> np.ndarray:
        """Covariance matrix of the frequency estimates (needs ``joint``; docs/formulas.md 0.3)."""
        return self.mechanism.decode_covariance(self.support, self.n, self.cosupport)

    def frequencies(self, z: float, method: str = "norm-sub", rows: int | None = None,
                    estimands: list[str] | None = None) -> tuple[FrequencyResult, ...]:
        """Per value: unbiased share, SE, interval, estimated count (share x all ``rows`` of the
        table, which under budget.strategy sample is more than the rows that reported), and the
        consistent share (``method``: one of CONSISTENCY_METHODS)."""
        m = self.mechanism
        rows = self.n if rows is None else rows
        what = estimands or [""] * len(m.categories)
        est, se = self.estimates()
        if est is None:
            return tuple(FrequencyResult(label, None, None, None, None, 0.0, None, what[i])
                         for i, label in enumerate(m.categories))
        assert se is not None
        cons = consistent(est, method)
        return tuple(FrequencyResult(label, *interval(est[i], se[i], z), float(est[i] * rows), float(cons[i]),
                                     what[i]) for i, label in enumerate(m.categories))


@dataclass
class MeanDecoder(Decoder):
    """n, sum and sum of squares of a mean mechanism's written values (around ``shift``, the
    middle of the bounds)."""

    family: ClassVar[str] = "mean"
    mechanism: MeanMechanism
    n: int = 0
    s1: float = 0.0
    s2: float = 0.0

    @property
    def shift(self) -> float:
        return (self.mechanism.lo + self.mechanism.hi) / 2.0

    def add(self, arrays: list[pa.Array]) -> Self:
        vals = numeric_values(arrays) - self.shift
        self.n += vals.size
        self.s1 += float(vals.sum())
        self.s2 += float(np.dot(vals, vals))
        return self

    def merge(self, other: Self) -> Self:
        self.n += other.n
        self.s1 += other.s1
        self.s2 += other.s2
        return self

    def mean(self, z: float, estimand: str = "") -> MeanResult:
        """The unbiased mean with its SE and interval (all None before any report)."""
        est, se = moments(self.s1, self.s2, self.n)
        if est is None:
            return mean_result(None, None, z, estimand)
        return mean_result(float(est) + self.shift, float(se), z, estimand)


@dataclass
class DistributionDecoder(Decoder):
    """The additive count statistics of a distribution mechanism (``new_stats`` / ``add_stats``)."""

    family: ClassVar[str] = "distribution"
    mechanism: DistributionMechanism
    n: int = 0
    stats: Any = None

    def __post_init__(self) -> None:
        if self.stats is None:
            self.stats = self.mechanism.new_stats()

    def add(self, arrays: list[pa.Array]) -> Self:
        self.n += len(arrays[0])
        self.mechanism.add_stats(self.stats, arrays)
        return self

    def merge(self, other: Self) -> Self:
        self.n += other.n
        self.stats += other.stats
        return self

    def distribution(self) -> Any:
        """The decoded ``ldptransform.distribution.Distribution`` of the reports added."""
        return self.mechanism.decode(self.stats, self.n)
