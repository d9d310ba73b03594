"""Numeric distributions decoded from locally private reports.

A ``Distribution`` is a histogram over bucket edges in the column's own units: the estimated
share of rows in each bucket (``mass``), spread uniformly within the bucket.  It answers the
CDF, quantiles, range shares and the mean, and gives intervals for quantiles and range
shares whose construction is stated in each ``Interval.method``.  Three sources make one:

* ``hierarchy`` reports (``mechanisms.distribution.Hierarchy``): unbiased, consistent leaf
  shares with their exact covariance matrix (``cov``).  Range shares get estimate +- z SE;
  quantile intervals invert the CDF test: {x : |F(x) - q| <= z se(F(x))}.
* ``square-wave`` reports (``mechanisms.distribution.SquareWave``): a smoothed, non-negative
  EMS reconstruction; intervals by parametric bootstrap (``replicates``).
* a numeric column released with ``bins:`` through a frequency oracle:
  ``binned_distribution`` (cumulative frequency estimates and the SE of each prefix sum).

Estimates from the unbiased routes may be negative in some buckets, so the estimated CDF need
not be monotone.  Quantiles are read off its monotone rearrangement: the q-quantile is
lo + |{x in [lo, hi] : F(x) < q}| (V. Chernozhukov, I. Fernández-Val, A. Galichon, "Quantile
and Probability Curves Without Crossing", Econometrica 78(3), 2010), which is the ordinary
inverse wherever F is increasing.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import asdict, dataclass
from statistics import NormalDist
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

__all__ = ["Distribution", "Interval", "binned_distribution", "frequency_covariance", "z_value"]


def z_value(confidence: float) -> float:
    if not 0 < confidence < 1:
        raise ValueError("confidence must be between 0 and 1 (e.g. 0.95)")
    return NormalDist().inv_cdf(0.5 + confidence / 2)


@dataclass(frozen=True)
class Interval:
    """A point estimate with a confidence interval [lo, hi] and how the interval was made."""

    estimate: float
    lo: float
    hi: float
    confidence: float
    method: str
    se: float | None = None

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def frequency_covariance(p_star: float, q_star: float, n: int, support: np.ndarray,
                         cosupport: np.ndarray | None = None) -> np.ndarray:
    """Covariance matrix of the unbiased frequency estimates of a frequency oracle, from its
    sufficient statistics: ``support[v]`` = number of reports supporting v, and
    ``cosupport[v, w]`` = number supporting both v and w (None for a protocol whose reports
    support exactly one value, such as GRR: then it is diag(support)).

    It is the sample covariance of the per-row estimates u_i = (1[v in S(y_i)] - q*)/(p* - q*)
    divided by n (docs/formulas.md section 0.3: Var of a set estimate is the variance of
    |S(y) & A| over rows).  Unlike the per-value variance formula it includes the correlation
    between values, which for local hashing with an affine hash is far from zero for
    neighbouring codes; for rows drawn from a population it is the right covariance, for the
    fixed rows of an extract slightly conservative (it also counts the spread of true values).
    """
    s = np.asarray(support, dtype=float)
    C = np.diag(s) if cosupport is None else np.asarray(cosupport, dtype=float)
    if n < 2:
        return np.full((s.size, s.size), np.nan)
    d = p_star - q_star
    return (C - np.outer(s, s) / n) / ((n - 1) * d * d * n)


# -- piecewise-linear CDF helpers (vectorized over leading axes) ---------------------------

def _cum(mass: np.ndarray) -> np.ndarray:
    m = np.asarray(mass, dtype=float)
    out = np.zeros(m.shape[:-1] + (m.shape[-1] + 1,))
    np.cumsum(m, axis=-1, out=out[..., 1:])
    return out


def _rearranged_quantile(F: np.ndarray, edges: np.ndarray, q: float) -> np.ndarray:
    """lo + measure{x : F(x) < q} for F linear between its values at ``edges`` (last axis)."""
    F0, F1 = F[..., :-1], F[..., 1:]
    width = np.diff(edges)
    below0, below1 = F0 < q, F1 < q
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.clip((q - F0) / (F1 - F0), 0.0, 1.0)
    frac = np.where(below0 & below1, 1.0, np.where(~below0 & ~below1, 0.0, np.where(below0, w, 1.0 - w)))
    return edges[0] + (frac * width).sum(axis=-1)


def _quadratic_set_extent(A: np.ndarray, B: np.ndarray, C: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per element: min and max of {w in [0, 1] : A w^2 + B w + C <= 0} (nan where empty)."""
    cands = [np.zeros_like(A), np.ones_like(A)]
    is_root = [np.zeros(A.shape, bool), np.zeros(A.shape, bool)]
    with np.errstate(divide="ignore", invalid="ignore"):
        disc = B * B - 4 * A * C
        quad = np.abs(A) > 1e-14 * (np.abs(B) + np.abs(C) + 1e-300)
        sq = np.sqrt(np.maximum(disc, 0.0))
        r1 = np.where(quad, (-B - sq) / (2 * A), -C / B)
        r2 = np.where(quad, (-B + sq) / (2 * A), -C / B)
        real = np.where(quad, disc >= 0, np.abs(B) > 0)
    for r in (r1, r2):
        ok = real & np.isfinite(r) & (r >= 0) & (r <= 1)
        cands.append(np.where(ok, r, np.nan))
        is_root.append(ok)
    W = np.stack(cands)
    g = (A * W + B) * W + C
    scale = np.abs(A) + np.abs(B) + np.abs(C)
    member = np.stack(is_root) | (g <= 1e-12 * scale)
    member &= np.isfinite(W)
    lo = np.where(member, W, np.inf).min(axis=0)
    hi = np.where(member, W, -np.inf).max(axis=0)
    empty = ~member.any(axis=0)
    return np.where(empty, np.nan, lo), np.where(empty, np.nan, hi)


