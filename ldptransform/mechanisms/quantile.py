"""sequential-quantile: one quantile of a bounded numeric column from one randomized bit per row,
the rows asked in phases about thresholds that move toward the quantile.

Each row answers "is my value at most theta?" by binary randomized response (the truth with
probability p = e^eps / (1 + e^eps), realized with an integer threshold on a PRF word: docs/formulas.md
section 10.4), so every report is exactly eps-LDP whatever theta is.  Rows are grouped in
phases by their global row index (phase boundaries fixed by the spec: ``first_phase_rows``, then
each phase a quarter of the rows before it, never depending on the number of rows or on the
batch size); every row of a phase tests one of two thresholds theta_p - h_p or theta_p + h_p (the
side drawn from a second PRF word of the row).  theta_p and h_p are a deterministic function of
the public spec and the reports of the earlier phases only (``SequentialQuantile.setting``), so a
row's channel does not depend on anyone's data but through earlier privatized bits, and the
partner recomputes every threshold from the extract (``replay``).

The estimate (docs/formulas.md section 21): from the tests of the phases that start after the
first 1/32 of the rows, the debiased share F-bar of reports below their thresholds at their mean
threshold theta-bar and the slope f-hat of a weighted least-squares line through the tests (the two
sides give it a spread), x-hat = theta-bar + (q - F-bar) / f-hat: a one-step (Newton) estimate from
pooled stochastic-approximation iterates.  Its asymptotic SE is that of the best one-bit design,
sqrt(p(1-p)/(2p-1)^2 + q(1-q)) / (f(x_q) sqrt(n)) (equal to ((e^eps+1)/(e^eps-1)) sqrt(q(1-q)) /
(f(x_q) sqrt(n)) at the median).  Interval: the inversion of the test "F(x) = q" under the
fitted line (Fieller's form), stated only when the line fits the tests (a chi-square lack-of-fit
check) and its slope is clearly positive; otherwise (a point mass, discrete values, a gap) the
monotone bracket: the largest tested threshold whose CDF is confidently below q and the smallest
whose CDF is confidently at least q, each test's exact binomial (Clopper-Pearson) bound at level
alpha / (2 K) over the K tests (Bonferroni), which holds whatever the column's shape.

Sources: Liu, Hu, Ding, Jiang, Kong, "Online Local Differential Private Quantile Inference via
Self-normalization", ICML 2023 (the one-bit sequential test and averaged stochastic
approximation); Gaboardi, Rogers, Sheffet, "Locally Private Mean Estimation: Z-test and Tight
Confidence Intervals", AISTATS 2019 (the binary-search form over phases).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Annotated, Any, ClassVar
from collections.abc import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel, ConfigDict, Field

from ..errors import PolicyError
from ..random.variates import THRESHOLD_ONE, exp_lower_bound, odds_threshold, words_below
from .base import Mechanism, check_epsilon, register
from .decoders import Decoder

#: phases after the first: each holds a quarter of the rows before it (at least ``first_phase_rows``)
GROWTH_DIVISOR = 4
#: the estimate pools the phases that start after this share of the rows (earlier thresholds are far off;
#: 1/32 measured best of 1/8 and 1/32 at n = 100,000, benchmarks/efficiency_quantiles.py)
WINDOW_SHARE = 1 / 32
#: the two thresholds of a phase are theta -/+ h with h = KAPPA times the current SE of the estimate
KAPPA = 4.0
#: the rows below which phase boundaries are tabulated (2^62: more than any table)
ROW_LIMIT = 1 << 62
#: lack-of-fit level of the line through the tests (smaller: the line is kept more often)
FIT_LEVEL = 0.01
#: rows of the smallest phase a policy may set
MIN_PHASE_ROWS = 50


def phase_starts(first: int) -> np.ndarray:
    """The first global row of every phase (int64, increasing, the last at or above ROW_LIMIT):
    0, first, then each phase a quarter of the rows before it (at least ``first`` rows)."""
    starts = [0]
    s = 0
    while s < ROW_LIMIT:
        s += max(first, s // GROWTH_DIVISOR)
        starts.append(min(s, ROW_LIMIT))
    return np.asarray(starts, dtype=np.int64)


class SequentialQuantileParams(BaseModel):
    """Policy fields of `sequential-quantile` besides epsilon and the bounds."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    quantile: Annotated[float, Field(strict=False, gt=0.0, lt=1.0)] | None = Field(
        None, description="the one quantile tracked, strictly between 0 and 1 (default 0.5, the median); with "
                          "mechanism auto and needs [quantiles], the automatic choice compares the mechanisms' "
                          "predicted SE of this quantile")


