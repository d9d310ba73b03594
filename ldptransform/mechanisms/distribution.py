"""Mechanisms for numeric distributions (CDF, quantiles, range shares): square wave and
hierarchical intervals.

Both take a bounded number (column units, already clipped to the bounds) and write reports
whose per-column sufficient statistics are integer count vectors (``new_stats``,
``add_stats``: additive across batches and files); ``decode(stats, n)`` turns them into a
``ldptransform.distribution.Distribution``.

* ``square-wave``: Z. Li, T. Wang, M. Lopuhaä-Zwakenberg, N. Li, B. Škorić, "Estimating
  Numerical Distributions under Local Differential Privacy", SIGMOD 2020.  The input is
  normalized to v in [0, 1] and rounded at random to the grid v_i = i/N (to v_i or v_{i+1},
  keeping E[v_i] = v), then reported on [-b, 1+b] with density p = e^eps/(2b e^eps + 1) within
  b of v_i and q = p/e^eps elsewhere, b = (eps e^eps - e^eps + 1)/(2 e^eps (e^eps - 1 - eps))
  (docs/formulas.md section 7.1).  The output is discretized exactly: the cell edges are every
  v_i - b and v_i + b, so each grid input's density is constant on every cell, a cell's
  probability is density x width, and eps holds cell by cell.  The channel is sampled as
  integer masses by exact comparison (``random.variates.integer_masses``/``draw_index``, the
  same sampler as the grid mechanisms).  The extract holds the index of the reported cell.
  Decoding: EMS (expectation maximization with smoothing, as in the paper) over the N+1 grid
  points, with the binomial kernel (1, 2, 1)/4 after every EM step.
* ``hierarchy``: G. Cormode, T. Kulkarni, D. Srivastava, "Answering Range Queries Under Local
  Differential Privacy", PVLDB 12(10), 2019.  A B-ary tree over D = B^h equal leaf buckets of
  the bounds; each row is assigned to one of the h levels (root excluded) by a PRF word alone
  (independent of the data, uniform), and reports its node at that level through a frequency
  oracle at the full eps: GRR or OLH, whichever has the lower total variance for that level's
  B^l nodes (``choose_categorical``'s criterion), or subset selection at its best size where
  its exact total variance is more than 1% below both (its report is B^l characters wide, so a
  near tie goes to the compact report; docs/formulas.md section 24).  OUE is left out: the
  words a row consumes are fixed across levels, and OUE needs one per node (256 per row at 256
  leaves) for a variance at most about 1% below OLH's (docs/formulas.md section 13).  Decoding: per level
  unbiased node shares from that level's rows, then constrained inference (M. Hay, V. Rastogi,
  G. Miklau, D. Suciu, "Boosting the Accuracy of Differentially Private Histograms Through
  Consistency", PVLDB 3(1), 2010, as restated by Cormode et al.): weighted averaging bottom
  up, then mean consistency top down, with each level weighted by its known per-node
  variance and the root fixed at 1.  The result is the generalized least-squares consistent
  tree (checked against a direct solve in the tests): linear, hence unbiased, with the exact
  covariance of the leaf shares propagated from the per-level covariances.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import replace
from fractions import Fraction
from functools import cached_property
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel, ConfigDict, Field

from ..distribution import Distribution, frequency_covariance
from ..errors import PolicyError
from ..random.variates import (
    SAMPLING_BITS,
    draw_index,
    guide_table,
    integer_masses,
    masses_ratio,
    sampling_table,
    to_below,
    to_unit,
)
from .base import DistributionMechanism, check_epsilon, register
from .categorical import GRR, HASH_PRIME, OLH, SupportSizeFit, _as_strings, strings_to_bits
from .fit import FitResult, FitStats, HullFit, SupportBoundsFit, _impossible_result
from .numeric import GridMechanismParams, check_bounds
from .subset import SubsetSelection

DEFAULT_SW_GRID = 256
MAX_SW_GRID = 4096          # (N+1) * 2^SAMPLING_BITS must stay below 2^63
DEFAULT_BRANCHING = 4
DEFAULT_LEAVES = 64          # lower median and range errors than 256 at eps 0.5-4 (benchmarks/README.md)
MAX_LEAVES = 1024           # the decoder keeps a nodes x nodes co-support matrix per OLH or subset level
SUBSET_MARGIN = 0.01        # a subset level must beat grr and olh by more than this (relative total variance)
_CHUNK_ELEMENTS = 1 << 22   # rows x nodes of subset reports handled at once
EMS_TOL = 1e-3              # stop EMS when the log-likelihood changes by less (nats, whole extract)
EMS_MAX_ITER = 10_000
BOOTSTRAP_LABEL = b"ldptransform/ems-bootstrap/v1"
SW_NO_INTERVAL = (
    "no interval: square-wave's EMS decoding smooths the distribution, and that bias cannot be bounded from "
    "the reports, so no interval can be stated that holds at its rate (the bootstrap intervals we measured "
    "around it held the truth in 94% of releases on smooth data but in 28-47% on columns with a spike at "
    "zero or with counts, and as rarely as 10% at the 10th percentile of a heavy tail); the estimate is a "
    "smoothed point estimate only. For intervals that hold whatever the shape, release the column with "
    "hierarchy or bins")


def square_wave_b(epsilon: float) -> float:
    """Half-width b of the square wave's high-density window (docs/formulas.md 7.1), written
    with expm1 so that it stays accurate for small eps."""
    em1 = math.expm1(epsilon)
    E = em1 + 1.0
    return (epsilon + epsilon * em1 - em1) / (2.0 * E * (em1 - epsilon))


class _SquareWaveChannel:
    """The exact cell structure of square wave on the grid v_i = i/N (normalized units).

    Cell j has width w_j; grid input i has density p on cells a_i <= j < z_i (its window
    [v_i - b, v_i + b]) and q elsewhere.  ``forward``/``back`` apply the channel and its
    transpose in O(N + M) per row with prefix sums (used by EMS).
    """

    def __init__(self, epsilon: float, N: int) -> None:
        b = square_wave_b(epsilon)
        E = math.exp(epsilon)
        i = np.arange(N + 1)
        # every edge is v_i + s b with s = -1 or +1; keep (i, s) so widths are differences of
        # exact expressions ((i' - i)/N + (s' - s) b) rather than of rounded positions
        ii = np.concatenate([i, i])
        ss = np.concatenate([-np.ones(N + 1), np.ones(N + 1)])
        val = ii / N + ss * b
        order = np.lexsort((ss, ii, val))
        ii, ss, val = ii[order], ss[order], val[order]
        width = np.maximum(np.diff(ii) / N + np.diff(ss) * b, 0.0)
        pos = np.empty(2 * (N + 1), dtype=np.int64)
        pos[order] = np.arange(2 * (N + 1))
        a_raw, z_raw = pos[: N + 1], pos[N + 1:]            # edge positions of each window
        keep = width > 0
        kept_before = np.concatenate([[0], np.cumsum(keep)])
        self.width = width[keep]
        self.a = kept_before[a_raw]
        self.z = kept_before[z_raw]
        left = val[:-1][keep]
        self.edges = np.concatenate([left, [val[-1]]])      # normalized units, [-b, 1 + b]
        self.edges[0], self.edges[-1] = -b, 1.0 + b
        self.N, self.M, self.b = N, int(keep.sum()), b
        self.p = E / (2 * b * E + 1)
        self.q = 1.0 / (2 * b * E + 1)

    def matrix(self) -> np.ndarray:
        """The float channel Q[i, j] (rows sum to 1 up to rounding, then renormalized)."""
        j = np.arange(self.M)
        inside = (j[None, :] >= self.a[:, None]) & (j[None, :] < self.z[:, None])
        Q = np.where(inside, self.p, self.q) * self.width[None, :]
        return Q / Q.sum(axis=1, keepdims=True)

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Output cell probabilities r = Q^T x for grid distributions x of shape (N+1, R)
        (one distribution per column), shape (M, R)."""
        D = np.zeros((self.M + 1, x.shape[1]))
        D[self.a] += x
        D[self.z] -= x
        inwin = np.cumsum(D[:-1], axis=0)
        inwin *= self.p - self.q
        inwin += self.q * x.sum(axis=0)
        inwin *= self.width[:, None]
        return inwin

    def back(self, rho: np.ndarray) -> np.ndarray:
        """Q rho for rho of shape (M, R): sum_j Q[i, j] rho_j, shape (N+1, R)."""
        C = np.zeros((self.M + 1, rho.shape[1]))
        np.cumsum(rho * self.width[:, None], axis=0, out=C[1:])
        out = C[self.z] - C[self.a]
        out *= self.p - self.q
        out += self.q * C[-1]
        return out