class Distribution:
    """An estimated distribution of a numeric column: a histogram over ``edges``.

    Parameters
    ----------
    edges : ndarray of shape (K+1,)
        Increasing bucket edges in the column's units (edges[0] and edges[-1] are the bounds).
    mass : ndarray of shape (K,)
        Estimated share of rows in each bucket (may be negative for unbiased estimators).
    method : str
        How the histogram was made (mechanism, decoder, bias), shown with every answer.
    n : int or None
        Rows the estimate is based on (None: not known).
    cov : ndarray of shape (K, K), optional
        Covariance matrix of ``mass``: intervals from exact standard errors.
    cdf_se : ndarray of shape (K+1,), optional
        SE of the cumulative sums at the edges (when ``cov`` is not known).
    centers : ndarray of shape (K,), optional
        The value each bucket's mass stands for in ``mean`` (default: bucket midpoints).
    replicates : callable returning ndarray of shape (R, K), optional
        Bootstrap replicates of ``mass`` (computed on first use, then kept).
    replicate_method : str
        How the replicates were made (for the method string of bootstrap intervals).
    bootstrap_interval : {"bias-aware", "percentile", "basic"}
        Interval read off the replicates: "bias-aware" (default) is the union of the
        percentile interval and the same interval shifted by -2 x the bootstrap bias estimate
        (mean of the replicates minus the estimate), so that it also holds when the
        reconstruction's smoothing bias is not small against the noise; "percentile" is the
        replicates' quantiles; "basic" is 2 x estimate minus their quantiles.
    """

    def __init__(self, edges: ArrayLike, mass: ArrayLike, *, method: str, n: int | None,
                 cov: np.ndarray | None = None, cdf_se: np.ndarray | None = None,
                 centers: np.ndarray | None = None,
                 replicates: Callable[[], np.ndarray] | np.ndarray | None = None,
                 replicate_method: str = "", bootstrap_interval: str = "bias-aware") -> None:
        self.edges = np.asarray(edges, dtype=float)
        self.mass = np.asarray(mass, dtype=float)
        K = self.mass.shape[0]
        if self.edges.shape != (K + 1,) or not np.all(np.diff(self.edges) > 0):
            raise ValueError("edges must be K+1 increasing numbers for K bucket masses")
        self.method = method
        self.n = None if n is None else int(n)
        self.cov = None if cov is None else np.asarray(cov, dtype=float)
        if self.cov is not None and self.cov.shape != (K, K):
            raise ValueError("cov must be a K x K matrix")
        self.cdf_se_edges = None if cdf_se is None else np.asarray(cdf_se, dtype=float)
        if self.cdf_se_edges is not None and self.cdf_se_edges.shape != (K + 1,):
            raise ValueError("cdf_se must hold K+1 values (one per edge)")
        self.centers = (self.edges[:-1] + self.edges[1:]) / 2 if centers is None else np.asarray(centers, float)
        self._replicates = replicates
        self.replicate_method = replicate_method
        if bootstrap_interval not in ("bias-aware", "percentile", "basic"):
            raise ValueError("bootstrap_interval must be 'bias-aware', 'percentile' or 'basic'")
        self.bootstrap_interval = bootstrap_interval
        self._F = _cum(self.mass)

    # -- basic answers --------------------------------------------------------------------
    @property
    def empty(self) -> bool:
        return self.n == 0 or not np.all(np.isfinite(self.mass))

    @property
    def lo(self) -> float:
        return float(self.edges[0])

    @property
    def hi(self) -> float:
        return float(self.edges[-1])

    def _weights(self, x: float) -> np.ndarray:
        """c with F(x) = c @ mass: 1 for buckets below x, the covered fraction of x's bucket."""
        e = self.edges
        w = np.clip((x - e[:-1]) / np.diff(e), 0.0, 1.0)
        return w

    def cdf(self, x: float | np.ndarray) -> float | np.ndarray:
        """Estimated share of rows with value below x (linear within buckets)."""
        xs = np.asarray(x, dtype=float)
        e = self.edges
        j = np.clip(np.searchsorted(e, xs, side="right") - 1, 0, len(self.mass) - 1)
        w = np.clip((xs - e[j]) / (e[j + 1] - e[j]), 0.0, 1.0)
        out = self._F[j] + w * self.mass[j]
        return float(out) if out.ndim == 0 else out

    def quantile(self, q: float) -> float:
        """The q-quantile of the (monotone-rearranged) estimated CDF."""
        _check_q(q)
        if self.empty:
            return math.nan
        return float(_rearranged_quantile(self._F, self.edges, q))

    def range_share(self, a: float, b: float) -> float:
        """Estimated share of rows with a <= value < b."""
        _check_range(a, b)
        return float(self.cdf(b) - self.cdf(a))

    def mean(self) -> float:
        """Estimated mean: mid + sum_k mass_k (center_k - mid), mid = middle of the bounds
        (unbiased whenever the masses are, also if they do not sum to exactly 1)."""
        mid = (self.lo + self.hi) / 2
        return float(mid + self.mass @ (self.centers - mid))

    def histogram(self) -> dict[str, Any]:
        return {"edges": self.edges.tolist(), "mass": self.mass.tolist()}

    def bucket_counts(self, values: np.ndarray) -> np.ndarray:
        """What ``mass`` estimates, counted from known values (for calibration against raw data):
        per bucket, the number of values in it ([e_j, e_j+1), the last bucket closed), or, when
        the buckets stand for grid points (``centers`` other than the midpoints), each value's
        weight split linearly between its two neighbouring grid points (the expectation of the
        unbiased rounding to the grid).  Divide by the row count for shares."""
        x = np.asarray(values, dtype=float)
        K = len(self.mass)
        mids = (self.edges[:-1] + self.edges[1:]) / 2
        if K < 2 or np.allclose(self.centers, mids, rtol=0, atol=1e-12 * (self.hi - self.lo)):
            j = np.clip(np.searchsorted(self.edges, x, side="right") - 1, 0, K - 1)
            return np.bincount(j, minlength=K).astype(float)
        c = self.centers
        j = np.clip(np.searchsorted(c, x, side="right") - 1, 0, K - 2)
        w = np.clip((x - c[j]) / (c[j + 1] - c[j]), 0.0, 1.0)
        return np.bincount(j, weights=1.0 - w, minlength=K) + np.bincount(j + 1, weights=w, minlength=K)

    # -- standard errors ----------------------------------------------------------------
    def cdf_se(self, x: float) -> float | None:
        """SE of cdf(x): exact from ``cov``; from ``cdf_se`` at the edges, linearly
        interpolated within a bucket (an upper bound: sd((1-w)A + wB) <= (1-w)sd(A) + w sd(B));
        None for a bootstrap-only distribution."""
        if self.cov is not None:
            c = self._weights(x)
            return float(math.sqrt(max(c @ self.cov @ c, 0.0)))
        if self.cdf_se_edges is not None:
            return float(np.interp(x, self.edges, self.cdf_se_edges))
        return None

    def _range_se(self, a: float, b: float) -> tuple[float | None, str]:
        if self.cov is not None:
            c = self._weights(b) - self._weights(a)
            return float(math.sqrt(max(c @ self.cov @ c, 0.0))), "exact"
        if self.cdf_se_edges is not None:
            sb = self.cdf_se(b)
            if a <= self.lo:
                return sb, "exact" if self._on_edge(b) else "bound"
            sa = self.cdf_se(a)
            assert sa is not None and sb is not None
            return sa + sb, "bound"
        return None, ""

    def _on_edge(self, x: float) -> bool:
        """x is a bucket edge or beyond the bounds (no interpolation needed there)."""
        return bool(x <= self.lo or x >= self.hi or np.any(np.abs(self.edges - x) <= 1e-12 * (self.hi - self.lo)))

    def _replicate_masses(self) -> np.ndarray:
        if self._replicates is None:
            raise ValueError("this distribution has neither standard errors nor bootstrap replicates")
        if callable(self._replicates):
            self._replicates = np.asarray(self._replicates(), dtype=float)
        return self._replicates

    def _bootstrap(self, stat: np.ndarray, est: float, confidence: float) -> tuple[float, float]:
        alpha = 1 - confidence
        lo_q, hi_q = np.quantile(stat, [alpha / 2, 1 - alpha / 2])
        if self.bootstrap_interval == "basic":
            return 2 * est - hi_q, 2 * est - lo_q
        if self.bootstrap_interval == "bias-aware":
            shift = 2 * (float(np.mean(stat)) - est)
            return float(min(lo_q, lo_q - shift)), float(max(hi_q, hi_q - shift))
        return float(lo_q), float(hi_q)

    def _bootstrap_method(self, what: str) -> str:
        kind = {"percentile": "percentile interval of the replicate " + what,
                "basic": "basic interval (2 x estimate minus the replicate quantiles) of the replicate " + what,
                "bias-aware": "union of the percentile interval of the replicate " + what + " and that interval "
                              "shifted by -2 x the bootstrap bias estimate (covers the smoothing bias)"}[
            self.bootstrap_interval]
        return f"parametric bootstrap, {kind}; {self.replicate_method}"

    # -- intervals --------------------------------------------------------------------------
    def range_ci(self, a: float, b: float, confidence: float = 0.95) -> Interval:
        """Share of rows in [a, b) with a confidence interval."""
        _check_range(a, b)
        z = z_value(confidence)
        if self.empty:
            return Interval(math.nan, math.nan, math.nan, confidence, "no rows")
        est = self.range_share(a, b)
        se, kind = self._range_se(a, b)
        if se is not None:
            how = ("exact SE from the covariance of the bucket estimates" if kind == "exact" else
                   "SE bounded from the SEs of the cumulative shares at the edges: their sum for a range "
                   "inside the bounds, interpolated within a bucket (conservative)")
            partial = not (self._on_edge(a) and self._on_edge(b))
            note = "; an end inside a bucket is read off the linear interpolation within it" if partial else ""
            return Interval(est, est - z * se, est + z * se, confidence,
                            f"normal approximation, estimate +- {z:.3f} SE ({how}){note}", se)
        reps = self._replicate_masses()
        stat = reps @ (self._weights(b) - self._weights(a))
        lo, hi = self._bootstrap(stat, est, confidence)
        return Interval(est, lo, hi, confidence, self._bootstrap_method("range shares"), float(np.std(stat, ddof=1)))

    def quantile_ci(self, q: float, confidence: float = 0.95) -> Interval:
        """The q-quantile with a confidence interval."""
        _check_q(q)
        z = z_value(confidence)
        if self.empty:
            return Interval(math.nan, math.nan, math.nan, confidence, "no rows")
        est = self.quantile(q)
        if self.cov is not None or self.cdf_se_edges is not None:
            lo, hi = self._invert_cdf_test(q, z)
            src = ("exact covariance of the bucket estimates" if self.cov is not None else
                   "the SEs of the cumulative shares at the edges, interpolated within buckets (conservative)")
            return Interval(est, lo, hi, confidence,
                            f"test inversion: all x with |F(x) - {q:g}| <= {z:.3f} se(F(x)), F linear within "
                            f"buckets, se(F(x)) from {src}")
        reps = self._replicate_masses()
        stat = _rearranged_quantile(_cum(reps), self.edges, q)
        lo, hi = self._bootstrap(stat, est, confidence)
        return Interval(est, float(max(lo, self.lo)), float(min(hi, self.hi)), confidence,
                        self._bootstrap_method("quantiles"), float(np.std(stat, ddof=1)))

    def _invert_cdf_test(self, q: float, z: float) -> tuple[float, float]:
        """[min, max] of {x : (F(x) - q)^2 <= z^2 Var F(x)}, solved exactly bucket by bucket:
        on bucket j, F = F_j + w m_j and Var = a + 2 b w + d w^2 (w in [0, 1])."""
        F0, m = self._F[:-1], self.mass
        if self.cov is not None:
            C = self.cov
            K = len(m)
            P = np.zeros((K + 1, K + 1))
            P[1:, 1:] = np.cumsum(np.cumsum(C, axis=0), axis=1)
            a = np.diag(P)[:-1]                       # Var of the prefix sum below bucket j
            colcum = np.zeros((K + 1, K))
            colcum[1:] = np.cumsum(C, axis=0)
            b = colcum[np.arange(K), np.arange(K)]    # Cov(prefix below j, mass j)
            d = np.diag(C)
        else:
            s = self.cdf_se_edges
            assert s is not None
            s0, s1 = s[:-1], s[1:]
            a, b, d = s0 * s0, s0 * (s1 - s0), (s1 - s0) ** 2
        z2 = z * z
        A = m * m - z2 * d
        B = 2 * (m * (F0 - q) - z2 * b)
        Cc = (F0 - q) ** 2 - z2 * a
        wlo, whi = _quadratic_set_extent(A, B, Cc)
        width = np.diff(self.edges)
        xlo = self.edges[:-1] + wlo * width
        xhi = self.edges[:-1] + whi * width
        if np.all(np.isnan(xlo)):
            return math.nan, math.nan
        return float(np.nanmin(xlo)), float(np.nanmax(xhi))

    def __repr__(self) -> str:
        return f"Distribution({len(self.mass)} buckets on [{self.lo:g}, {self.hi:g}], n={self.n}: {self.method})"