@dataclass(frozen=True)
class Setting:
    """What the rows of one phase test: thresholds center - half and center + half."""

    center: float
    half: float
    floor: float = -math.inf     # thresholds are kept within [floor, ceiling]: the bounds, the upper one
    ceiling: float = math.inf    # just below hi (a test outside them says nothing of clipped values)

    def thresholds(self) -> tuple[float, float]:
        return (min(max(self.center - self.half, self.floor), self.ceiling),
                min(max(self.center + self.half, self.floor), self.ceiling))


@dataclass(frozen=True)
class QuantileEstimate:
    """The decoded quantile: estimate, SE (None when the interval is the monotone bracket), the
    interval, how it was made, and the thresholds tested (replayed from the reports)."""

    q: float
    estimate: float | None
    se: float | None
    lo: float | None
    hi: float | None
    method: str
    rows: int
    settings: tuple[Setting, ...] = ()


@dataclass
class SequentialRun:
    """The state of one sequential column during a release: the reports counted per phase and
    side, and each phase's setting once computed.  ``fixed``: settings worked out beforehand
    (the dask engine's pre-pass); ``add`` then changes nothing."""

    mechanism: SequentialQuantile
    counts: np.ndarray = field(default=None)  # type: ignore[arg-type]  # (phases, 2 sides, [reports, ones])
    settings: list[Setting] = field(default_factory=list)
    fixed: bool = False
    seen: np.ndarray = field(default=None)  # type: ignore[arg-type]  # input rows seen per phase

    def __post_init__(self) -> None:
        if self.counts is None:
            self.counts = self.mechanism.new_stats()
        if self.seen is None:
            self.seen = np.zeros(len(self.mechanism.starts) - 1, dtype=np.int64)

    def setting(self, phase: int) -> Setting:
        """The setting of ``phase``; computed from the counts of the earlier phases, which must be
        complete (every one of their rows seen: the release reads rows in order)."""
        while len(self.settings) <= phase:
            k = len(self.settings)
            if self.fixed:
                raise RuntimeError(f"sequential column: phase {k} has no setting worked out beforehand (a bug)")
            if k > 0:
                start, stop = self.mechanism.starts[k - 1], self.mechanism.starts[k]
                if int(self.seen[k - 1]) != int(stop - start):
                    raise RuntimeError("sequential column: rows reached a phase before the rows of the one before "
                                       "it were all seen (a bug: the release must read rows in order)")
            self.settings.append(self.mechanism.setting(self.counts, self.settings, k))
        return self.settings[phase]

    def add(self, phase: int, rows: int, arrays: list[pa.Array]) -> None:
        """Count ``rows`` input rows of ``phase`` and the reports ``arrays`` among them (rows that do
        not report this column removed)."""
        self.seen[phase] += rows
        if not self.fixed:
            self.mechanism.add_stats(self.counts, arrays)

    def frozen(self) -> SequentialRun:
        """A run with these settings fixed (what the workers of the dask engine are sent)."""
        return SequentialRun(self.mechanism, self.counts.copy(), list(self.settings), True)


