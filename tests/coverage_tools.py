"""Coverage of the 95% intervals of quantiles and range shares over repeated releases.

One harness for ``tests/test_coverage.py`` and ``benchmarks/bench_coverage.py``: for a route
(``hierarchy``, ``square-wave``, ``bins:<oracle>`` for each frequency oracle that takes a
binned column, or ``bins:auto`` for the oracle the tool picks), a data shape with known truth, a
row count n, an eps and R releases, it releases the same rows R times and counts how often each
interval holds the truth of those rows.

Release noise comes only from the keyed PRF (``ldptransform.random.KeyedStream``) under a FIXED
key, one nonce per release (the release number) and a label naming the route, shape, n and eps:
every run draws the same reports, so every figure is reproducible and every check deterministic.
numpy's seeded generator makes the synthetic input data only.

The truth of a quantile is the inverse of the rows' own CDF (``np.quantile(x, q,
method="inverted_cdf")``: the smallest value with at least a share q of the rows at or below it);
the truth of a range share is the share of rows with a <= value < b.

Shapes (each with its bounds, the bins a steward would give it under ``bins:``, and ranges of which
some have both ends on bucket edges and some have ends inside buckets):

* ``heavy-tail``: lognormal pay (median 35000, log-sd 0.8) clipped to [0, 160000] (about 3% of the
  rows at the upper bound);
* ``zeros``: 40% zeros, the rest lognormal (median 12, log-sd 0.7), clipped to [0, 64];
* ``counts``: negative binomial counts (mean 3.5, variance 11.7), clipped to [0, 32];
* ``pay``: smooth, mildly skewed pay (lognormal, median 50000, log-sd 0.45) clipped to
  [20000, 200000], cut into 16 equal bins: the one shape here on which rows do spread evenly
  inside buckets, and on which square-wave's smoothing is harmless;
* ``randhie``: ``mdvis`` (outpatient visits in a year: 31% zeros, a long tail to 77) of the RAND
  Health Insurance Experiment data shipped with statsmodels (``statsmodels.datasets.randhie``,
  20,190 rows, public domain), on [0, 80].  Its own rows at n = 20190; any other n draws that many
  rows from it with replacement (numpy seed fixed), whose truth is then that of the drawn rows.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ldptransform.distribution import Distribution, binned_distribution, frequency_covariance
from ldptransform.keys import SecretKey
from ldptransform.mechanisms import (
    CATEGORICAL,
    FrequencyOracle,
    Hierarchy,
    SquareWave,
    choose_categorical,
    make,
    registry,
)
from ldptransform.random import KeyedStream

KEY = SecretKey(bytes(range(112, 144)))        # the coverage studies' fixed key
STREAM = "coverage"
QUANTILES = (0.1, 0.25, 0.5, 0.75, 0.9)
QUANTILES_FULL = (0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9)
CONFIDENCE = 0.95
SW_REPLICATES = 100                            # bootstrap redraws per square-wave release


# -- data shapes ---------------------------------------------------------------------------

@dataclass(frozen=True)
class Shape:
    name: str
    bounds: tuple[float, float]
    bins: tuple[float, ...]
    ranges: tuple[tuple[float, float], ...]
    draw: Callable[[int, int], np.ndarray] = field(repr=False)
    about: str = ""

    def data(self, n: int, seed: int = 0) -> np.ndarray:
        return np.clip(self.draw(n, seed), *self.bounds).astype(float)


def _heavy_tail(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(1000 + seed).lognormal(math.log(35000.0), 0.8, n)


def _zeros(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(2000 + seed)
    return np.where(rng.random(n) < 0.4, 0.0, rng.lognormal(math.log(12.0), 0.7, n))


def _counts(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(3000 + seed).negative_binomial(1.5, 0.3, n).astype(float)


_RANDHIE: np.ndarray | None = None


def randhie_mdvis() -> np.ndarray:
    """``mdvis`` of statsmodels' RAND Health Insurance Experiment data (20,190 rows)."""
    global _RANDHIE
    if _RANDHIE is None:
        from statsmodels.datasets import randhie  # type: ignore[import-untyped]

        _RANDHIE = randhie.load_pandas().data["mdvis"].to_numpy(dtype=float)
    return _RANDHIE