def _check_q(q: float) -> None:
    if not 0 <= q <= 1:
        raise ValueError("a quantile level must be between 0 and 1")


def _check_range(a: float, b: float) -> None:
    if not a <= b:
        raise ValueError("a range [a, b) needs a <= b")


def binned_distribution(edges: ArrayLike, freq_estimates: ArrayLike, prefix_se: ArrayLike, *,
                        cov: np.ndarray | None = None, n: int | None = None,
                        method: str = "frequency-oracle estimates of the bins") -> Distribution:
    """Distribution of a numeric column released with ``bins:`` through a frequency oracle.

    Parameters
    ----------
    edges : ndarray of shape (K+1,)
        The bin edges of the policy.
    freq_estimates : ndarray of shape (K,)
        Unbiased estimates of the share of rows in each bin.
    prefix_se : ndarray of shape (K,) or (K+1,)
        SE of each prefix sum of the estimates: of f_0, f_0 + f_1, ..., f_0 + ... + f_{K-1}
        (a leading 0 for the empty prefix may be included).  For a set A of bins this is
        sqrt(sum_i Var |S(y_i) & A|) / (n (p* - q*)), estimated from the per-row counts
        |S(y_i) & A| (docs/formulas.md section 0.3); per-value variances summed would ignore the
        correlation between values.
    cov : ndarray of shape (K, K), optional
        Covariance of the estimates (``frequency_covariance``); if given, every interval uses
        exact standard errors, also for ranges that do not start at the lower bound.
    n : int, optional
        Rows behind the estimates.

    The CDF at the edges is the cumulative sum of the estimates (unbiased); within a bin it is
    interpolated linearly, which is where a quantile's bias comes from (none at the edges).
    """
    e = np.asarray(edges, dtype=float)
    f = np.asarray(freq_estimates, dtype=float)
    s = np.asarray(prefix_se, dtype=float)
    if s.shape == f.shape:
        s = np.concatenate([[0.0], s])
    return Distribution(e, f, method=method + "; linear within bins", n=n,
                        cov=cov, cdf_se=None if cov is not None else s)