def _smooth(x: np.ndarray) -> np.ndarray:
    """Binomial kernel (1, 2, 1)/4 along the first axis, reflecting at both ends (keeps mass)."""
    y = 0.5 * x
    y[1:] += 0.25 * x[:-1]
    y[:-1] += 0.25 * x[1:]
    y[0] += 0.25 * x[0]
    y[-1] += 0.25 * x[-1]
    return y


def ems(chan: _SquareWaveChannel, counts: np.ndarray, tol: float = EMS_TOL,
        max_iter: int = EMS_MAX_ITER) -> np.ndarray:
    """EMS on the grid: counts of shape (R, M) -> grid distributions of shape (R, N+1).

    Start uniform; each step is one EM step x_i <- x_i sum_j Q[i,j] c_j / (n (xQ)_j), then the
    smoothing kernel, then renormalization; stop when the log-likelihood sum_j c_j ln (xQ)_j
    changes by less than ``tol`` (each row of ``counts`` on its own)."""
    c = np.ascontiguousarray(np.asarray(counts, dtype=float).T)      # (M, R): one column per run
    R = c.shape[1]
    n = c.sum(axis=0)
    x = np.full((chan.N + 1, R), 1.0 / (chan.N + 1))
    out = np.empty_like(x)
    active = np.arange(R)
    ll_prev = np.full(R, -np.inf)
    pos = c > 0
    for _ in range(max_iter):
        r = chan.forward(x)
        ll = np.where(pos, c * np.log(np.where(pos, r, 1.0)), 0.0).sum(axis=0)
        done = np.abs(ll - ll_prev) < tol
        if done.any():
            out[:, active[done]] = x[:, done]
            keep = ~done
            active, n, ll = active[keep], n[keep], ll[keep]
            x, c, r, pos = x[:, keep], c[:, keep], r[:, keep], pos[:, keep]
            if active.size == 0:
                break
        ll_prev = ll
        x = _smooth(x * chan.back(c / r) / n)
        x /= x.sum(axis=0)
    else:
        out[:, active] = x
    return np.ascontiguousarray(out.T)