def _pay(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(5000 + seed).lognormal(math.log(50000.0), 0.45, n)


def _randhie(n: int, seed: int) -> np.ndarray:
    x = randhie_mdvis()
    if n == x.size:
        return x.copy()
    return np.random.default_rng(4000 + seed).choice(x, size=n, replace=True)


SHAPES: dict[str, Shape] = {s.name: s for s in (
    Shape("heavy-tail", (0.0, 160000.0), (0, 10000, 20000, 30000, 40000, 60000, 80000, 120000, 160000),
          ((0.0, 20000.0), (40000.0, 80000.0), (1250.0, 33750.0), (26250.0, 51250.0)), _heavy_tail,
          "lognormal pay, median 35000, log-sd 0.8, clipped to [0, 160000]"),
    Shape("zeros", (0.0, 64.0), (0, 4, 8, 12, 16, 24, 32, 48, 64),
          ((0.0, 8.0), (16.0, 32.0), (0.5, 10.5), (13.5, 40.5)), _zeros,
          "40% zeros, the rest lognormal (median 12, log-sd 0.7), clipped to [0, 64]"),
    Shape("counts", (0.0, 32.0), (0, 1, 2, 3, 4, 5, 6, 8, 10, 12, 16, 20, 32),
          ((0.0, 1.0), (2.0, 6.0), (0.25, 3.75), (4.25, 9.25)), _counts,
          "negative binomial counts (r 1.5, p 0.3: mean 3.5), clipped to [0, 32]"),
    Shape("randhie", (0.0, 80.0), (0, 1, 2, 3, 4, 5, 6, 8, 10, 15, 20, 30, 80),
          ((0.0, 5.0), (5.0, 10.0), (0.5, 3.3), (6.6, 17.7)), _randhie,
          "mdvis of the RAND Health Insurance Experiment (statsmodels.datasets.randhie)"),
    Shape("pay", (20000.0, 200000.0), tuple(float(v) for v in np.linspace(20000, 200000, 17)),
          ((42500.0, 65000.0), (20000.0, 87500.0), (30000.0, 47000.0), (61000.0, 123000.0)), _pay,
          "lognormal pay, median 50000, log-sd 0.45, clipped to [20000, 200000]"),
)}


def truth(x: np.ndarray, quantiles: tuple[float, ...], ranges: tuple[tuple[float, float], ...]
          ) -> tuple[np.ndarray, np.ndarray]:
    """The rows' own quantiles (inverse of their CDF) and range shares (a <= value < b)."""
    q = np.array([float(np.quantile(x, p, method="inverted_cdf")) for p in quantiles])
    r = np.array([float(np.mean((x >= a) & (x < b))) for a, b in ranges])
    return q, r


# -- routes ----------------------------------------------------------------------------------

def binned_oracles() -> tuple[str, ...]:
    """Every registered frequency oracle that a numeric column released with ``bins:`` may use."""
    reg = registry()
    return tuple(n for n in CATEGORICAL if reg[n].accepts_binned)


def routes() -> tuple[str, ...]:
    return ("hierarchy", "square-wave") + tuple("bins:" + o for o in binned_oracles())


def words(label: str, release: int, n: int, per_row: int) -> np.ndarray:
    return KeyedStream(KEY, f"{release:032x}", STREAM, label).words(0, n, per_row)


def bin_codes(x: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Bin of each value, [e_j, e_j+1), the last bin closed (as the release bins a column)."""
    return np.clip(np.searchsorted(edges, x, side="right") - 1, 0, len(edges) - 2)


def binned_release(m: FrequencyOracle, codes: np.ndarray, edges: np.ndarray, w: np.ndarray) -> Distribution:
    """One release of bin codes through a frequency oracle, decoded as ``ldpt estimate`` decodes a
    binned column: unbiased bin shares, their covariance from the per-row co-support counts
    (``frequency_covariance``), ``binned_distribution``."""
    n = len(codes)
    S = m.support(m.randomize(codes, w)).astype(float)
    s = S.sum(axis=0)
    cov = frequency_covariance(m.p_star, m.q_star, n, s, S.T @ S)
    f = (s / n - m.q_star) / (m.p_star - m.q_star)
    prefix_se = np.sqrt(np.maximum(np.diag(np.cumsum(np.cumsum(cov, 0), 1)), 0.0))
    return binned_distribution(edges, f, prefix_se, cov=cov, n=n)


def route_mechanism(route: str, eps: float, bounds: tuple[float, float]) -> Hierarchy | SquareWave:
    """The mechanism of a distribution route as studied here: its default parameters."""
    if route == "hierarchy":
        return Hierarchy(eps, bounds)
    if route == "square-wave":
        return SquareWave(eps, bounds)
    raise ValueError(f"{route!r} is not a distribution mechanism route")


def releaser(route: str, shape: Shape, x: np.ndarray, eps: float, *, sw_replicates: int = SW_REPLICATES
             ) -> Callable[[int], Distribution]:
    """release number -> decoded Distribution of one release of the rows ``x`` on ``route``."""
    n = len(x)
    label = f"{route}/{shape.name}/{n}/{eps:g}"
    if route in ("hierarchy", "square-wave"):
        dm = route_mechanism(route, eps, shape.bounds)
        assert isinstance(dm, (Hierarchy, SquareWave))
        opts: dict[str, Any] = {"study_replicates": sw_replicates} if isinstance(dm, SquareWave) else {}

        def release_d(r: int) -> Distribution:
            arrays = dm.randomize(x, words(label, r, n, dm.words_per_row))
            st = dm.new_stats()
            dm.add_stats(st, arrays)
            return dm.decode(st, n, **opts)
        return release_d
    if route.startswith("bins:"):
        edges = np.asarray(shape.bins, dtype=float)
        codes = bin_codes(x, edges)
        cats = [str(i) for i in range(len(edges) - 1)]
        # "bins:auto": the oracle the tool picks for this k and eps (``choose_categorical``)
        m = choose_categorical(eps, cats)[0] if route == "bins:auto" else make(route[5:], "categorical", eps, cats)
        assert isinstance(m, FrequencyOracle)

        def release_b(r: int) -> Distribution:
            return binned_release(m, codes, edges, words(label, r, n, m.words_per_row))
        return release_b
    raise ValueError(f"unknown route {route!r}: one of {', '.join(routes())}")


# -- counting ---------------------------------------------------------------------------------

@dataclass
class Coverage:
    """Hits of the 95% intervals over ``releases`` releases of one configuration.

    ``q_hits[i]`` counts releases whose interval for ``quantiles[i]`` held the truth,
    ``q_half[i]`` those whose interval made half as wide (each side halved around the estimate)
    still did: the same for ranges.  ``r_edges[j]``: both ends of range j on bucket edges of this
    route's histogram.  ``q_methods``/``r_methods``: the distinct method texts of the intervals,
    ``d_methods`` those of the decoded distributions."""

    route: str
    shape: str
    n: int
    eps: float
    releases: int
    quantiles: tuple[float, ...]
    ranges: tuple[tuple[float, float], ...]
    q_hits: np.ndarray
    q_half: np.ndarray
    r_hits: np.ndarray
    r_half: np.ndarray
    r_edges: np.ndarray
    q_width: np.ndarray                      # mean interval width per quantile (column units)
    q_methods: set[str] = field(default_factory=set)
    r_methods: set[str] = field(default_factory=set)
    d_methods: set[str] = field(default_factory=set)
    seconds: float = 0.0

    @property
    def q_cover(self) -> np.ndarray:
        return self.q_hits / self.releases

    @property
    def r_cover(self) -> np.ndarray:
        return self.r_hits / self.releases

    def as_dict(self) -> dict[str, Any]:
        return {"route": self.route, "shape": self.shape, "n": self.n, "eps": self.eps, "releases": self.releases,
                "quantiles": list(self.quantiles), "q_cover": self.q_cover.tolist(),
                "q_half": (self.q_half / self.releases).tolist(), "ranges": [list(r) for r in self.ranges],
                "r_cover": self.r_cover.tolist(), "r_half": (self.r_half / self.releases).tolist(),
                "r_edges": self.r_edges.tolist(), "q_width": self.q_width.tolist(), "seconds": self.seconds}


def _held(lo: float, hi: float, est: float, t: float) -> tuple[bool, bool]:
    """(interval holds t, the interval halved on each side around the estimate holds t)."""
    full = lo <= t <= hi
    half = est - (est - lo) / 2 <= t <= est + (hi - est) / 2
    return full, half


def _on_edges(d: Distribution, a: float, b: float) -> bool:
    tol = 1e-12 * (d.hi - d.lo)
    return all(x <= d.lo or x >= d.hi or bool(np.any(np.abs(d.edges - x) <= tol)) for x in (a, b))


def measure(route: str, shape: Shape | str, n: int, eps: float, releases: int, *,
            quantiles: tuple[float, ...] = QUANTILES, first: int = 0, seed: int = 0,
            sw_replicates: int = SW_REPLICATES,
            reread: Callable[[Distribution], Distribution] | None = None) -> Coverage:
    """Coverage of one configuration: ``releases`` releases (nonces ``first`` ...) of the same
    ``n`` rows of ``shape`` (data seed ``seed``) on ``route`` at ``eps``.  ``reread``, if given,
    turns each decoded distribution into the one whose intervals are counted (for instance the
    same estimates read linearly within buckets)."""
    import time

    sh = SHAPES[shape] if isinstance(shape, str) else shape
    x = sh.data(n, seed)
    tq, tr = truth(x, quantiles, sh.ranges)
    release = releaser(route, sh, x, eps, sw_replicates=sw_replicates)
    nq, nr = len(quantiles), len(sh.ranges)
    cov = Coverage(route, sh.name, n, eps, releases, tuple(quantiles), sh.ranges,
                   np.zeros(nq, int), np.zeros(nq, int), np.zeros(nr, int), np.zeros(nr, int),
                   np.zeros(nr, bool), np.zeros(nq))
    t0 = time.perf_counter()
    for r in range(first, first + releases):
        d = release(r)
        if reread is not None:
            d = reread(d)
        cov.d_methods.add(d.method)
        for i, q in enumerate(quantiles):
            iv = d.quantile_ci(q, CONFIDENCE)
            full, half = _held(iv.lo, iv.hi, iv.estimate, tq[i])
            cov.q_hits[i] += full
            cov.q_half[i] += half
            cov.q_width[i] += (iv.hi - iv.lo) / releases
            cov.q_methods.add(iv.method)
        for j, (a, b) in enumerate(sh.ranges):
            iv = d.range_ci(a, b, CONFIDENCE)
            full, half = _held(iv.lo, iv.hi, iv.estimate, tr[j])
            cov.r_hits[j] += full
            cov.r_half[j] += half
            cov.r_methods.add(iv.method)
        cov.r_edges = np.array([_on_edges(d, a, b) for a, b in sh.ranges])
    cov.seconds = time.perf_counter() - t0
    return cov


def pooled(results: list[Coverage], what: str = "q", half: bool = False) -> tuple[float, int]:
    """(pooled coverage, number of releases behind it) of quantile (``"q"``) or range (``"r"``)
    intervals over several configurations: all hits over all (release, statistic) pairs."""
    hits = sum(int((c.q_half if half else c.q_hits).sum() if what == "q" else
                   (c.r_half if half else c.r_hits).sum()) for c in results)
    total = sum(c.releases * (len(c.quantiles) if what == "q" else len(c.ranges)) for c in results)
    return hits / total, sum(c.releases for c in results)


def tolerance(releases: int, level: float = CONFIDENCE, sigmas: float = 3.0) -> float:
    """Monte Carlo tolerance of a pooled coverage: ``sigmas`` binomial SEs of a coverage ``level``
    counted over ``releases`` releases only (the statistics of one release are correlated, so
    they are not counted as independent trials: a wider, safer tolerance)."""
    return sigmas * math.sqrt(level * (1 - level) / releases)
