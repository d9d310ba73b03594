"""Goodness of fit: are the reports in an extract consistent with the declared mechanism?

The generic machinery lives here (the accumulator ``FitStats``, typed ``FitResult``s, Pearson's
test, the hull fit, the binomial support bounds); each mechanism chooses its own test in
``Mechanism.fit_test()`` (the mechanism-specific accumulators live in the mechanism's module:
the ones count and the support size in categorical.py, the zero-output count in hadamard.py,
the per-level test in distribution.py).

A manifest declares, per column, the local randomizer (its eps, domain, bounds, grid...).  A
pipeline bug can release reports under other parameters than the manifest states (released at
eps 4, declared 0.5; a category list with an extra entry).  The reports themselves carry evidence
of their channel, and this module tests it, column by column, streaming: every test works from
additive integer statistics (``FitStats.add`` per batch, ``FitStats.merge`` across batches and
files), and the test is computed once at the end (``FitStats.results``).

Which evidence, and why
-----------------------
Two kinds of feature are used.  Where a feature's distribution does not depend on the (unknown)
data at all, the null hypothesis is simple and the test is exact in its reference distribution;
where it does, the data distribution is a nuisance parameter and is fitted.

1. Data-independent features of the frequency oracles (Wang, Blocki, Li, Jha, "Locally
   Differentially Private Protocols for Frequency Estimation", USENIX Security 2017, for p*, q*):

   * Unary encodings (``oue``, ``sue``): the number of ones T in a report is the true value's bit
     (Bernoulli(p*)) plus the k-1 other bits (Binomial(k-1, q*)), all independent, whatever the
     input.  So T has a known distribution for every row, and the rows are independent: a simple
     null.  Two tests: (a) the mean of T against p* + (k-1) q* with the exact null variance
     p*(1-p*) + (k-1) q*(1-q*) (z statistic, standard normal reference; the most direct test of
     eps, one degree of freedom); (b) Pearson's chi-square of the histogram of T against the exact
     pmf, adjacent cells pooled until every expected count is at least 5 (the usual rule for the
     chi-square approximation; W. G. Cochran, "Some Methods for Strengthening the Common chi^2
     Tests", Biometrics 10(4), 1954), df = cells - 1.  (b) is needed because the mean can be blind:
     for ``sue`` with k = 2 the mean of T is exactly 1 at every eps, but P(T = 1) = p*^2 + (1-p*)^2
     is not.
   * Local hashing (``olh``): each value v supports a report with probability p* (v the true
     value) or q* (otherwise), q* including the exact collision probability of the hash family;
     so the support size |S(y)| = #{v : H(v) = y} has mean p* + (k-1) q* for every input.  Its
     variance involves triples of hash values, which this linear family does not make independent,
     so it is not data-independent: the test is a z test of the mean with the variance estimated
     from the same rows (rows are independent with a common mean under the null; the central limit
     theorem for independent rows gives the standard normal reference asymptotically).  A second
     exact feature: the hash input (a v + b) mod P is uniform for every v because b is uniform and
     drawn from the PRF alone, so the reported bucket y has the data-independent distribution
     P(y = j) = p* s_j/P + (1 - s_j/P)(1-p*)/(g-1) with s_j the size of bucket j.  Pearson's
     chi-square of the bucket histogram (buckets grouped to at most 4096 groups, then pooled as
     above) tests it; it sees a wrong hash range, not eps (the buckets are nearly uniform at any
     eps).
   * ``grr``: the support size is always 1 and the reported label's distribution depends on the
     data; no data-independent feature exists, so only the hull test below applies.

2. Feasibility of the output histogram (mechanisms with a finite output alphabet and an exact
   channel matrix Q, inputs x outputs: ``grr`` labels, the grid mechanisms' written values mapped
   to ``output_values``, square-wave's written cell index; and each level of ``hierarchy``).
   Whatever the data, the expected output distribution is r = w Q for some input distribution w
   on the simplex (for the grid mechanisms w lives on the input grid: random rounding to the grid
   is part of the channel).  The test fits w by maximum likelihood (a concave problem; EM on the
   mixture weights, A. P. Dempster, N. M. Laird, D. B. Rubin, JRSS-B 39(1), 1977, which stays on
   the simplex) and measures the lack of fit with the likelihood-ratio statistic against the
   saturated multinomial, G = 2 (L_saturated - L_hull).

   Reference distribution (conservative, stated): chi-square with df = (pooled output cells) - 1.
   Justification: for every sample, the maximum over the hull is at least the likelihood at the
   true r, so G <= G_0 = 2 (L_saturated - L(r_true)), the likelihood-ratio statistic of the
   simple null "r = r_true", which is asymptotically chi-square with cells - 1 df (S. S. Wilks,
   Ann. Math. Statist. 9, 1938).  So P(G > c) <= P(G_0 > c) -> chi2.sf(c, cells - 1): a correct
   release fails at most at the stated rate, also when the true w sits on the boundary of the
   simplex (zero-share categories, which make the exact null distribution a chi-bar-square mixture
   that is hard to compute).  The price is power: with w in the interior the actual statistic is
   far below the reference.  To keep the chi-square approximation of G_0 sound, adjacent output
   cells are pooled (a data-independent coarsening, which keeps the bound) until every pooled
   cell's smallest probability over all inputs, times n, is at least 5, and to keep power against
   broad misfits the number of pooled cells is capped (``HULL_MAX_CELLS``).  The EM fit is run
   until the Frank-Wolfe duality gap max_i grad_i L - <w, grad L> (an upper bound on how far L(w)
   is from the maximum, because L is concave) is below ``EM_GAP_TOL``; the statistic reported is
   G - 2 gap, a lower bound on the exact G, so an unconverged fit can only make the test more
   conservative, never raise a false alarm.

   Reports that the declared channel cannot produce at all (a label outside the declared
   categories, a value outside the declared output alphabet, a malformed unary string, a bucket
   beyond the declared hash range) have likelihood 0 under the declared mechanism: any such
   report makes every test of the column fail with p = 0 (``impossible`` in the result).  The
   ``output alphabet`` check of ``ldpt validate`` counts the same rows; here they are evidence
   against the declared parameters (for the grid mechanisms the output alphabet itself depends
   on eps, the bounds and the grid, so a wrong eps shows first this way).

Where several tests apply, each is returned as its own result (``FitStats.results``) so that
the caller can apply one Bonferroni correction over all columns and tests; ``FitStats.result``
also gives the column's combined verdict (Bonferroni within the column).

What can and cannot be detected
-------------------------------
What a test can see depends on the mechanism and on the direction of the error.  In short (k
categories; "released" = what was applied, "declared" = what the manifest says; the cases
measured are in tests/test_gof.py, the rest is reasoning from the channels):

=============  ==============================  ==============================  ==============================
mechanism      declared eps too small          declared eps too large          wrong domain
=============  ==============================  ==============================  ==============================
grr            detectable iff some category's  HIDDEN: the reports are then    an extra declared category
               true share w_v is below         flatter than the declared eps   with no reports: detected
               (q_d - q_r)/(p_r - q_r) (zero-  would make them from some       (its share has a floor q_d);
               share categories suffice); the  data, and a flatter input w     a missing one: its labels
               hull cannot see it when every   under the declared eps gives    are impossible reports
               share is above that level       exactly such reports
oue, sue       detected (mean and histogram    detected (same)                 another k changes the report
               of the number of ones)                                          length: impossible reports
olh            same hash range: detected by    same hash range: detected       extra declared categories:
               the support-size mean; default  (support-size mean); default    HIDDEN (an extra value is
               hash range: buckets beyond the  range: the reported buckets     supported with q* like any
               declared range are impossible   fill only part of the declared  other); a missing category:
                                               range (bucket test)             mean drifts by its share x
                                                                               (p* - q*)
two-point,     the output alphabet depends on eps, bounds and grid: the          bounds or grid: as eps
piecewise,     written values are impossible under the declared mechanism
hybrid         (a piecewise release declared as hybrid has the same values:
               the hull sees the never-used two-point outputs)
square-wave    hull test (the cell indices are valid under both); detection     bounds are not visible in the
               in both directions at the rows measured in the tests             cell indices; another grid
                                                                                changes the cell count
hierarchy      per level, as grr (hull) or olh (support-size mean, buckets)
subset         detected when a declared value's   another subset size: impossible   another k changes the report
               floor q* n is above what the       reports (the number of ones is    length: impossible reports
               release gives (support-bounds);    fixed); same size: HIDDEN unless
               another size: impossible reports   a count passes the ceiling
hadamard       detected (the share of output 0    detected (same)                   a larger K: outputs out of
               is 2 p*/K for every input)                                           range; the same K: HIDDEN
matrix         as grr (hull on the k x k channel; k <= 1024)
discrete-      the written lattice depends on the bounds and the grid; eps: hull test on the lattice cells
laplace        (tails pooled), detected in both directions at the rows measured in the tests
=============  ==============================  ==============================  ==============================

Anything the channel of the declared mechanism could have produced from *some* data cannot be
detected by any test: a hidden error is one where the released output distribution lies inside
the declared hull.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any
from collections.abc import Callable, Iterator, Mapping

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..results import DictView
from .base import Mechanism

MIN_EXPECTED = 5.0          # smallest expected count of a pooled cell (Cochran 1954's rule of thumb)
HULL_MAX_CELLS = 64         # pooled output cells of a hull test at most (power against broad misfit)
EM_GAP_TOL = 0.01           # stop the hull fit when L* - L(w) <= this (nats, whole extract)
EM_MAX_ITER = 200_000
SUPPORT_CHUNK = 1 << 22     # support sizes, ones counts: at most this many entries of a (rows, k) matrix at once


# ----------------------------------------------------------------------------------------------
# typed results
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=True)
class FitResult(DictView):
    """One goodness-of-fit test of one column (or, from ``FitStats.result``, the column's combined
    verdict with every test under ``tests``).  ``extra`` holds the test's own figures (observed,
    expected, cells, fit_gap, level; tested = False for a test that was not run)."""

    test: str
    kind: str
    statistic: float
    df: int | None
    reference: str
    p_value: float
    alpha: float
    passed: bool
    rows: int
    impossible: int
    detail: str
    extra: Mapping[str, Any] = field(default_factory=dict)
    tests: tuple[FitResult, ...] | None = None

    @property
    def tested(self) -> bool:
        """False for a test that was not run (too few reports)."""
        return bool(self.extra.get("tested", True))

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"test": self.test, "kind": self.kind, "statistic": self.statistic, "df": self.df,
                             "reference": self.reference, "p_value": self.p_value, "alpha": self.alpha,
                             "passed": self.passed, "rows": self.rows, "impossible": self.impossible,
                             "detail": self.detail}
        d.update(self.extra)
        if self.tests is not None:
            d["tests"] = [t.to_dict() for t in self.tests]
        return d

    def with_extra(self, **extra: Any) -> FitResult:
        return replace(self, extra={**self.extra, **extra})

    def to_frame(self) -> pd.DataFrame:
        """One row per test (this result's own ``tests`` if it combines several, else itself):
        test, kind, statistic, df, p_value, alpha, passed, tested, rows, impossible, detail,
        reference, then each of the tests' own figures (``extra``: observed, expected, cells,
        fit_gap, level ...) as a column of its own (missing where a test has no such figure).  A
        statistic that is not finite (reports no mechanism can send: null in the JSON) is NaN."""
        from ..results import _typed

        cols = ["test", "kind", "statistic", "df", "p_value", "alpha", "passed", "tested", "rows", "impossible",
                "detail", "reference"]
        tests = self.tests if self.tests is not None else (self,)
        extra = list(dict.fromkeys(k for t in tests for k in t.extra if k not in cols))
        rows = [{**{c: getattr(t, c) for c in cols}, **{k: t.extra.get(k) for k in extra}} for t in tests]
        return _typed(pd.DataFrame(rows, columns=cols + extra), ("statistic", "p_value", "alpha"))

    def __iter__(self) -> Iterator[str]:
        return iter(self.to_dict())


# ----------------------------------------------------------------------------------------------
# shared helpers
# ----------------------------------------------------------------------------------------------

def _chunk(a: Any) -> pa.Array:
    return a.combine_chunks() if isinstance(a, pa.ChunkedArray) else a


def _reported(arrays: list[pa.Array]) -> list[pa.Array]:
    """Drop the rows that did not report this column (null in every output array).  A row null in
    some but not all outputs stays: the mechanism's parser marks it as impossible."""
    arrays = [_chunk(a) for a in arrays]
    if not any(a.null_count for a in arrays):
        return arrays
    allnull = np.ones(len(arrays[0]), dtype=bool)
    for a in arrays:
        allnull &= np.asarray(pc.is_null(a).to_numpy(zero_copy_only=False))
    keep = pa.array(~allnull)
    return [a.filter(keep) for a in arrays]