@register
class SquareWave(DistributionMechanism):
    """Square wave (Li et al., SIGMOD 2020), exactly discretized; decoded by EMS."""

    name: ClassVar[str] = "square-wave"
    Params: ClassVar[type[BaseModel]] = GridMechanismParams
    no_interval: str | None = SW_NO_INTERVAL
    per_row_reason: ClassVar[str] = (
        "square-wave's reports are decoded by EMS, a smoothing reconstruction of the whole distribution that is "
        "not an average of per-row values, so no per-row column would be unbiased")

    def __init__(self, epsilon: float, bounds: Any, grid: int = DEFAULT_SW_GRID) -> None:
        self.epsilon = check_epsilon(epsilon, f"mechanism {self.name}")
        self.lo, self.hi = check_bounds(bounds, f"mechanism {self.name}")
        if isinstance(grid, bool) or not isinstance(grid, int) or not 1 <= grid <= MAX_SW_GRID:
            raise PolicyError(f"mechanism {self.name}: grid must be an integer from 1 to {MAX_SW_GRID}")
        self.grid = grid

    def to_spec(self) -> dict[str, Any]:
        return {"mechanism": self.name, "epsilon": self.epsilon, "bounds": [self.lo, self.hi], "grid": self.grid}

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> SquareWave:
        cls._check_family(spec)
        return cls(spec["epsilon"], spec["bounds"], spec.get("grid", DEFAULT_SW_GRID))

    # structure ----------------------------------------------------------------------------
    @cached_property
    def _chan(self) -> _SquareWaveChannel:
        return _SquareWaveChannel(self.epsilon, self.grid)

    @property
    def b(self) -> float:
        return self._chan.b

    @property
    def n_cells(self) -> int:
        return self._chan.M

    @cached_property
    def _integer_channel(self) -> np.ndarray:
        return integer_masses(self._chan.matrix(), self.epsilon)

    def channel(self) -> np.ndarray:
        """Exact P(cell j | grid input i) as realized by the sampler, shape (N+1, M)."""
        return self._integer_channel / float(1 << SAMPLING_BITS)

    @cached_property
    def _table(self) -> np.ndarray:
        return sampling_table(self._integer_channel)

    @cached_property
    def _guide(self) -> np.ndarray | None:
        return guide_table(self._table, self.n_cells)

    @property
    def inputs(self) -> np.ndarray:
        """The input grid in column units, shape (N+1,)."""
        return self.lo + np.arange(self.grid + 1) * ((self.hi - self.lo) / self.grid)

    @property
    def cell_edges(self) -> np.ndarray:
        """Output cell edges in column units, shape (M+1,), from lo - b(hi-lo) to hi + b(hi-lo)."""
        return self.lo + self._chan.edges * (self.hi - self.lo)

    # randomization --------------------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return 2

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.int32())]

    def output_meaning(self, field_name: str) -> str:
        return ("index j of the reported output cell of the square-wave channel (cells are numbered from 0 by "
                "position, from below the lower bound to above the upper; the mechanism spec rebuilds them); "
                "not an estimate of the row's value: decode the column's distribution with `ldpt estimate`")

    def randomize_index(self, x: np.ndarray, words: np.ndarray) -> np.ndarray:
        N = self.grid
        s = np.clip((np.asarray(x, dtype=float) - self.lo) * (N / (self.hi - self.lo)), 0.0, float(N))
        i0 = np.minimum(np.floor(s), N - 1).astype(np.int64)
        i = i0 + (to_unit(words[:, 0]) < s - i0)
        return draw_index(self._table, i, words[:, 1], self.n_cells, self._guide)

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return [pa.array(self.randomize_index(x, words).astype(np.int32))]

    def _indices(self, arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray]:
        v, bad = _integers(arrays[0], -1)
        bad |= (v < 0) | (v >= self.n_cells)
        return v, bad

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        return int(self._indices(arrays)[1].sum())

    # analysis ---------------------------------------------------------------------------------
    def max_log_ratio(self) -> float:
        Q = self.channel()
        with np.errstate(divide="ignore"):
            return float(np.max(np.log(Q.max(axis=0)) - np.log(Q.min(axis=0))))

    def realized_ratio(self) -> Fraction | None:
        """The exact worst ratio of the integer masses the sampler realizes (docs/formulas.md 10.4)."""
        return masses_ratio(self._integer_channel)

    def fit_test(self) -> HullFit:
        """The written cell indices against the hull of the exact channel."""
        def index(arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray]:
            v, bad = self._indices(arrays)
            return np.where(bad, 0, v), bad

        return HullFit(self, self.channel(), index, "reported cells (in order along the output range)")

    # decoding ---------------------------------------------------------------------------------
    def new_stats(self) -> np.ndarray:
        """Counts of reports per output cell, shape (M,), int64."""
        return np.zeros(self.n_cells, dtype=np.int64)

    def add_stats(self, stats: np.ndarray, arrays: list[pa.Array]) -> None:
        v, bad = self._indices(arrays)
        stats += np.bincount(v[~bad], minlength=self.n_cells)

    def grid_edges(self) -> np.ndarray:
        """Histogram edges of the decoded distribution (column units): each grid point's mass
        is spread over the half-step either side of it (half buckets at the bounds)."""
        h = (self.hi - self.lo) / self.grid
        mids = self.lo + (np.arange(self.grid) + 0.5) * h
        return np.concatenate([[self.lo], mids, [self.hi]])

    def decode(self, stats: np.ndarray, n: int, *, study_replicates: int | None = None) -> Distribution:
        """EMS reconstruction of the grid distribution, without intervals.

        EMS's smoothing bias cannot be bounded from the reports, and the parametric bootstrap
        around it (the only interval it has) was measured to miss the truth far more often than
        stated on skewed, spiky and count data, so the decoded distribution states no interval
        (``Distribution.no_interval``).  ``study_replicates`` is for the coverage study only
        (tests/test_coverage.py, benchmarks/bench_coverage.py): it attaches that bootstrap, so
        that the evidence for withholding it can be re-measured."""
        counts = np.asarray(stats, dtype=np.int64)
        if counts.shape != (self.n_cells,):
            raise ValueError("square-wave statistics must hold one count per output cell")
        if int(counts.sum()) != n:
            raise ValueError("square-wave statistics do not add up to the row count")
        edges = self.grid_edges()
        how = (f"square-wave reports (eps {self.epsilon:g}, grid {self.grid + 1} points) decoded by EMS: "
               "expectation maximization with (1,2,1)/4 smoothing, stopped when the log-likelihood gains less "
               f"than {EMS_TOL:g}; non-negative and smooth, biased toward smoothness (no unbiased SE)")
        if n == 0:
            return Distribution(edges, np.full(self.grid + 1, np.nan), method=how, n=0, centers=self.inputs)
        chan = self._chan
        x = ems(chan, counts[None, :])[0]
        if study_replicates is None:
            return Distribution(edges, x, method=how, n=n, centers=self.inputs, no_interval=self.no_interval)
        spec = json.dumps(self.to_spec(), sort_keys=True).encode()
        digest = hashlib.sha256(BOOTSTRAP_LABEL + spec + counts.astype("<i8").tobytes()).digest()
        seed = int.from_bytes(digest[:16], "big")
        replicates = int(study_replicates)

        def draw() -> np.ndarray:
            gen = np.random.Generator(np.random.Philox(key=seed))
            r = chan.forward(x[:, None])[:, 0]
            r = np.maximum(r, 0.0)
            r /= r.sum()
            sims = gen.multinomial(n, r, size=replicates).astype(float)
            return ems(chan, sims)

        rep = (f"{replicates} redraws of the output counts as multinomial(n, channel x estimate), each "
               "re-decoded by EMS; analysis randomness from numpy's Philox keyed by a SHA-256 hash of the "
               "statistics and the spec (coverage study only: these intervals do not hold on data that is "
               "not smooth)")
        return Distribution(edges, x, method=how, n=n, centers=self.inputs, replicates=draw, replicate_method=rep)