@dataclass
class QuantileDecoder(Decoder):
    """The family decoder of ``quantile`` mechanisms: reports and ones per test (additive)."""

    family: ClassVar[str] = "quantile"
    mechanism: Any
    n: int = 0
    stats: Any = None

    def __post_init__(self) -> None:
        if self.stats is None:
            self.stats = self.mechanism.new_stats()

    def add(self, arrays: list[pa.Array]) -> QuantileDecoder:
        self.n += len(arrays[0])
        self.mechanism.add_stats(self.stats, arrays)
        return self

    def merge(self, other: QuantileDecoder) -> QuantileDecoder:
        self.n += other.n
        self.stats += other.stats
        return self

    def quantile(self, confidence: float = 0.95) -> QuantileEstimate:
        """The tracked quantile with its interval (``SequentialQuantile.decode``)."""
        return self.mechanism.decode(self.stats, confidence)


def _fit(counts: np.ndarray, settings: Sequence[Setting], phases: Sequence[int], pr: float
         ) -> tuple[int, float, float, float, float, float, float] | None:
    """The pooled line through the tests of ``phases``: (reports N, share of ones P-bar, mean
    threshold, debiased F-bar, slope f-hat, Sxx, lack-of-fit chi-square); None without reports.
    Plain Python floats in a fixed order, so the release and the partner compute the same bits."""
    tests = []
    for k in phases:
        lo_t, hi_t = settings[k].thresholds()
        for side, theta in ((0, lo_t), (1, hi_t)):
            n, c = int(counts[k, side, 0]), int(counts[k, side, 1])
            if n:
                tests.append((theta, n, c))
    if not tests:
        return None
    N = sum(t[1] for t in tests)
    C = sum(t[2] for t in tests)
    gap = 2.0 * pr - 1.0
    pbar = C / N
    tbar = math.fsum(t[0] * t[1] for t in tests) / N
    sxx = math.fsum(t[1] * (t[0] - tbar) ** 2 for t in tests)
    sxy = math.fsum((t[0] - tbar) * (t[2] - t[1] * pbar) for t in tests) / gap
    fbar = (pbar - (1.0 - pr)) / gap
    slope = sxy / sxx if sxx > 0 else 0.0
    var1 = max(pbar * (1.0 - pbar), 1.0 / N)
    chi2 = math.fsum((t[2] - t[1] * (pbar + gap * slope * (t[0] - tbar))) ** 2 / (t[1] * var1) for t in tests)
    return N, pbar, tbar, fbar, slope, sxx, chi2


