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
* ``MissingAnswerDecoder`` (a value with a missing flag, mechanisms/missing.py; family mean):
  the additive sums behind the share missing (``missing_share``) and the mean among rows with
  a value (``mean``, a ratio of two unbiased sums with a delta-method SE).
* ``MissingDistributionDecoder`` (a distribution mechanism's value with a missing flag; family
  distribution): the value mechanism's count statistics kept apart by the flag's report, and
  the flag's sums; ``missing_share`` and ``distribution`` (among rows with a value).

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
    from .likelihood import LikelihoodEstimate
    from .missing import MissingFlag, MissingFlagDistribution

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


def shares_without(shares: np.ndarray, cov: np.ndarray, drop: int) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The shares of the other values among the rows not in value ``drop`` (a binned column's bins
    among rows with a value, ``drop`` its <missing> code), g = s / sum(s) over the kept values s,
    with the delta-method covariance J Cov J' (J = (I - g 1') / sum(s)).  (None, None) when the
    kept shares do not sum to a positive number."""
    keep = np.array([i for i in range(len(shares)) if i != drop])
    s = np.asarray(shares, dtype=float)[keep]
    c = np.asarray(cov, dtype=float)[np.ix_(keep, keep)]
    total = float(s.sum())
    if not total > 0:
        return None, None
    g = s / total
    J = (np.eye(len(s)) - np.outer(g, np.ones(len(s)))) / total
    return g, J @ c @ J.T


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
    likelihood: bool = False                        # also keep the reports per cell of the likelihood channel
    cells: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    _fit: Any = field(default=None, repr=False, compare=False)   # the last likelihood estimate, with its key

    def __post_init__(self) -> None:
        if self.support.size == 0:
            self.support = np.zeros(self.mechanism.summary_size, dtype=np.int64)
        if self.joint and self.cosupport.size == 0:
            self.cosupport = np.zeros((self.mechanism.k, self.mechanism.k), dtype=np.int64)
        if self.likelihood and self.cells.size == 0:
            self.cells = np.zeros(self.mechanism.likelihood_cells, dtype=np.int64)

    def use_likelihood(self, column: str) -> Self:
        """Also keep what the likelihood decoder needs (``likelihood_frequencies``); a mechanism that
        cannot be decoded so is refused with one paragraph naming ``column`` and the reason."""
        m = self.mechanism
        why = m.likelihood_refusal()
        if why:
            raise UsageError(f"column {column!r} (mechanism {m.name}) cannot be decoded with --decoder likelihood: "
                             f"{why}. Decode this extract with --decoder projection (the default: unbiased shares "
                             "with normal-approximation intervals, for every frequency oracle); the likelihood "
                             "decoder reads categorical and binned columns whose mechanism has a finite channel "
                             "(docs/decoding.md lists them).")
        self.likelihood = True
        if self.cells.size == 0:
            self.cells = np.zeros(m.likelihood_cells, dtype=np.int64)
        return self

    def add(self, arrays: list[pa.Array]) -> Self:
        self.n += len(arrays[0])
        self.support += self.mechanism.summarize(arrays)
        if self.joint:
            si = self.mechanism.support(arrays).astype(np.int64)
            self.cosupport += si.T @ si       # reports supporting both v and w
        if self.likelihood:
            self.cells += self.mechanism.likelihood_counts(arrays)
        return self

    def merge(self, other: Self) -> Self:
        self.n += other.n
        self.support += other.support
        if self.joint:
            self.cosupport += other.cosupport
        if self.likelihood:
            self.cells += other.cells
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

    def likelihood_estimate(self, confidence: float) -> LikelihoodEstimate | None:
        """The maximum-likelihood shares with their parametric bootstrap (mechanisms/likelihood.py);
        None before two reports.  Needs ``use_likelihood``; kept once made (per confidence)."""
        from statistics import NormalDist

        from .likelihood import estimate_shares

        if not self.likelihood:
            raise ValueError("likelihood_estimate needs a decoder made with use_likelihood")
        if int(self.cells.sum()) < 2:
            return None
        key = (float(confidence), int(self.n), self.cells.tobytes())
        if self._fit is not None and self._fit[0] == key:
            return self._fit[1]
        m = self.mechanism
        z = NormalDist().inv_cdf(0.5 + confidence / 2)
        est, se = self.estimates()
        assert est is not None and se is not None
        fit = estimate_shares(m.likelihood_channel(), self.cells, m.to_spec(), confidence,
                              (est - z * se, est + z * se))
        self._fit = (key, fit)
        return fit

    def likelihood_frequencies(self, confidence: float, rows: int | None = None,
                               estimands: list[str] | None = None) -> tuple[tuple[FrequencyResult, ...], str]:
        """Per value the maximum-likelihood share, its bootstrap SE and interval, the estimated count
        (share x ``rows``) and, as the consistent share, the share itself (it lies on the simplex);
        and the text saying how they were made."""
        m = self.mechanism
        rows = self.n if rows is None else rows
        what = estimands or [""] * len(m.categories)
        fit = self.likelihood_estimate(confidence)
        if fit is None:
            return (tuple(FrequencyResult(label, None, None, None, None, 0.0, None, what[i])
                          for i, label in enumerate(m.categories)), "likelihood: fewer than two reports")
        lo, hi = fit.interval()
        return (tuple(FrequencyResult(label, float(fit.shares[i]), float(fit.se[i]), float(lo[i]), float(hi[i]),
                                      float(fit.shares[i] * rows), float(fit.shares[i]), what[i])
                      for i, label in enumerate(m.categories)), fit.method())

    def likelihood_shares(self, confidence: float) -> tuple[np.ndarray | None, np.ndarray | None]:
        """(maximum-likelihood shares, the covariance of their bootstrap replicates); (None, None)
        before two reports."""
        fit = self.likelihood_estimate(confidence)
        return (None, None) if fit is None else (fit.shares, fit.cov)


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


class _FlagShare:
    """The share missing of a value with a missing flag, from the sums of the rows' unbiased present
    indicators u: n, sum u, sum u^2."""

    n: int
    su: float
    suu: float

    def present_share(self) -> tuple[float | None, float | None]:
        """(unbiased share of rows with a value, its SE); (None, None) before two reports."""
        if self.n < 2:
            return None, None
        est, se = moments(self.su, self.suu, self.n)
        return float(est), float(se)

    def missing_share(self, z: float, rows: int | None = None, estimand: str = "",
                      label: str = "<missing>") -> FrequencyResult:
        """The share of rows whose value is missing (1 - the present share), with its SE and interval,
        the estimated count (share x ``rows``) and the share clipped into [0, 1]."""
        est, se = self.present_share()
        rows = self.n if rows is None else rows
        if est is None:
            return FrequencyResult(label, None, None, None, None, 0.0, None, estimand)
        miss = 1.0 - est
        return FrequencyResult(label, *interval(miss, se, z), float(miss * rows), float(min(max(miss, 0.0), 1.0)),
                               estimand)


@dataclass
class MissingAnswerDecoder(_FlagShare, Decoder):
    """A value report with a missing flag (mechanisms/missing.py): with a_i the value report minus
    the middle of the bounds m (a missing row's value is randomized as m) and u_i the row's
    unbiased present indicator, the sums n, sum a, sum a^2, sum u, sum u^2, sum a u (additive:
    batches, files and workers merge by addition)."""

    family: ClassVar[str] = "mean"
    mechanism: MissingFlag
    n: int = 0
    sa: float = 0.0
    saa: float = 0.0
    su: float = 0.0
    suu: float = 0.0
    sau: float = 0.0

    @property
    def shift(self) -> float:
        return self.mechanism.fill

    def add(self, arrays: list[pa.Array]) -> Self:
        a = self.mechanism.value_estimates(arrays) - self.shift
        u = self.mechanism.flag_estimates(arrays)
        self.n += a.size
        self.sa += float(a.sum())
        self.saa += float(np.dot(a, a))
        self.su += float(u.sum())
        self.suu += float(np.dot(u, u))
        self.sau += float(np.dot(a, u))
        return self

    def merge(self, other: Self) -> Self:
        self.n += other.n
        for k in ("sa", "saa", "su", "suu", "sau"):
            setattr(self, k, getattr(self, k) + getattr(other, k))
        return self

    def ratio(self) -> tuple[float | None, float | None, float | None]:
        """(mean among rows with a value, its delta-method SE, the present share's estimate):
        m + sum a / sum u, Var = (Var(a bar) - 2 R Cov(a bar, u bar) + R^2 Var(u bar)) / u bar^2
        with R = a bar / u bar.  (None, None, share) when the present share is not positive."""
        n = self.n
        if n < 2:
            return None, None, None
        abar, ase = moments(self.sa, self.saa, n)
        ubar, use = moments(self.su, self.suu, n)
        if ubar <= 0:
            return None, None, float(ubar)
        cov = (self.sau - self.sa * self.su / n) / (n - 1) / n
        R = float(abar / ubar)
        var = (float(ase) ** 2 - 2 * R * cov + R * R * float(use) ** 2) / float(ubar) ** 2
        return self.shift + R, float(np.sqrt(max(var, 0.0))), float(ubar)

    def mean(self, z: float, estimand: str = "") -> MeanResult:
        """The mean among rows with a value, with its delta-method SE and interval (all None before two
        reports or when the estimated share with a value is not positive)."""
        est, se, share = self.ratio()
        if est is None:
            note = None if share is None else "the estimated share of rows with a value is not positive: no mean"
            return MeanResult(None, None, None, None, note=note, estimand=estimand)
        assert se is not None and share is not None
        res = mean_result(est, se, z, estimand)
        _, share_se = self.present_share()
        if share_se is not None and share - z * share_se <= 0:
            return MeanResult(res.estimate, res.se, res.ci_low, res.ci_high,
                              note="the share of rows with a value is not clearly above 0: the ratio and its SE "
                                   "are unreliable", estimand=estimand)
        return res


@dataclass
class MissingDistributionDecoder(_FlagShare, Decoder):
    """A distribution mechanism's value report with a missing flag (mechanisms/missing.py): the value
    mechanism's additive count statistics of the rows whose flag reads present (``stats_present``)
    and missing (``stats_missing``), and the sums of the rows' unbiased present indicators u.

    The distribution among rows with a value: with m the decoded bucket shares of all rows (a missing
    row's value is randomized as the middle of the bounds, whose bucket is j), u bar the present
    share and e_j the unit vector of bucket j, g = (m - (1 - u bar) e_j) / u bar, unbiased to first
    order, with the delta-method covariance (C_m - w c' - c w' + w w' Var(u bar)) / u bar^2, w = g - e_j
    and c = Cov(m, u bar) (``flag_cross_covariance`` of the value mechanism)."""

    family: ClassVar[str] = "distribution"
    mechanism: MissingFlagDistribution
    n: int = 0
    su: float = 0.0
    suu: float = 0.0
    stats_present: Any = None
    stats_missing: Any = None

    def __post_init__(self) -> None:
        if self.stats_present is None:
            self.stats_present = self.mechanism.value.new_stats()
        if self.stats_missing is None:
            self.stats_missing = self.mechanism.value.new_stats()

    def _u_values(self) -> tuple[float, float]:
        """u on a row whose flag reads present, and on one whose flag reads missing."""
        p, q = self.mechanism.flag.p_star, self.mechanism.flag.q_star
        return (1.0 - q) / (p - q), -q / (p - q)

    def add(self, arrays: list[pa.Array]) -> Self:
        u = self.mechanism.flag_estimates(arrays)
        reads_present = u > 0
        self.n += u.size
        self.su += float(u.sum())
        self.suu += float(np.dot(u, u))
        value = arrays[:-1]
        for mask, stats in ((reads_present, self.stats_present), (~reads_present, self.stats_missing)):
            if mask.any():
                keep = pa.array(mask)
                self.mechanism.value.add_stats(stats, [a.filter(keep) for a in value])
        return self

    def merge(self, other: Self) -> Self:
        self.n += other.n
        self.su += other.su
        self.suu += other.suu
        self.stats_present += other.stats_present
        self.stats_missing += other.stats_missing
        return self

    def distribution(self) -> Any:
        """The decoded ``Distribution`` among rows with a value (see the class docstring); the value
        mechanism's own (of all rows) when its decode gives no covariance or the present share is not
        positive, with the method saying so."""
        from ..distribution import Distribution

        m = self.mechanism
        d = m.value.decode(self.stats_present + self.stats_missing, self.n)
        share, share_se = self.present_share()
        if d.cov is None or share is None or share_se is None or not share > 0 or not np.all(np.isfinite(d.mass)):
            d.method += "; NOT corrected for the rows without a value (too few rows, or no positive present share)"
            return d
        up, um = self._u_values()
        c = m.value.flag_cross_covariance([(self.stats_present, up), (self.stats_missing, um)], self.n)
        e = np.zeros(len(d.mass))
        e[m.fill_bucket()] = 1.0
        g = (d.mass - (1.0 - share) * e) / share
        w = g - e
        cov = (d.cov - np.outer(w, c) - np.outer(c, w) + np.outer(w, w) * share_se ** 2) / share ** 2
        return Distribution(d.edges, g, method=d.method + f"; among rows with a value: the bucket of {m.fill:g} (where "
                            "a missing row's value is randomized) less the estimated share missing, all divided by the "
                            "estimated share with a value (delta-method covariance)", n=self.n, cov=cov,
                            centers=d.centers, within=d.within)