def _integers(a: pa.Array, fill: int) -> tuple[np.ndarray, np.ndarray]:
    """An extract column of whole numbers -> (int64 values, mask of nulls and non-integers).
    Floats holding whole numbers are accepted (a CSV round trip through another tool)."""
    if isinstance(a, pa.ChunkedArray):
        a = a.combine_chunks()
    n = len(a)
    if pa.types.is_integer(a.type):
        null = np.asarray(pc.is_null(a).to_numpy(zero_copy_only=False))
        return np.asarray(pc.fill_null(pc.cast(a, pa.int64()), fill).to_numpy(zero_copy_only=False)), null
    if pa.types.is_floating(a.type):
        f = np.asarray(pc.fill_null(pc.cast(a, pa.float64()), np.nan).to_numpy(zero_copy_only=False))
        bad = ~np.isfinite(f) | (f != np.floor(f)) | (np.abs(f) >= 2.0 ** 62)
        return np.where(bad, fill, f).astype(np.int64), bad
    return np.full(n, fill, dtype=np.int64), np.ones(n, dtype=bool)


class HierarchyParams(BaseModel):
    """Policy fields of ``hierarchy``: the tree's branching factor and number of leaves."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    branching: int | None = Field(None, description="branching factor of the tree (default 4)")
    leaves: int | None = Field(None, description="number of equal leaf buckets of the bounds, a power of branching "
                                                 "(default 64)")


# GRR, OLH or subset (Any: the levels' callers choose what to call by the oracle's name, which mypy cannot narrow)
def _level_oracle(epsilon: float, k: int, name: str | None = None, hash_range: int | None = None,
                  subset_size: int | None = None) -> Any:
    """The oracle of a level of k nodes.  Without a name, the tool's choice (docs/formulas.md
    section 24): GRR or OLH, whichever has the lower exact total variance (a tie to GRR), unless
    subset selection at its best size has a total variance more than SUBSET_MARGIN (1%) below
    that one's: its report is k characters wide, so a near tie goes to the compact report."""
    cats = [str(v) for v in range(k)]
    if name is None:
        grr, olh = GRR(epsilon, cats), OLH(epsilon, cats)
        best = grr if grr.total_variance() <= olh.total_variance() * (1 + 1e-9) else olh
        sub = SubsetSelection(epsilon, cats)
        return sub if sub.total_variance() * (1 + SUBSET_MARGIN) < best.total_variance() else best
    if name == "grr":
        return GRR(epsilon, cats)
    if name == "subset":
        return SubsetSelection(epsilon, cats, subset_size)
    return OLH(epsilon, cats, hash_range)


def _bits_to_level_strings(n: int, parts: list[tuple[np.ndarray, np.ndarray]]) -> pa.Array:
    """The ``<col>__subset`` column: row r of ``rows`` gets its k-character '0'/'1' string from
    ``bits`` (per subset level: (rows, (len(rows), k) booleans)), every other row a null.
    Built from buffers (offsets, characters, validity), without a Python loop over rows."""
    lengths = np.zeros(n, dtype=np.int64)
    for rows, bits in parts:
        lengths[rows] = bits.shape[1]
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    data = np.empty(int(offsets[-1]), dtype=np.uint8)
    for rows, bits in parts:
        k = bits.shape[1]
        pos = offsets[rows][:, None] + np.arange(k)[None, :]
        data[pos] = bits.astype(np.uint8) + np.uint8(48)
    valid = np.packbits(lengths > 0, bitorder="little")
    if offsets[-1] < (1 << 31) - 1:
        return pa.StringArray.from_buffers(n, pa.py_buffer(offsets.astype(np.int32).tobytes()),
                                           pa.py_buffer(data.tobytes()), pa.py_buffer(valid.tobytes()))
    return pa.LargeStringArray.from_buffers(n, pa.py_buffer(offsets.tobytes()), pa.py_buffer(data.tobytes()),
                                            pa.py_buffer(valid.tobytes()))