@register
class SequentialQuantile(Mechanism):
    """One quantile from one randomized bit per row, thresholds moving in phases (module docstring)."""

    name: ClassVar[str] = "sequential-quantile"
    kind: ClassVar[str] = "quantile"
    family: ClassVar[str] = "quantile"
    Params: ClassVar[type[BaseModel]] = SequentialQuantileParams
    sequential: ClassVar[bool] = True
    per_row_reason: ClassVar[str] = ("its rows answer different questions (thresholds set by the reports of earlier "
                                     "rows), decoded together into one quantile, not an average of per-row values")
    accepts_binned: ClassVar[bool] = False
    binned_refusal: ClassVar[str] = ("sequential-quantile tracks one quantile of a numeric column's values; it does "
                                     "not take bins (remove bins, or choose a frequency mechanism)")
    field_refusals: ClassVar[dict[str, str]] = {
        "grid": "sequential-quantile compares each value with a threshold exactly; it has no grid: remove grid",
    }

    def __init__(self, epsilon: float, bounds: Sequence[float], quantile: float = 0.5,
                 first_phase_rows: int = 1000) -> None:
        self.epsilon = check_epsilon(epsilon, f"mechanism {self.name}")
        lo, hi = (float(b) for b in bounds)
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise PolicyError(f"mechanism {self.name}: bounds must be two finite numbers, low below high; got "
                              f"{list(bounds)!r}")
        q = float(quantile)
        if not 0.0 < q < 1.0:
            raise PolicyError(f"mechanism {self.name}: quantile must lie strictly between 0 and 1, got {quantile!r}")
        if isinstance(first_phase_rows, bool) or not isinstance(first_phase_rows, int) or \
                first_phase_rows < MIN_PHASE_ROWS:
            raise PolicyError(f"mechanism {self.name}: first_phase_rows must be a whole number of at least "
                              f"{MIN_PHASE_ROWS}, got {first_phase_rows!r}")
        self.lo, self.hi, self.q, self.first_phase_rows = lo, hi, q, first_phase_rows
        self.T = odds_threshold(exp_lower_bound(self.epsilon))   # word < T: the report tells the truth
        self.starts = phase_starts(first_phase_rows)

    @classmethod
    def _from_params(cls, epsilon: float, domain: Sequence[Any], params: BaseModel) -> Mechanism:
        return cls(epsilon, domain, **params.model_dump(exclude_none=True))

    # -- spec --------------------------------------------------------------------------
    def to_spec(self) -> dict[str, Any]:
        return {"mechanism": self.name, "epsilon": self.epsilon, "bounds": [self.lo, self.hi], "quantile": self.q,
                "first_phase_rows": self.first_phase_rows}

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> SequentialQuantile:
        cls._check_family(spec)
        extra = set(spec) - {"mechanism", "epsilon", "bounds", "quantile", "first_phase_rows"}
        if extra or "bounds" not in spec:
            raise PolicyError(f"mechanism {cls.name}: spec fields {sorted(extra) or ['bounds missing']} are not "
                              "those of this mechanism")
        return cls(spec["epsilon"], spec["bounds"], spec.get("quantile", 0.5), spec.get("first_phase_rows", 1000))

    def describe(self) -> str:
        return f"{self.name} (q = {self.q:g})"

    # -- the channel -------------------------------------------------------------------
    @property
    def truth_probability(self) -> float:
        """p: the probability that a report tells the truth (as realized: T / 2^64)."""
        return self.T / THRESHOLD_ONE

    def _threshold_ratio(self) -> Fraction:
        return Fraction(self.T, THRESHOLD_ONE - self.T)

    def max_log_ratio(self) -> float:
        return math.log(self._threshold_ratio())

    def channel(self) -> np.ndarray:
        """P(bit 0, bit 1 | the value above the threshold; at most it), as the integers realize it
        (the test a report belongs to is drawn from the PRF alone, the same for every value)."""
        p = self.T / THRESHOLD_ONE
        return np.array([[p, 1.0 - p], [1.0 - p, p]])

    # -- phases and settings -------------------------------------------------------------
    @property
    def phases(self) -> int:
        return len(self.starts) - 1

    def phase_of(self, rows: np.ndarray) -> np.ndarray:
        """The phase of each global row index."""
        return np.searchsorted(self.starts, np.asarray(rows, dtype=np.int64), side="right") - 1

    def new_stats(self) -> np.ndarray:
        """Reports and ones per phase and side: int64 (phases, 2, 2)."""
        return np.zeros((self.phases, 2, 2), dtype=np.int64)

    def add_stats(self, stats: np.ndarray, arrays: list[pa.Array]) -> None:
        bits = np.asarray(arrays[0].to_numpy(zero_copy_only=False), dtype=np.int64)
        test = np.asarray(arrays[1].to_numpy(zero_copy_only=False), dtype=np.int64)
        flat = stats.reshape(-1, 2)
        np.add.at(flat[:, 0], test, 1)
        np.add.at(flat[:, 1], test, bits)

    def start_run(self) -> SequentialRun:
        """A fresh run of this column for one release (the kernel's sequential hook)."""
        return SequentialRun(self)

    def setting(self, counts: np.ndarray, earlier: Sequence[Setting], phase: int) -> Setting:
        """The thresholds of ``phase`` from the counts of the phases before it and their settings
        ``earlier`` (and only those): the current estimate as the center, KAPPA current SEs as the
        half-spread (at most an eighth of the bounds)."""
        span = self.hi - self.lo
        if phase == 0:
            return self._setting(self.lo + self.q * span, span / 8.0)
        est = self._estimate(counts, earlier, phase)
        if est is None:
            return earlier[-1]
        center, slope, total, pbar = est
        gap = 2.0 * self.truth_probability - 1.0
        sd = math.sqrt(max(pbar * (1.0 - pbar), 0.25 / total)) / gap
        return self._setting(center, min(KAPPA * sd / (slope * math.sqrt(total)), span / 8.0))

    def _setting(self, center: float, half: float) -> Setting:
        return Setting(center, half, self.lo, math.nextafter(self.hi, -math.inf))

    def replay(self, counts: np.ndarray, phases: int) -> list[Setting]:
        """The settings of phases 0..phases-1 recomputed from the counts (what the release used)."""
        out: list[Setting] = []
        for k in range(phases):
            out.append(self.setting(counts, out, k))
        return out

    def _window(self, phase: int) -> list[int]:
        """The phases whose tests the estimate after ``phase`` phases pools: those that start
        after WINDOW_SHARE of the rows before phase ``phase`` (and always the last one)."""
        edge = int(self.starts[phase]) * WINDOW_SHARE
        return [k for k in range(phase) if int(self.starts[k]) >= edge] or [phase - 1]

    def _slope_floor(self) -> float:
        return 0.25 / (self.hi - self.lo)

    def _estimate(self, counts: np.ndarray, settings: Sequence[Setting], phase: int
                  ) -> tuple[float, float, int, float] | None:
        """(estimate, slope used, reports in all phases before ``phase``, share of ones in the window)."""
        fit = _fit(counts, settings, self._window(phase), self.truth_probability)
        if fit is None:
            return None
        N, pbar, tbar, fbar, slope, _, _ = fit
        slope = max(slope, self._slope_floor())
        center = min(max(tbar + (self.q - fbar) / slope, self.lo), self.hi)
        total = int(counts[:phase, :, 0].sum())
        return center, slope, total, pbar

    # -- decoding ------------------------------------------------------------------------
    def decoder(self, *, joint: bool = False) -> QuantileDecoder:
        return QuantileDecoder(self)

    def decode(self, stats: np.ndarray, confidence: float = 0.95) -> QuantileEstimate:
        """The q-quantile of the clipped column from the counts of every test (module docstring)."""
        from scipy import stats as sst

        n = int(stats[:, :, 0].sum())
        used = np.nonzero(stats[:, :, 0].sum(axis=1))[0]
        if n < 2 or used.size == 0:
            return QuantileEstimate(self.q, None, None, None, None, "no interval: fewer than two reports", n)
        last = int(used[-1]) + 1
        settings = self.replay(stats, last)
        window = self._window(last)
        fit = _fit(stats, settings, window, self.truth_probability)
        est = self._estimate(stats, settings, last)
        assert fit is not None and est is not None
        N, pbar = fit[0], fit[1]
        x_hat = est[0]
        alpha = 1.0 - confidence
        z = float(sst.norm.ppf(1.0 - alpha / 2.0))
        gap = 2.0 * self.truth_probability - 1.0
        var1 = max(pbar * (1.0 - pbar), 0.25 / N) / gap ** 2      # variance of one debiased bit
        local = self._local_fit(stats, settings, window, var1, z)
        if local is not None:
            _, se, lo_c, hi_c, tests = local
            point = min(max(x_hat, lo_c), hi_c)   # the one-step estimate (lower error than the quadratic's root)
            method = (f"{confidence:.0%} interval by inverting the test F(x) = q under a quadratic fitted to the "
                      f"{tests} tests of the last phases (weighted least squares); SE from the fitted slope at the "
                      "quantile")
            return QuantileEstimate(self.q, point, se, lo_c, hi_c, method, n, tuple(settings))
        lo_b, hi_b = self._bracket(stats, settings, last, alpha)
        point = min(max(x_hat, lo_b), hi_b)
        method = (f"{confidence:.0%} monotone bracket over every tested threshold (exact binomial bounds, "
                  "Bonferroni): no smooth curve fits the tests near the quantile (a point mass, discrete values or a "
                  "gap), so no SE")
        return QuantileEstimate(self.q, point, None, lo_b, hi_b, method, n, tuple(settings))

    def _local_fit(self, stats: np.ndarray, settings: Sequence[Setting], window: list[int], var1: float, z: float
                   ) -> tuple[float, float, float, float, int] | None:
        """The quadratic a + b d + c d^2 (d = threshold - mean threshold) fitted by weighted least
        squares to the debiased shares of the window's tests, and the set of x where the test
        "F(x) = q" is not rejected under it, on a grid over the tested thresholds: (estimate, SE,
        interval low, high, tests), or None when the quadratic does not fit (lack-of-fit
        chi-square at FIT_LEVEL), the set is not an interval strictly inside the tested range, or
        the fitted slope at the estimate is not positive."""
        from scipy import stats as sst

        pr = self.truth_probability
        gap = 2.0 * pr - 1.0
        rows = [(settings[k].thresholds()[s], int(stats[k, s, 0]), int(stats[k, s, 1]))
                for k in window for s in (0, 1) if stats[k, s, 0] > 0]
        if len(rows) < 5:
            return None
        theta = np.array([r[0] for r in rows])
        nn = np.array([r[1] for r in rows], dtype=float)
        F = (np.array([r[2] for r in rows]) / nn - (1.0 - pr)) / gap
        tbar = float((nn * theta).sum() / nn.sum())
        scale = float(np.sqrt((nn * (theta - tbar) ** 2).sum() / nn.sum()))
        if not scale > 0:
            return None
        d = (theta - tbar) / scale
        X = np.stack([np.ones_like(d), d, d * d], axis=1)
        XtW = X.T * nn
        A = XtW @ X
        if np.linalg.cond(A) > 1e12:
            return None
        Ainv = np.linalg.inv(A)
        beta = Ainv @ (XtW @ F)
        resid = F - X @ beta
        chi2 = float((nn * resid * resid).sum() / var1)
        if chi2 > float(sst.chi2.ppf(1.0 - FIT_LEVEL, len(rows) - 3)):
            return None
        cov = var1 * Ainv
        grid = np.linspace(d.min(), d.max(), 4001)
        G = np.stack([np.ones_like(grid), grid, grid * grid], axis=1)
        g = G @ beta - self.q
        v = np.einsum("ij,jk,ik->i", G, cov, G)
        ok = g * g <= z * z * v
        if not ok.any() or ok[0] or ok[-1]:
            return None
        idx = np.flatnonzero(ok)
        if idx[-1] - idx[0] + 1 != idx.size:   # not one interval
            return None
        j = int(idx[0] + np.argmin(np.abs(g[idx])))
        # the root of the quadratic nearest the grid point with the smallest |g|
        c2, c1, c0 = beta[2], beta[1], beta[0] - self.q
        roots = np.roots([c2, c1, c0]) if abs(c2) > 1e-15 else np.array([-c0 / c1]) if c1 != 0 else np.array([])
        roots = roots[np.isreal(roots)].real if roots.size else roots
        root = float(roots[np.argmin(np.abs(roots - grid[j]))]) if roots.size else float(grid[j])
        if not grid[idx[0]] <= root <= grid[idx[-1]]:
            root = float(grid[j])
        slope = c1 + 2.0 * c2 * root
        if not slope > 0:
            return None
        gr = np.array([1.0, root, root * root])
        se = math.sqrt(max(float(gr @ cov @ gr), 0.0)) / slope * scale
        to_x = lambda u: min(max(tbar + float(u) * scale, self.lo), self.hi)  # noqa: E731
        return to_x(root), se, to_x(grid[idx[0]]), to_x(grid[idx[-1]]), len(rows)

    def _bracket(self, stats: np.ndarray, settings: Sequence[Setting], last: int, alpha: float
                 ) -> tuple[float, float]:
        """[largest threshold whose CDF is confidently below q, smallest whose CDF is confidently at
        least q] (the bounds where none is), each test at level alpha / (2 K) by Clopper-Pearson."""
        from scipy import stats as sst

        pr = self.truth_probability
        target = (1.0 - pr) + (2.0 * pr - 1.0) * self.q    # P(bit = 1) at F = q
        tests = [(settings[k].thresholds()[s], int(stats[k, s, 0]), int(stats[k, s, 1]))
                 for k in range(last) for s in (0, 1) if stats[k, s, 0] > 0]
        level = alpha / (2.0 * max(len(tests), 1))
        lo_b, hi_b = self.lo, self.hi
        for theta, n, c in tests:
            upper = 1.0 if c == n else float(sst.beta.ppf(1.0 - level, c + 1, n - c))
            lower = 0.0 if c == 0 else float(sst.beta.ppf(level, c, n - c + 1))
            if upper < target:        # F(theta) < q: the quantile lies above theta
                lo_b = max(lo_b, theta)
            if lower >= target:       # F(theta) >= q: the quantile is at most theta
                hi_b = min(hi_b, theta)
        if lo_b > hi_b:   # contradictory tests (a chance event at level alpha): the whole bounds
            return self.lo, self.hi
        return min(max(lo_b, self.lo), self.hi), min(max(hi_b, self.lo), self.hi)

    def asymptotic_se(self, density: float, n: int) -> float:
        """The asymptotic SE of the q-quantile for density ``density`` at it: sqrt(p(1-p)/(2p-1)^2
        + q(1-q)) / (f sqrt(n)) (docs/formulas.md section 21)."""
        p = self.truth_probability
        return math.sqrt(p * (1 - p) / (2 * p - 1) ** 2 + self.q * (1 - self.q)) / (density * math.sqrt(n))

    # -- randomization -------------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return 2

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.int8()), pa.field(f"{column}__test", pa.int16())]

    def output_meaning(self, field_name: str) -> str:
        if field_name.endswith("__test"):
            return ("which threshold the row was asked about: 2 x phase + side (phase from the row's position in the "
                    "input, side from the keyed stream; the thresholds of a phase follow from the public spec and the "
                    "reports of earlier phases, so anyone can recompute them from the extract)")
        return (f"randomized answer (1 yes, 0 no) to 'is the value at most the row's threshold?', true with "
                f"probability {self.truth_probability:.6g}")

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        bits = np.asarray(arrays[0].to_numpy(zero_copy_only=False))
        test = np.asarray(arrays[1].to_numpy(zero_copy_only=False))
        bad = ~np.isin(bits, (0, 1)) | (test < 0) | (test >= 2 * self.phases)
        return int(bad.sum())

    def randomize_phase(self, x: np.ndarray, words: np.ndarray, phase: int, setting: Setting) -> list[pa.Array]:
        """Rows of one phase: side from word 1's top bit, the bit 1[x <= threshold] kept when word 0 < T."""
        side = (words[:, 1] >> np.uint64(63)).astype(np.int64)
        lo_t, hi_t = setting.thresholds()
        theta = np.where(side == 1, hi_t, lo_t)
        truth = np.asarray(x, dtype=np.float64) <= theta
        keep = words_below(words[:, 0], self.T)
        bits = (truth == keep).astype(np.int8)
        return [pa.array(bits, type=pa.int8()), pa.array((2 * phase + side).astype(np.int16), type=pa.int16())]

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        """Without a release's phases (the rows taken as of phase 0: its fixed thresholds)."""
        return self.randomize_phase(x, words, 0, self._setting(self.lo + self.q * (self.hi - self.lo),
                                                               (self.hi - self.lo) / 8.0))

    # -- policy, audit, planning ---------------------------------------------------------
    @property
    def supports_memoize(self) -> bool:
        return False

    @property
    def memoize_refusal(self) -> str:
        return (f"mechanism {self.name} sets each phase's thresholds from the reports of the rows before it in this "
                "release, while memoized randomness replays one report per person and value across releases, which "
                "would answer an old question at a new threshold; remove memoize, or choose a distribution mechanism "
                "such as hierarchy for this column")

    missing_flag_reason: ClassVar[str] = ("sequential-quantile tracks one quantile of the values; it carries no "
                                          "missing flag (use missing: {fill: VALUE}, or a distribution mechanism)")

    def grouped_mean_refusal(self) -> str:
        return "its reports are answers about thresholds, not values"

    def audit_pairs(self) -> list[tuple[Any, Any]]:
        return [(self.lo, self.hi)]

    def audit_outcomes(self, arrays: list[pa.Array], pair: tuple[Any, Any]) -> np.ndarray:
        """The bit: a test's threshold never depends on this row, and every report tells the
        truth about some threshold with probability p."""
        return np.asarray(pc.cast(arrays[0], pa.float64()).to_numpy(zero_copy_only=False), dtype=float)

    def audit_ordered(self) -> bool:
        return True

    def quantile_row_variance(self, density: float) -> float:
        """n * Var of the estimate for density ``density`` at the quantile (the asymptotic optimum)."""
        return self.asymptotic_se(density, 1) ** 2