def _pool_adjacent(weight: np.ndarray, target: float) -> np.ndarray:
    """Group labels for cells in their given order: adjacent cells are merged, left to right,
    until each group's total ``weight`` reaches ``target``; a short last group joins the one
    before it.  A loop over cells (never over rows)."""
    labels = np.zeros(len(weight), dtype=np.int64)
    g, acc = 0, 0.0
    for j, wj in enumerate(np.asarray(weight, dtype=float)):
        labels[j] = g
        acc += wj
        if acc >= target:
            g, acc = g + 1, 0.0
    if acc < target and g > 0:          # the unfinished last group joins the previous one
        labels[labels == g] = g - 1
    return labels


def _pooled(values: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Sum ``values`` (last axis: cells) within groups."""
    m = int(labels.max()) + 1 if labels.size else 0
    if values.ndim == 1:
        return np.bincount(labels, weights=values, minlength=m)
    out = np.zeros(values.shape[:-1] + (m,))
    np.add.at(out.T, labels, values.T)
    return out


def _result(test: str, kind: str, statistic: float, df: int | None, reference: str, p_value: float,
            alpha: float, rows: int, impossible: int, detail: str, **extra: Any) -> FitResult:
    p_value = float(min(1.0, max(0.0, p_value)))
    return FitResult(test, kind, float(statistic), df, reference, p_value, float(alpha), bool(p_value >= alpha),
                     int(rows), int(impossible), detail, dict(extra))


def _impossible_result(test: str, kind: str, df: int | None, reference: str, alpha: float, rows: int,
                       impossible: int) -> FitResult:
    return _result(test, kind, math.inf, df, reference, 0.0, alpha, rows, impossible,
                   f"{impossible} of {rows} reports cannot come from the declared mechanism at all (outside "
                   "its output alphabet): the declared parameters do not describe this release")


def _too_few(test: str, kind: str, reference: str, alpha: float, rows: int, why: str) -> FitResult:
    return _result(test, kind, 0.0, 0, reference, 1.0, alpha, rows, 0, f"not tested: {why}", tested=False)


def unusable_results(tests: list[tuple[str, str, str]], alpha: float, rows: int, impossible: int,
                     good: int) -> list[FitResult] | None:
    """The results of several tests (name, kind, reference) when the reports cannot be tested:
    failed outright if any report is impossible, not tested with fewer than 2 usable reports;
    None when the tests can run."""
    if impossible:
        return [_impossible_result(name, kind, None, ref, alpha, rows, impossible) for name, kind, ref in tests]
    if good < 2:
        return [_too_few(name, kind, ref, alpha, rows, "fewer than 2 reports") for name, kind, ref in tests]
    return None


def pearson_test(counts: np.ndarray, probs: np.ndarray, min_expected: float = MIN_EXPECTED
                 ) -> tuple[float, int, int]:
    """Pearson's chi-square of ``counts`` (cells in a meaningful order) against the exact cell
    probabilities ``probs``, adjacent cells pooled until every expected count is at least
    ``min_expected``.  Returns (statistic, df, pooled cells); df = cells - 1 (simple null).
    Source: K. Pearson, Phil. Mag. 50, 1900; pooling rule: Cochran, Biometrics 1954."""
    counts = np.asarray(counts, dtype=float)
    n = counts.sum()
    probs = np.asarray(probs, dtype=float)
    probs = probs / probs.sum()
    labels = _pool_adjacent(n * probs, min_expected)
    c, e = _pooled(counts, labels), n * _pooled(probs, labels)
    if len(c) < 2:
        return 0.0, 0, len(c)
    return float(((c - e) ** 2 / e).sum()), len(c) - 1, len(c)


def _pearson_result(name: str, kind: str, ref: str, counts: np.ndarray, probs: np.ndarray, alpha: float,
                    rows: int, good: int, what: str) -> FitResult:
    """A Pearson test of ``counts`` against the exact ``probs`` as a result (not tested when
    the reports fill fewer than 2 pooled cells)."""
    x2, df, cells = pearson_test(counts, probs)
    if df == 0:
        return _too_few(name, kind, ref, alpha, rows,
                        f"{good} reports fill fewer than 2 cells of expected count {MIN_EXPECTED:g}")
    return _result(name, kind, x2, df, f"chi-square with {df} df (simple null)", _chi2_sf(x2, df), alpha, rows, 0,
                   f"Pearson chi-square {x2:.1f} on {cells} pooled {what} (expected >= {MIN_EXPECTED:g} each), "
                   f"{good} reports")


def _chi2_sf(x: float, df: int) -> float:
    from scipy.stats import chi2

    return float(chi2.sf(x, df)) if df > 0 else 1.0


def _norm_two_sided(z: float) -> float:
    from scipy.stats import norm

    return float(2.0 * norm.sf(abs(z)))


# ----------------------------------------------------------------------------------------------
# the accumulator interface
# ----------------------------------------------------------------------------------------------

class FitStats:
    """Additive statistics of one column's reports for its goodness-of-fit tests.

    ``add(arrays)``: one batch (the column's extract arrays; rows null in every array, i.e. not
    reported, are dropped).  ``merge(other)``: add another accumulator of the same mechanism
    (another batch range or file).  ``results(alpha)``: one ``FitResult`` per test.  ``result(alpha)``: the
    column's combined verdict.  All state is integer counts in ``self.stats`` (so merging is
    addition and the order of batches cannot matter)."""

    def __init__(self, mechanism: Mechanism) -> None:
        self.mechanism = mechanism
        self.stats: dict[str, np.ndarray] = {"rows": np.zeros((), dtype=np.int64),
                                             "impossible": np.zeros((), dtype=np.int64)}

    # -- accumulation ------------------------------------------------------------------------
    def add(self, arrays: list[pa.Array]) -> FitStats:
        arrays = _reported(arrays)
        if len(arrays[0]) == 0:
            return self
        self._add(arrays)
        return self

    def _add(self, arrays: list[pa.Array]) -> None:
        raise NotImplementedError

    def merge(self, other: FitStats) -> FitStats:
        if type(other) is not type(self) or other.mechanism.to_spec() != self.mechanism.to_spec():
            raise ValueError("goodness-of-fit statistics of different mechanisms cannot be merged")
        for k, v in other.stats.items():
            self.stats[k] = self.stats[k] + v
        self._merge_parts(other)
        return self

    def _merge_parts(self, other: FitStats) -> None:
        pass

    @property
    def rows(self) -> int:
        return int(self.stats["rows"])

    @property
    def impossible(self) -> int:
        return int(self.stats["impossible"])

    # -- tests -------------------------------------------------------------------------------
    TESTS: int = 1   # how many results ``results`` returns (fixed per class, for a Bonferroni split)

    @property
    def n_tests(self) -> int:
        return self.TESTS

    def results(self, alpha: float) -> list[FitResult]:
        raise NotImplementedError

    def result(self, alpha: float) -> FitResult:
        """The column's verdict: the test with the smallest p-value, its p-value multiplied by
        the number of tests (Bonferroni within the column), and every test under ``tests``."""
        res = self.results(alpha)
        m = len(res)
        worst = min(res, key=lambda r: r.p_value)
        p = min(1.0, worst.p_value * m)
        return replace(worst, p_value=p, passed=bool(p >= alpha), alpha=float(alpha), tests=tuple(res),
                       detail=(f"{sum(r.passed for r in res)} of {m} tests pass at level {alpha:g} each; "
                               f"smallest p {worst.p_value:.3g} x {m} tests = {p:.3g} ({worst.kind}): "
                               + worst.detail))


# ----------------------------------------------------------------------------------------------
# finite channels: the hull test
# ----------------------------------------------------------------------------------------------

def hull_mle(Q: np.ndarray, counts: np.ndarray, gap_tol: float = EM_GAP_TOL, max_iter: int = EM_MAX_ITER,
             stop: Callable[[float, float], bool] | None = None) -> tuple[np.ndarray, float, float, int]:
    """Maximize L(w) = sum_j c_j ln (w Q)_j over the simplex by EM on the mixture weights
    (Dempster, Laird, Rubin 1977: w_i <- w_i sum_j Q_ij c_j / (n (wQ)_j)), with SQUAREM
    extrapolation (R. Varadhan, C. Roland, "Simple and Globally Convergent Methods for
    Accelerating the Convergence of Any EM Algorithm", Scand. J. Statist. 35(2), 2008) kept only
    when it stays on the simplex and raises L.  Stops when the Frank-Wolfe gap
    max_i grad_i - <w, grad> = max_i grad_i - n bounds L* - L(w) by ``gap_tol`` (L is concave, so
    L* <= L(w) + max over the simplex of <grad, s - w>).

    ``stop(L, gap)``, if given, ends the fit early once it returns True (the caller's verdict can
    no longer change: L <= L* <= L + gap).

    ``counts`` may be real (expected counts).  Returns (w, L(w), gap, iterations)."""
    Q = np.asarray(Q, dtype=float)
    c = np.asarray(counts, dtype=float)
    pos = c > 0
    Qp, cp = Q[:, pos], c[pos]
    n = cp.sum()
    I = Q.shape[0]

    def loglik(w: np.ndarray) -> float:
        r = w @ Qp
        if (r <= 0).any():
            return -math.inf
        return float(cp @ np.log(r))

    def em(w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = w @ Qp
        grad = Qp @ (cp / r)
        return w * grad / n, grad

    w = np.full(I, 1.0 / I)
    L = loglik(w)
    gap = math.inf
    it = 0
    while it < max_iter:
        w1, grad = em(w)
        gap = float(grad.max() - n)
        if gap <= gap_tol or (stop is not None and stop(L, gap)):
            break
        w2, _ = em(w1)
        it += 2
        r_ = w1 - w
        v_ = w2 - w1 - r_
        nr, nv = float(np.sqrt(r_ @ r_)), float(np.sqrt(v_ @ v_))
        best, Lbest = w2, loglik(w2)
        if nv > 0:
            a = -nr / nv
            if a < -1:
                wx = w - 2 * a * r_ + a * a * v_
                if (wx >= 0).all():
                    wx = np.maximum(wx, 0)
                    wx /= wx.sum()
                    wx, _ = em(wx)            # a stabilizing EM step after the extrapolation
                    Lx = loglik(wx)
                    if Lx > Lbest:
                        best, Lbest = wx, Lx
        w, L = best, Lbest
    return w, L, gap, it


class HullFit(FitStats):
    """Finite-channel mechanisms: counts of reports per output cell, tested by the hull fit.

    ``Q`` is the declared channel (inputs x outputs) with outputs in a meaningful order (adjacent
    outputs are neighbours, so pooling merges neighbours); ``index`` maps a batch's arrays to
    (output index, impossible mask)."""

    def __init__(self, mechanism: Mechanism, Q: np.ndarray,
                 index: Callable[[list[pa.Array]], tuple[np.ndarray, np.ndarray]], what: str) -> None:
        super().__init__(mechanism)
        self.Q = np.asarray(Q, dtype=float)
        self._index = index
        self.what = what
        self.possible = self.Q.max(axis=0) > 0          # an output no input can produce is impossible
        self.stats["counts"] = np.zeros(self.Q.shape[1], dtype=np.int64)

    # accumulation ------------------------------------------------------------------------------
    def _add(self, arrays: list[pa.Array]) -> None:
        idx, bad = self._index(arrays)
        self.add_indices(idx, bad)

    def add_indices(self, idx: np.ndarray, bad: np.ndarray) -> None:
        """Rows already parsed: output indices and the mask of reports outside the alphabet."""
        idx = np.asarray(idx, dtype=np.int64)
        bad = np.asarray(bad, dtype=bool) | (idx < 0) | (idx >= self.Q.shape[1])
        ok = idx[~bad]
        bad_cell = ~self.possible[ok]
        self.stats["rows"] += len(idx)
        self.stats["impossible"] += int(bad.sum() + bad_cell.sum())
        self.stats["counts"] += np.bincount(ok[~bad_cell], minlength=self.Q.shape[1])

    # the test ---------------------------------------------------------------------------------
    def pooling(self, n: int) -> np.ndarray:
        """Data-independent pooled cells for n reports: neighbours merged until each pooled cell has
        probability at least max(MIN_EXPECTED / n, (sum of floors) / HULL_MAX_CELLS) under every
        input (floor = smallest probability over the inputs)."""
        floor = np.where(self.possible, self.Q.min(axis=0), 0.0)
        total = float(floor.sum())
        target = max(MIN_EXPECTED / max(n, 1), total / HULL_MAX_CELLS)
        if target > total:                               # too few rows: one cell (no test)
            return np.zeros(len(floor), dtype=np.int64)
        return _pool_adjacent(floor, target)

    def statistic(self, counts: np.ndarray | None = None, n: int | None = None,
                  alpha: float | None = None) -> dict[str, Any]:
        """The hull fit of ``counts`` (default: the accumulated ones) on the pooled cells.  With
        ``alpha``, the fit stops as soon as the verdict at that level is certain: the exact G lies
        in [2 (L_sat - L - gap), 2 (L_sat - L)], and once that interval is wholly above or below the
        critical value more iterations cannot change pass or fail (the statistic reported is still
        the lower end, so the p-value stays conservative)."""
        c = self.stats["counts"] if counts is None else np.asarray(counts, dtype=float)
        n = int(round(float(np.sum(c)))) if n is None else n
        labels = self.pooling(n)
        cells = int(labels.max()) + 1
        cp = _pooled(np.asarray(c, dtype=float), labels)
        Qp = _pooled(self.Q, labels)
        if cells < 2:
            return {"cells": cells, "G": 0.0, "gap": 0.0, "iterations": 0, "w": None}
        pos = cp > 0
        Lsat = float((cp[pos] * np.log(cp[pos] / cp.sum())).sum())
        stop = None
        if alpha is not None and 0 < alpha < 1:
            from scipy.stats import chi2

            crit = float(chi2.isf(alpha, cells - 1))

            def stop(L: float, gap: float) -> bool:
                return 2 * (Lsat - L - gap) > crit or 2 * (Lsat - L) < crit

        w, L, gap, it = hull_mle(Qp, cp, stop=stop)
        G = max(0.0, 2.0 * (Lsat - L - gap))
        return {"cells": cells, "G": G, "gap": gap, "iterations": it, "w": w}

    def results(self, alpha: float) -> list[FitResult]:
        m = self.mechanism
        n, bad = self.rows, self.impossible
        name = (f"the {self.what} fit the output distribution of {m.name} at eps {m.epsilon:g} for some input "
                "distribution (likelihood ratio against the convex hull of the channel's rows)")
        ref = "chi-square with df = pooled cells - 1 (conservative upper bound)"
        if bad:
            return [_impossible_result(name, "hull-lr", None, ref, alpha, n, bad)]
        s = self.statistic(alpha=alpha)
        if s["cells"] < 2:
            return [_too_few(name, "hull-lr", ref, alpha, n, f"{n} reports are too few for 2 output cells of "
                             f"expected count >= {MIN_EXPECTED:g} under every input")]
        df = s["cells"] - 1
        G = s["G"]
        return [_result(name, "hull-lr", G, df, f"chi-square with {df} df (conservative upper bound)",
                        _chi2_sf(G, df), alpha, n, 0,
                        f"G = {G:.1f} on {s['cells']} pooled output cells ({n} reports; the best-fitting input "
                        f"distribution found within {s['gap']:.2g} nats of the optimum, and G lowered by it)",
                        cells=s["cells"], fit_gap=s["gap"])]


# ----------------------------------------------------------------------------------------------
# frequency oracles: bounds on each value's support count (subset; hadamard adds its own test)
# ----------------------------------------------------------------------------------------------

def _support_bound_tests(m: Any, s: np.ndarray, n: int, alpha: float, rows: int) -> list[FitResult]:
    """Floor and ceiling of the support counts.  Under the declared mechanism each report
    supports value v with probability p* (v the row's value) or q* (otherwise), independently
    across rows, so the count s_v is a sum of independent Bernoulli variables with success
    probabilities in [q*, p*]: it is stochastically at least Binomial(n, q*) and at most
    Binomial(n, p*) whatever the data (coupling of independent Bernoulli variables).  So
    P(s_v <= c) <= binom.cdf(c, n, q*) and P(s_v >= c) <= binom.sf(c - 1, n, p*) exactly, for every
    data set; one Bonferroni correction over the 2k one-sided tests gives a valid p-value.  A value
    nobody holds sinks to q_released * n, below the floor when the release used a larger eps than
    declared (or a declared domain has an extra value); a common value rises above the ceiling
    when the release used a larger eps than that."""
    from scipy.stats import binom

    p, q, k = m.p_star, m.q_star, m.k
    name = (f"every category's support count lies between the floor Binomial(n, q*) and the ceiling "
            f"Binomial(n, p*) of {m.name} at eps {m.epsilon:g} with k = {k} (q* = {q:.4g}, p* = {p:.4g})")
    ref = "exact binomial bounds, one-sided, Bonferroni over 2k tests"
    s = np.asarray(s, dtype=np.int64)
    lo = binom.cdf(s, n, q)
    hi = binom.sf(s - 1, n, p)
    j = int(np.argmin(np.minimum(lo, hi)))
    pmin = float(min(lo[j], hi[j]))
    side = "below the floor" if lo[j] <= hi[j] else "above the ceiling"
    return [_result(name, "support-bounds", pmin, None, ref, min(1.0, 2 * k * pmin), alpha, rows, 0,
                    f"most extreme: category {m.categories[j]!r} supported by {int(s[j])} of {n} reports "
                    f"(floor mean {n * q:.1f}, ceiling mean {n * p:.1f}), one-sided p {pmin:.3g} {side}, "
                    f"x {2 * k} tests")]


class SupportBoundsFit(FitStats):
    """Any frequency oracle with p*, q* and a decoder summary (``summarize``,
    ``support_from_summary``); ``subset`` uses it as is: every report holds exactly m values
    (anything else is impossible: another subset size or another k), and the support counts obey
    the binomial floor and ceiling
    (``_support_bound_tests``).  A subset release's data-dependent distribution over C(k, m)
    outputs is too large for the hull test."""

    mechanism: Any   # a FrequencyOracle (categorical.py imports this module)

    def __init__(self, mechanism: Any) -> None:
        super().__init__(mechanism)
        self.stats["summary"] = np.zeros(mechanism.summary_size, dtype=np.int64)

    def _add(self, arrays: list[pa.Array]) -> None:
        m = self.mechanism
        self.stats["rows"] += len(arrays[0])
        self.stats["impossible"] += m.count_invalid(arrays)
        self.stats["summary"] += m.summarize(arrays)

    def _tests(self, alpha: float, good: int) -> list[FitResult]:
        m = self.mechanism
        s = m.support_from_summary(self.stats["summary"], good)
        return _support_bound_tests(m, s, good, alpha, self.rows)

    def results(self, alpha: float) -> list[FitResult]:
        n, bad = self.rows, self.impossible
        if bad:
            return [_impossible_result(f"every report is a valid {self.mechanism.name} report", "support-bounds",
                                       None, "any impossible report rejects", alpha, n, bad)] * self.TESTS
        if n < 1:
            return [_too_few("support bounds", "support-bounds", "exact binomial", alpha, n, "no reports")] * self.TESTS
        return self._tests(alpha, n)