@register
class Hierarchy(DistributionMechanism):
    """Hierarchical intervals (Cormode, Kulkarni, Srivastava, PVLDB 2019) with consistency."""

    name: ClassVar[str] = "hierarchy"
    Params: ClassVar[type[BaseModel]] = HierarchyParams
    per_row_reason: ClassVar[str] = (
        "hierarchy's reports are decoded level by level (each row reports one level of the tree) and then made "
        "consistent across the levels with weights that depend on how many rows each level got, so its "
        "estimates are not averages of one value per row")
    field_refusals: ClassVar[dict[str, str]] = {
        "grid": "grid does not apply to mechanism hierarchy (its buckets are set by leaves)"}

    def __init__(self, epsilon: float, bounds: Any, branching: int = DEFAULT_BRANCHING,
                 leaves: int = DEFAULT_LEAVES, levels: list[dict[str, Any]] | None = None) -> None:
        self.epsilon = check_epsilon(epsilon, f"mechanism {self.name}")
        self.lo, self.hi = check_bounds(bounds, f"mechanism {self.name}")
        if isinstance(branching, bool) or not isinstance(branching, int) or not 2 <= branching <= 16:
            raise PolicyError(f"mechanism {self.name}: branching must be an integer from 2 to 16")
        if isinstance(leaves, bool) or not isinstance(leaves, int) or not branching <= leaves <= MAX_LEAVES:
            raise PolicyError(f"mechanism {self.name}: leaves must be an integer from branching to {MAX_LEAVES}")
        h = round(math.log(leaves, branching))
        if branching ** h != leaves:
            powers = [branching ** j for j in range(1, 12) if branching ** j <= MAX_LEAVES]
            raise PolicyError(f"mechanism {self.name}: leaves must be a power of branching ({branching}): "
                              f"one of {', '.join(map(str, powers))}")
        self.branching, self.leaves, self.height = branching, leaves, h
        if levels is None:
            self.oracles = [_level_oracle(self.epsilon, branching ** (l + 1)) for l in range(h)]
        else:
            if not isinstance(levels, list) or len(levels) != h:
                raise PolicyError(f"mechanism {self.name}: levels must list {h} levels")
            self.oracles = []
            for l, lev in enumerate(levels):
                k = branching ** (l + 1)
                if (not isinstance(lev, dict) or lev.get("nodes") != k
                        or lev.get("oracle") not in ("grr", "olh", "subset")):
                    raise PolicyError(f"mechanism {self.name}: level {l + 1} must be "
                                      f"{{nodes: {k}, oracle: grr|olh|subset}}")
                if lev["oracle"] == "subset" and "subset_size" not in lev:
                    raise PolicyError(f"mechanism {self.name}: level {l + 1} has oracle subset and needs its "
                                      f"subset_size (a whole number from 1 to {k - 1})")
                self.oracles.append(_level_oracle(self.epsilon, k, lev["oracle"], lev.get("hash_range"),
                                                  lev.get("subset_size")))

    def to_spec(self) -> dict[str, Any]:
        levels = []
        for o in self.oracles:
            lev: dict[str, Any] = {"nodes": o.k, "oracle": o.name}
            if o.name == "olh":
                lev["hash_range"] = o.g
            elif o.name == "subset":
                lev["subset_size"] = o.m
            levels.append(lev)
        return {"mechanism": self.name, "epsilon": self.epsilon, "bounds": [self.lo, self.hi],
                "branching": self.branching, "leaves": self.leaves, "levels": levels}

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> Hierarchy:
        cls._check_family(spec)
        return cls(spec["epsilon"], spec["bounds"], spec.get("branching", DEFAULT_BRANCHING),
                   spec.get("leaves", DEFAULT_LEAVES), spec.get("levels"))

    @property
    def nodes(self) -> list[int]:
        """Nodes per level, levels 1..h (root excluded)."""
        return [o.k for o in self.oracles]

    @property
    def _has_olh(self) -> bool:
        return any(o.name == "olh" for o in self.oracles)

    @property
    def _has_subset(self) -> bool:
        return any(o.name == "subset" for o in self.oracles)

    @property
    def _subset_field(self) -> int:
        """Position of ``<col>__subset`` among the output fields: second, after the level, so that
        the last field (report or hash) is never null on a reported row (the readers take a null
        last field for a row that did not report the column, under strategy sample)."""
        return 1

    @property
    def _report_field(self) -> int:
        return 2 if self._has_subset else 1

    # randomization ----------------------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        """Word 0 draws the level; the level's oracle reads words 1.. (grr 2, olh 4, subset 1 +
        min(m, k - m)); every row takes the most any level needs, so the count is fixed."""
        return 1 + max([4 if self._has_olh else 2] + [o.words_per_row for o in self.oracles if o.name == "subset"])

    @property
    def output_bytes_per_row(self) -> int:
        """A subset level's report is as wide as its nodes (the release slices wide reports by this)."""
        if not self._has_subset:
            return 8
        return 24 + max(o.k for o in self.oracles if o.name == "subset")

    def output_fields(self, column: str) -> list[pa.Field]:
        fields = [pa.field(column + "__level", pa.int8())]
        if self._has_subset:
            fields.append(pa.field(column + "__subset", pa.string()))
        fields.append(pa.field(column, pa.int32()))
        if self._has_olh:
            fields.append(pa.field(column + "__hash", pa.int64()))
        return fields

    def output_meaning(self, field_name: str) -> str:
        if field_name.endswith("__level"):
            return "tree level (1 = coarsest) this row reports; drawn from the keyed PRF, independent of the data"
        if field_name.endswith("__hash"):
            return ("public hash seed a*P+b of this row (P = 2^31-1) on levels reported by olh; 0 on grr and "
                    "subset levels" if self._has_subset else
                    "public hash seed a*P+b of this row (P = 2^31-1) on levels reported by olh; 0 on grr levels")
        if field_name.endswith("__subset"):
            return ("reported subset of the nodes on levels reported by subset: character j is 1 if node j of that "
                    "level is in the row's randomized subset (exactly the level's subset_size ones); empty on "
                    "other levels")
        if self._has_subset:
            return ("reported node of that level: the node index (grr levels) or the reported hash bucket (olh "
                    "levels), 0 on subset levels; see the mechanism spec's levels")
        return ("reported node of that level: the node index (grr levels) or the reported hash bucket (olh "
                "levels); see the mechanism spec's levels")

    def leaf_of(self, x: np.ndarray) -> np.ndarray:
        """Leaf bucket of each value: [lo + j w, lo + (j+1) w), the last one closed."""
        s = np.floor((np.asarray(x, dtype=float) - self.lo) * (self.leaves / (self.hi - self.lo)))
        return np.clip(s, 0, self.leaves - 1).astype(np.int64)

    # a missing flag beside the value (missing: as-answer; mechanisms/missing.py) -----------------
    supports_missing_flag: ClassVar[bool] = True

    def bucket_of(self, x: np.ndarray) -> np.ndarray:
        return self.leaf_of(x)

    def flag_cross_covariance(self, groups: list[tuple[np.ndarray, float]], n: int) -> np.ndarray:
        """Cov(decoded leaves, mean of u) (base.DistributionMechanism).  The leaves are linear in
        the level estimates, est_l = mean over the level's rows of w_i = (S_i - q*)/(p* - q*), with
        the data-independent maps d leaves / d est_l of ``decode``; rows are independent, so
        Cov(est_l, mean u) = (the sample covariance of w_i and u_i over the level's rows) / n, and
        the sums it needs are the support counts of the rows of each group times u_g."""
        total = sum(st for st, _ in groups)
        counts = [int(c) for c in np.asarray(total)[: self.height]]
        prec = self.level_weights(counts)
        out = np.zeros(self.leaves)
        for lvl, (o, (soff, k, _, _)) in enumerate(zip(self.oracles, self._layout)):
            nl = counts[lvl]
            if nl < 2:
                continue
            p, q = o.p_star, o.q_star
            sw, swu, su = np.zeros(k), np.zeros(k), 0.0
            for st, u in groups:
                w_sum = (np.asarray(st[soff: soff + k], dtype=float) - q * float(st[lvl])) / (p - q)
                sw += w_sum
                swu += u * w_sum
                su += u * float(st[lvl])
            cov_l = (swu - sw * su / nl) / (nl - 1)
            basis = [np.eye(k) if j == lvl else np.zeros((kj, k)) for j, kj in enumerate(self.nodes)]
            out += self.consistent(basis, np.zeros(k), prec) @ cov_l / n
        return out

    def assign_levels(self, words: np.ndarray) -> np.ndarray:
        """Level (1..h) of each row, from its first PRF word only: independent of the data."""
        return to_below(words[:, 0], self.height) + 1

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        n = len(x)
        leaf = self.leaf_of(x)
        level = self.assign_levels(words)
        report = np.zeros(n, dtype=np.int64)
        seeds = np.zeros(n, dtype=np.int64)
        subsets: list[tuple[np.ndarray, np.ndarray]] = []
        for l, o in enumerate(self.oracles):
            rows = np.flatnonzero(level == l + 1)
            if rows.size == 0:
                continue
            node = leaf[rows] // (self.branching ** (self.height - l - 1))
            w = words[rows]
            if o.name == "grr":
                report[rows] = o.randomize_codes(node, w[:, 1:3])
            elif o.name == "subset":   # subset.py's exact sampler on words 1 .. 1 + min(m, k - m)
                subsets.append((rows, o.randomize_bits(node, w[:, 1: 1 + o.words_per_row])))
            else:
                s_arr, y_arr = o.randomize(node, w[:, 1:5])
                seeds[rows] = s_arr.to_numpy()
                report[rows] = y_arr.to_numpy()
        out = [pa.array(level.astype(np.int8))]
        if self._has_subset:
            out.append(_bits_to_level_strings(n, subsets))
        out.append(pa.array(report.astype(np.int32)))
        if self._has_olh:
            out.append(pa.array(seeds))  # 0 on grr and subset levels (a seed is at least 2^31 - 1): no nulls
        return out

    def _subset_chunks(self, arrays: list[pa.Array], level: np.ndarray, l: int,
                       ok: np.ndarray | None = None) -> Any:
        """Yield (rows, bits, bad) over the rows of subset level l+1 (those with ``ok``, if
        given), in chunks of at most 2^22 characters: bits the (rows, k) booleans of the
        reported subsets, bad the rows that are not k '0'/'1' characters with m ones."""
        o = self.oracles[l]
        at = level == l + 1
        if ok is not None:
            at &= ok
        rows = np.flatnonzero(at)
        arr = arrays[self._subset_field]
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        step = max(1, _CHUNK_ELEMENTS // o.k)
        for s in range(0, rows.size, step):
            r = rows[s: s + step]
            part = arr.take(pa.array(r))
            if pa.types.is_integer(part.type):   # a CSV reader that dropped the leading zeros
                part = pc.utf8_lpad(pc.cast(part, pa.string()), width=o.k, padding="0")
            bits, bad = strings_to_bits(_as_strings(part), o.k)
            bad |= np.count_nonzero(bits, axis=1) != o.m
            bits[bad] = False
            yield r, bits, bad

    def _parse(self, arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(level, report, seed, bad) as numpy arrays; bad marks rows outside the alphabet (a
        null anywhere, a level out of range, a report beyond its level's alphabet, a seed that
        is not 0 on a grr or subset level or not a valid hash seed on an olh level; with subset
        levels, a report that is not 0 on them, a subset that is not null or empty on the other
        levels, or not k characters '0'/'1' with the level's subset_size ones on its own)."""
        level, lnull = _integers(arrays[0], 0)
        report, rnull = _integers(arrays[self._report_field], -1)
        bad = lnull | rnull | (level < 1) | (level > self.height) | (report < 0)
        if self._has_olh:
            seed, snull = _integers(arrays[self._report_field + 1], -1)
            bad |= snull
        else:
            seed = np.zeros(len(level), dtype=np.int64)
        sub_level = np.zeros(len(level), dtype=bool)
        for l, o in enumerate(self.oracles):
            at = level == l + 1
            if o.name == "grr":
                bad |= at & ((report >= o.k) | (self._has_olh & (seed != 0)))
            elif o.name == "subset":
                sub_level |= at
                bad |= at & ((report != 0) | (self._has_olh & (seed != 0)))
            else:
                bad |= at & ((report >= o.g) | (seed < HASH_PRIME) | (seed >= HASH_PRIME * HASH_PRIME))
        if self._has_subset:
            arr = arrays[self._subset_field]
            if isinstance(arr, pa.ChunkedArray):
                arr = arr.combine_chunks()
            if pa.types.is_integer(arr.type):
                present = np.asarray(pc.is_valid(arr).to_numpy(zero_copy_only=False))
            else:
                text = _as_strings(arr)
                present = np.asarray(pc.fill_null(pc.binary_length(text), 0).to_numpy(zero_copy_only=False)) > 0
            bad |= ~sub_level & present
            for l, o in enumerate(self.oracles):
                if o.name == "subset":
                    for r, _, b in self._subset_chunks(arrays, level, l):
                        bad[r] |= b
        return level, report, seed, bad

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        return int(self._parse(arrays)[3].sum())

    # empirical audit (audit.py) ---------------------------------------------------------------
    def audit_ordered(self) -> bool:
        return False

    def audit_outcomes(self, arrays: list[pa.Array], pair: tuple[Any, Any]) -> np.ndarray:
        """What a report says about the pair (a, b) of values: its level, and whether it supports
        the node of a and the node of b on that level (the reported node for grr levels, the hash
        bucket of the node for olh levels, membership in the reported subset for subset levels);
        malformed rows are one outcome of their own."""
        level, report, seed, bad = self._parse(arrays)
        leaf = self.leaf_of(np.array([float(pair[0]), float(pair[1])]))
        code = np.full(len(level), 4 * self.height, dtype=np.int64)
        for l, o in enumerate(self.oracles):
            at = np.flatnonzero((level == l + 1) & ~bad)
            node = leaf // (self.branching ** (self.height - l - 1))
            if o.name == "grr":
                sa, sb = report[at] == node[0], report[at] == node[1]
            elif o.name == "subset":
                sa, sb = np.zeros(at.size, dtype=bool), np.zeros(at.size, dtype=bool)
                for r, bits, _ in self._subset_chunks(arrays, level, l, ~bad):
                    i = np.searchsorted(at, r)
                    sa[i], sb[i] = bits[:, node[0]], bits[:, node[1]]
            else:
                seeds = seed[at].astype(np.uint64)
                sa = o.hash_values(seeds, np.full(at.size, node[0], dtype=np.uint64)) == report[at]
                sb = o.hash_values(seeds, np.full(at.size, node[1], dtype=np.uint64)) == report[at]
            code[at] = 4 * l + 2 * sa.astype(np.int64) + sb
        labels = [f"level {l + 1}, {s}" for l in range(self.height)
                  for s in ("supports neither", "supports b only", "supports a only", "supports both")]
        return np.array(labels + ["malformed report"], dtype=object)[code]

    # analysis ---------------------------------------------------------------------------------
    def max_log_ratio(self) -> float:
        """The level is independent of the data and each level's oracle is exactly eps-LDP
        (its own ``max_log_ratio``); the row's channel is a mixture over levels with the
        level written out, so its worst ratio is the worst level's."""
        return max(o.max_log_ratio() for o in self.oracles)

    def realized_ratio(self) -> Fraction | None:
        """The worst level oracle's exact realized ratio (grr and olh sample with integer
        thresholds, subset gives an exact rational upper bound of its own; the level is drawn
        independently of the data and written out)."""
        ratios = [o.realized_ratio() for o in self.oracles]
        return None if any(r is None for r in ratios) else max(ratios)

    def fit_test(self) -> HierarchyFit:
        """Each level's rows tested as that level's oracle."""
        return HierarchyFit(self)

    # decoding ---------------------------------------------------------------------------------
    @cached_property
    def _offsets(self) -> tuple[list[tuple[int, int, int, int]], int]:
        """Per level (support offset, k, co-support offset or -1, co-support size); total size."""
        off = self.height
        out = []
        for o in self.oracles:
            out.append([off, o.k, -1, 0])
            off += o.k
        for rec, o in zip(out, self.oracles):
            if o.name in ("olh", "subset"):
                rec[2], rec[3] = off, o.k * o.k
                off += o.k * o.k
        return [(a, b, c, d) for a, b, c, d in out], off

    @property
    def _layout(self) -> list[tuple[int, int, int, int]]:
        return self._offsets[0]

    @property
    def stats_size(self) -> int:
        return self._offsets[1]

    def new_stats(self) -> np.ndarray:
        """int64 vector: rows per level (h), then per level the support count of each node,
        then for OLH and subset levels the node x node co-support counts (flattened)."""
        return np.zeros(self.stats_size, dtype=np.int64)

    def add_stats(self, stats: np.ndarray, arrays: list[pa.Array]) -> None:
        level, report, seed, bad = self._parse(arrays)
        for l, (o, (soff, k, coff, _)) in enumerate(zip(self.oracles, self._layout)):
            rows = np.flatnonzero((level == l + 1) & ~bad)
            stats[l] += rows.size
            if rows.size == 0:
                continue
            y = report[rows]
            if o.name == "grr":
                stats[soff: soff + k] += np.bincount(y, minlength=k)[:k]
                continue
            if o.name == "subset":
                co = np.zeros((k, k))
                for _, bits, _ in self._subset_chunks(arrays, level, l, ~bad):
                    stats[soff: soff + k] += bits.sum(axis=0, dtype=np.int64)
                    step = max(1, min(8192, (1 << 22) // k))  # float32 sums of 0/1 below 2^24 are exact
                    for s in range(0, len(bits), step):
                        Sf = bits[s: s + step].astype(np.float32)
                        co += (Sf.T @ Sf).astype(np.float64)
                stats[coff: coff + k * k] += np.rint(co).astype(np.int64).ravel()
                continue
            seeds = seed[rows].astype(np.uint64)
            v = np.arange(k, dtype=np.uint64)
            co = np.zeros((k, k))
            step = max(1, min(8192, (1 << 22) // k))  # float32 sums of 0/1 below 2^24 are exact
            for s in range(0, rows.size, step):
                S = o.hash_values(seeds[s: s + step, None], v[None, :]) == y[s: s + step, None]
                stats[soff: soff + k] += S.sum(axis=0)
                Sf = S.astype(np.float32)
                co += (Sf.T @ Sf).astype(np.float64)
            stats[coff: coff + k * k] += np.rint(co).astype(np.int64).ravel()

    def level_estimates(self, stats: np.ndarray) -> list[tuple[int, np.ndarray, np.ndarray]]:
        """Per level: (rows, unbiased node shares, their covariance matrix)."""
        out = []
        for l, (o, (soff, k, coff, csize)) in enumerate(zip(self.oracles, self._layout)):
            nl = int(stats[l])
            s = stats[soff: soff + k].astype(float)
            co = None if coff < 0 else stats[coff: coff + csize].astype(float).reshape(k, k)
            p, q = o.p_star, o.q_star
            if nl == 0:
                out.append((0, np.zeros(k), np.full((k, k), np.nan)))
                continue
            est = (s / nl - q) / (p - q)
            out.append((nl, est, frequency_covariance(p, q, nl, s, co)))
        return out

    def level_weights(self, counts: list[int]) -> np.ndarray:
        """Precision 1/sigma_l^2 of one node share at level l (known, data-independent):
        n_l (p*-q*)^2 / (q*(1-q*)), the oracle's approximate per-node variance (0 for a
        level with fewer than 2 rows)."""
        return np.array([nl / o.approx_variance() if nl > 1 else 0.0 for o, nl in zip(self.oracles, counts)])

    def consistent(self, ys: list[np.ndarray], root: np.ndarray, prec: np.ndarray) -> np.ndarray:
        """Constrained inference on the tree: ys[l] of shape (B^(l+1), m) (m columns at
        once), the root's value per column (shape (m,)), per-level precisions.  Returns the
        consistent leaves, shape (D, m): weighted averaging bottom up, mean consistency top down."""
        B, h = self.branching, self.height
        z: list[np.ndarray] = [np.zeros_like(y) for y in ys]
        P = np.zeros(h)                         # precision of each node's combined estimate
        z[h - 1] = ys[h - 1] * (prec[h - 1] > 0)
        P[h - 1] = prec[h - 1]
        for l in range(h - 2, -1, -1):
            cs = z[l + 1].reshape(B ** (l + 1), B, -1).sum(axis=1)
            pc_ = P[l + 1] / B                  # precision of a sum of B children
            P[l] = prec[l] + pc_
            if P[l] > 0:
                z[l] = (prec[l] * ys[l] + pc_ * cs) / P[l]
        parent = np.asarray(root, dtype=float)[None, :]
        for l in range(h):
            k_par = B ** l
            cs = z[l].reshape(k_par, B, -1).sum(axis=1)
            adj = (parent - cs) / B
            parent = z[l] + np.repeat(adj, B, axis=0)
        return parent

    @property
    def _oracle_names(self) -> str:
        return "/".join(f"subset of {o.m}" if o.name == "subset" else o.name for o in self.oracles)

    def decode(self, stats: np.ndarray, n: int) -> Distribution:
        stats = np.asarray(stats, dtype=np.int64)
        if stats.shape != (self.stats_size,):
            raise ValueError("hierarchy statistics have the wrong length for this mechanism")
        counts = [int(c) for c in stats[: self.height]]
        if sum(counts) != n:
            raise ValueError("hierarchy statistics do not add up to the row count")
        edges = np.linspace(self.lo, self.hi, self.leaves + 1)
        how = (f"hierarchy reports (eps {self.epsilon:g}, branching {self.branching}, {self.leaves} leaves, "
               f"{self.height} levels, oracles {self._oracle_names}): unbiased node shares per "
               "level, then weighted constrained inference (consistent tree, root = 1); unbiased, may be "
               "negative in places; intervals hold whatever the shape inside a leaf (measured coverage of "
               "95% intervals on skewed, zero-spiked and count data, 20,000 and 200,000 rows, eps 0.5-4: "
               "99-100% for quantiles and for ranges with an end inside a leaf, which are conservative, and "
               "95-96% for ranges between leaf edges)")
        if min(counts) < 2:
            # a level with (almost) no rows leaves part of the tree unestimated: no answer
            return Distribution(edges, np.full(self.leaves, np.nan), method=how + "; too few rows on some level",
                                n=n)
        lev = self.level_estimates(stats)
        prec = self.level_weights(counts)
        ys = [e[:, None] for _, e, _ in lev]
        leaves = self.consistent(ys, np.ones(1), prec)[:, 0]
        cov = np.zeros((self.leaves, self.leaves))
        for l, (_, _, C) in enumerate(lev):
            basis = [np.eye(k) if j == l else np.zeros((k, self.nodes[l])) for j, k in enumerate(self.nodes)]
            L = self.consistent(basis, np.zeros(self.nodes[l]), prec)   # (D, k_l): d leaves / d y_l
            cov += L @ C @ L.T
        return Distribution(edges, leaves, method=how, n=n, cov=cov)


# -- goodness of fit (mechanisms/fit.py) ---------------------------------------------------------

class HierarchyFit(FitStats):
    """``hierarchy``: each level's rows are tested as that level's oracle (grr: hull; olh:
    support size and buckets; subset: the support counts' binomial bounds).  The level itself
    is drawn from the PRF alone."""

    mechanism: Hierarchy

    @property
    def n_tests(self) -> int:
        return sum(p.n_tests for p in self.parts)

    def __init__(self, mechanism: Hierarchy) -> None:
        super().__init__(mechanism)
        self.parts: list[HullFit | SupportSizeFit | SupportBoundsFit] = []
        for o in mechanism.oracles:
            if o.name == "grr":
                self.parts.append(HullFit(o, o.channel(), lambda a: (np.zeros(0), np.zeros(0, bool)),
                                          "reported nodes"))
            elif o.name == "subset":
                self.parts.append(SupportBoundsFit(o))
            else:
                self.parts.append(SupportSizeFit(o))

    def _add(self, arrays: list[pa.Array]) -> None:
        m = self.mechanism
        level, report, seed, bad = m._parse(arrays)
        self.stats["rows"] += len(level)
        self.stats["impossible"] += int(bad.sum())
        for l, part in enumerate(self.parts):
            at = (level == l + 1) & ~bad
            if isinstance(part, HullFit):
                part.add_indices(report[at], np.zeros(int(at.sum()), dtype=bool))
            elif isinstance(part, SupportBoundsFit):   # the level's valid subsets, as subset's summary
                part.stats["rows"] += int(at.sum())
                for _, bits, _ in m._subset_chunks(arrays, level, l, ~bad):
                    part.stats["summary"] += bits.sum(axis=0, dtype=np.int64)
            else:
                part.add_decoded(seed[at].astype(np.uint64), report[at], np.zeros(int(at.sum()), dtype=bool))

    def _merge_parts(self, other: FitStats) -> None:
        assert isinstance(other, HierarchyFit)
        for a, b in zip(self.parts, other.parts):
            for k, v in b.stats.items():
                a.stats[k] = a.stats[k] + v

    def results(self, alpha: float) -> list[FitResult]:
        m = self.mechanism
        n, bad = self.rows, self.impossible
        out = []
        for l, part in enumerate(self.parts):
            for r in part.results(alpha):
                r = replace(r, test=f"level {l + 1} of {m.height} ({m.nodes[l]} nodes): " + r.test)
                r = r.with_extra(level=l + 1)
                if bad:
                    imp = _impossible_result(r.test, r.kind, r.df, r.reference, alpha, n, bad)
                    r = replace(imp, extra={**r.extra, **imp.extra})
                out.append(r)
        return out