def randomize_in_order(m: SequentialQuantile, x: np.ndarray, words: np.ndarray) -> tuple[list[pa.Array], SequentialRun]:
    """Rows 0..n-1 of a release in which every row reports this column, randomized phase by phase
    as the release's kernel does (its reports and its run): for studies and tests of the
    estimator without a whole release."""
    run = m.start_run()
    n = len(x)
    parts: list[list[pa.Array]] = []
    for k in range(m.phases):
        a, b = int(m.starts[k]), min(int(m.starts[k + 1]), n)
        if a >= n:
            break
        out = m.randomize_phase(x[a:b], words[a:b], k, run.setting(k))
        run.add(k, b - a, out)
        parts.append(out)
    if not parts:
        return [pa.array([], type=pa.int8()), pa.array([], type=pa.int16())], run
    return [pa.concat_arrays([p[i] for p in parts]) for i in range(2)], run


#: rows of the reference release the automatic choice decodes the default distribution mechanism on
CHOICE_ROWS = 20_000


def choose_quantile_mechanism(epsilon: float, bounds: tuple[float, float], quantile: float,
                              default: Mechanism) -> tuple[Mechanism, str]:
    """`mechanism: auto` with `needs: [quantiles]` and one `quantile`: sequential-quantile when its
    predicted SE of that quantile is below the default distribution mechanism's, else the default.
    Both SEs are the SE of the CDF at the quantile over the density there (the density cancels):
    sequential-quantile's sqrt(p(1-p)/(2p-1)^2 + q(1-q)) per sqrt(row); the default's from decoding
    CHOICE_ROWS reports of evenly spread values under a public key, read at lo + q (hi - lo)."""
    from ..keys import SecretKey
    from ..random import KeyedStream

    seq = SequentialQuantile(epsilon, bounds, quantile)
    lo, hi = float(bounds[0]), float(bounds[1])
    n = CHOICE_ROWS
    x = lo + (np.arange(n) + 0.5) / n * (hi - lo)
    words = KeyedStream(SecretKey(bytes(range(32))), "0" * 32, "quantile-choice", "reference").words(
        0, n, default.words_per_row)
    dist = default.decoder().add(default.randomize(x, words)).distribution()   # type: ignore[attr-defined]
    ci = dist.range_ci(lo, lo + quantile * (hi - lo))
    other = float(ci.se) * math.sqrt(n) if ci.se is not None else math.inf
    own = seq.asymptotic_se(1.0, 1)
    text = (f"needs the {quantile:g}-quantile: predicted SE of the CDF at it, per sqrt(row), {seq.name} {own:.4g}, "
            f"{default.name} {other:.4g} (the quantile's SE is this over the density there)")
    if own < other:
        return seq, text + f"; {seq.name} tracks that one quantile only (no other quantile, range or mean)"
    return default, text
