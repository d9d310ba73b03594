"""Bounded numeric mechanisms for means: two-point, piecewise and hybrid.

All three are built as one ``GridMechanism``: the input x in [lo, hi] is normalized to
t in [-1, 1] and rounded at random to the grid t_i = -1 + 2i/N (to t_i or t_{i+1} with
probabilities that keep E[t_i] = t), then sent through a finite channel Q[i, j] whose
output values o_j satisfy sum_j Q[i, j] o_j = t_i exactly.  Random rounding is a mixture
of two channels, so it keeps the eps bound and unbiasedness for every t in [-1, 1].
The channel is held as whole-number masses in units of 2^-50 and sampled by exact integer
comparison with the top 50 bits of a PRF word, so ``channel()`` is exactly the realized
channel and its eps bound is checked on what is actually sampled (the masses differ from
the real-valued channel by at most a few units, i.e. a mean error below 1e-11).

* two-point: J. C. Duchi, M. I. Jordan, M. J. Wainwright, "Minimax Optimal Procedures for
  Locally Private Estimation", JASA 2018.  Output +-C with C = (e^eps+1)/(e^eps-1) and
  P(+C | t) = 1/2 + t (e^eps-1)/(2(e^eps+1)), which is exactly random rounding to {-1, 1}
  followed by binary randomized response, so N = 1.
* piecewise: N. Wang, X. Xiao, Y. Yang, J. Zhao, S. C. Hui, H. Shin, J. Shin, G. Yu,
  "Collecting and Analyzing Multidimensional Data with Local Differential Privacy",
  ICDE 2019.  The continuous output on [-C, C] (C = (e^(eps/2)+1)/(e^(eps/2)-1)) is
  discretized exactly: the cell boundaries are every window end l(t_i), r(t_i) of every
  grid input, so the density is constant on each cell for every grid input, the cell's
  probability is density x width, and reporting the cell midpoint keeps the estimator
  exactly unbiased.  The eps bound holds cell by cell (each cell's mass is a mixture of
  high and low density with ratio e^eps).
* hybrid: the same paper; with probability alpha run piecewise, else two-point, with
  alpha = 1 - e^(-eps/2) for eps > 0.61 and alpha = 0 otherwise (the paper's rule, the
  threshold value 0.61 as docs/formulas.md section 5.3 restates it).

The value written to the extract is lo + (o_j + 1)(hi - lo)/2: the per-row unbiased
estimate of x in the column's own units.
"""

from __future__ import annotations

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
    SAMPLING_BITS,
    draw_index,
    exp_lower_bound,
    grr_thresholds,
    guide_table,
    integer_masses,
    masses_ratio,
    sampling_table,
    to_unit,
    words_below,
)
from .base import MeanMechanism, NoParams, certified_epsilon, check_epsilon, register
from .fit import HullFit

DEFAULT_GRID = 256
HYBRID_THRESHOLD = 0.61
# The channel is sampled by the integer-mass sampler of random/variates.py (masses in units of
# 2^-SAMPLING_BITS, 50 bits): its threshold table (N+1) * 2^50 stays below 2^63 for every
# allowed grid (N <= 4096).


def check_bounds(bounds: Any, where: str) -> tuple[float, float]:
    try:
        lo, hi = (float(b) for b in bounds)
    except (TypeError, ValueError):
        raise PolicyError(f"{where}: bounds must be two numbers [low, high], got {bounds!r}") from None
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise PolicyError(f"{where}: bounds must be finite numbers, got {bounds!r}")
    if lo >= hi:
        raise PolicyError(f"{where}: bounds low ({lo:g}) must be below high ({hi:g})")
    return lo, hi


def sorted_position(alpha: np.ndarray, vals: np.ndarray, per_item: int = 4) -> np.ndarray:
    """``np.searchsorted(alpha, vals)`` (side left) for a sorted float alphabet, computed with a
    guide over equal slices of [alpha[0], alpha[-1]] and a few vectorized steps: one look-up per
    value instead of a binary search with random memory access.  Exactly the same result for
    every value, NaN and infinities included (they take the binary search)."""
    n = len(alpha)
    vals = np.asarray(vals, dtype=float)
    if n < 16 or vals.size < 1024 or not (alpha[-1] > alpha[0]):
        return np.searchsorted(alpha, vals)
    lo, hi = float(alpha[0]), float(alpha[-1])
    B = per_item * n
    scale = B / (hi - lo)
    guide = np.searchsorted(alpha, lo + np.arange(B + 1) / scale)
    t = (vals - lo) * scale
    inside = (t >= 0) & (t < B)  # False for NaN and values outside: binary search below
    out = np.empty(vals.shape, dtype=np.int64)
    out[~inside] = np.searchsorted(alpha, vals[~inside])
    k = np.flatnonzero(inside)
    v = vals[k]
    pos = guide[t[k].astype(np.int64)]
    # the slice's start may round either way: step back while alpha[pos - 1] >= v, then forward
    back = np.flatnonzero((pos > 0) & (alpha[np.maximum(pos - 1, 0)] >= v))
    while back.size:
        pos[back] -= 1
        back = back[(pos[back] > 0) & (alpha[np.maximum(pos[back] - 1, 0)] >= v[back])]
    fwd = np.flatnonzero((pos < n) & (alpha[np.minimum(pos, n - 1)] < v))
    while fwd.size:
        pos[fwd] += 1
        fwd = fwd[(pos[fwd] < n) & (alpha[np.minimum(pos[fwd], n - 1)] < v[fwd])]
    out[k] = pos
    return out


def normalize(x: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Column units -> t in [-1, 1] (values outside the bounds are clipped)."""
    return np.clip((np.asarray(x, dtype=float) - lo) * (2.0 / (hi - lo)) - 1.0, -1.0, 1.0)


def grid_position(x: np.ndarray, lo: float, hi: float, grid: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Where x falls on a grid of ``grid`` steps over [lo, hi]: (t, i0, frac) with t the normalized
    value, i0 the lower grid index (0..grid-1) and frac in [0, 1] the share of the way to i0 + 1.
    Unbiased random rounding goes up with probability frac (every grid mechanism and
    discrete-laplace round this way)."""
    t = normalize(x, lo, hi)
    s = (t + 1.0) * (grid / 2.0)
    i0 = np.minimum(np.floor(s), grid - 1).astype(np.int64)
    return t, i0, s - i0


class GridMechanismParams(BaseModel):
    """Policy fields of a grid mechanism: the input grid (default 256 steps)."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    grid: Annotated[int, Field(strict=True)] | None = Field(
        None, description="input grid size (default 256)")


class GridMechanism(MeanMechanism):
    """Shared implementation; subclasses provide the grid size and the channel."""

    Params: ClassVar[type[BaseModel]] = GridMechanismParams

    def __init__(self, epsilon: float, bounds: Any, grid: int = DEFAULT_GRID) -> None:
        self.epsilon = check_epsilon(epsilon, f"mechanism {self.name}")
        self.lo, self.hi = check_bounds(bounds, f"mechanism {self.name}")
        if isinstance(grid, bool) or not isinstance(grid, int) or not 1 <= grid <= 4096:
            raise PolicyError(f"mechanism {self.name}: grid must be an integer from 1 to 4096, got {grid!r}")
        self.grid = grid

    def to_spec(self) -> dict[str, Any]:
        return {"mechanism": self.name, "epsilon": self.epsilon, "bounds": [self.lo, self.hi], "grid": self.grid}

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> GridMechanism:
        cls._check_family(spec)
        return cls(spec["epsilon"], spec["bounds"], spec.get("grid", DEFAULT_GRID))

    # structure -------------------------------------------------------------------
    @cached_property
    def inputs(self) -> np.ndarray:
        """Input grid in normalized units, shape (N+1,)."""
        return np.linspace(-1.0, 1.0, self.grid + 1)

    def _channel(self) -> tuple[np.ndarray, np.ndarray]:
        """(output values o of shape (M,), channel Q of shape (N+1, M)); subclasses."""
        raise NotImplementedError

    @cached_property
    def _structure(self) -> tuple[np.ndarray, np.ndarray]:
        outs, Q = self._channel()
        order = np.argsort(outs, kind="stable")
        return outs[order], Q[:, order]

    @property
    def outputs(self) -> np.ndarray:
        """Output alphabet in normalized units, sorted, shape (M,)."""
        return self._structure[0]

    @cached_property
    def _integer_channel(self) -> np.ndarray:
        """The channel as masses in units of 2^-SAMPLING_BITS: exactly what ``randomize_index``
        realizes (see ``integer_masses``)."""
        return integer_masses(self._structure[1], self.epsilon)

    def channel(self) -> np.ndarray:
        """Exact P(output j | grid input i) as realized by the sampler, shape (N+1, M)."""
        return self._integer_channel / float(1 << SAMPLING_BITS)

    @cached_property
    def output_values(self) -> np.ndarray:
        """Output alphabet in the column's own units."""
        return self.to_units(self.outputs)

    def to_units(self, t: np.ndarray) -> np.ndarray:
        return self.lo + (np.asarray(t) + 1.0) * ((self.hi - self.lo) / 2.0)

    def normalize(self, x: np.ndarray) -> np.ndarray:
        return normalize(x, self.lo, self.hi)

    @cached_property
    def _sampling_table(self) -> np.ndarray:
        """Row i's integer cumulative masses offset by i * 2^SAMPLING_BITS, flattened (int64)."""
        return sampling_table(self._integer_channel)

    @cached_property
    def _guide(self) -> np.ndarray | None:
        return guide_table(self._sampling_table, self.outputs.shape[0])

    # randomization ---------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return 2

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.float64())]

    def output_meaning(self, field_name: str) -> str:
        return "randomized value; on average equal to the true value (per-row unbiased estimate, column units)"

    def randomize_index(self, x: np.ndarray, words: np.ndarray) -> np.ndarray:
        """Index into ``outputs`` for each input value x (column units, within bounds)."""
        _, i0, frac = grid_position(x, self.lo, self.hi, self.grid)
        i = i0 + (to_unit(words[:, 0]) < frac)
        return draw_index(self._sampling_table, i, words[:, 1], self.outputs.shape[0], self._guide)

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return [pa.array(self.output_values[self.randomize_index(x, words)])]

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        arr = arrays[0]
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if not (pa.types.is_floating(arr.type) or pa.types.is_integer(arr.type)):
            return len(arr)
        vals = pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False)
        ok = np.isfinite(vals)
        alpha = self.output_values
        idx = np.clip(sorted_position(alpha, vals), 1, len(alpha) - 1)
        near = np.minimum(np.abs(vals - alpha[idx - 1]), np.abs(vals - alpha[idx]))
        tol = 1e-9 * (self.hi - self.lo)
        return int((~ok | ~(np.nan_to_num(near, nan=np.inf) <= tol)).sum())

    # analysis --------------------------------------------------------------------
    def _threshold_ratio(self) -> Fraction | None:
        """The exact worst ratio of the integer masses the sampler realizes (``masses_ratio``,
        docs/formulas.md section 10.4); a composite's is the base class's (both layers)."""
        return masses_ratio(self._integer_channel)

    def max_log_ratio(self) -> float:
        Q = self.channel()
        used = Q.max(axis=0) > 0  # an output no input can produce reveals nothing
        with np.errstate(divide="ignore"):
            return float(np.max(np.log(Q.max(axis=0)[used]) - np.log(Q.min(axis=0)[used])))

    def second_moments(self) -> np.ndarray:
        return self.channel() @ (self.outputs ** 2)

    def variance(self, x: np.ndarray | float) -> np.ndarray:
        """Exact Var of one report (column units) for true value(s) x, random rounding included."""
        t, i0, lam = grid_position(np.atleast_1d(np.asarray(x, dtype=float)), self.lo, self.hi, self.grid)
        S = self.second_moments()
        var_t = (1 - lam) * S[i0] + lam * S[i0 + 1] - t ** 2
        out = var_t * ((self.hi - self.lo) / 2.0) ** 2
        return out if np.ndim(x) else out[0]

    def worst_variance(self) -> float:
        """Largest Var of one report over the whole domain (column units), random rounding
        included: on each grid interval the variance is linear minus t^2, maximized in closed form."""
        S = self.second_moments()
        t = self.inputs
        ta, tb, Sa, Sb = t[:-1], t[1:], S[:-1], S[1:]
        slope = (Sb - Sa) / (tb - ta)
        tstar = np.clip(slope / 2.0, ta, tb)
        vals = Sa + slope * (tstar - ta) - tstar ** 2
        return float(np.max(vals)) * ((self.hi - self.lo) / 2.0) ** 2

    def mean_row_variance(self) -> float:
        """Worst case over data of n * Var of the mean as ``ldpt estimate`` reports it: data split
        evenly between the bounds, where the second moment of a report (largest at the ends of
        the grid) is largest; column units squared."""
        half = (self.hi - self.lo) / 2.0
        return float(np.max(self.second_moments())) * half * half

    def fit_test(self) -> HullFit:
        """The written values, mapped onto the output alphabet, against the hull of the channel
        (random rounding to the grid is part of the channel)."""
        m = self
        alpha = m.output_values
        tol = 1e-9 * (m.hi - m.lo)       # as GridMechanism.count_invalid

        def index(arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray]:
            arr = arrays[0]
            if not (pa.types.is_floating(arr.type) or pa.types.is_integer(arr.type)):
                return np.zeros(len(arr), dtype=np.int64), np.ones(len(arr), dtype=bool)
            vals = np.asarray(pc.fill_null(pc.cast(arr, pa.float64()), np.nan).to_numpy(zero_copy_only=False))
            if len(alpha) == 1:
                idx = np.zeros(len(vals), dtype=np.int64)
            else:
                i = np.clip(sorted_position(alpha, vals), 1, len(alpha) - 1)
                left = np.abs(vals - alpha[i - 1]) <= np.abs(vals - alpha[i])
                idx = np.where(left, i - 1, i)
            near = np.abs(vals - alpha[idx])
            bad = ~(np.nan_to_num(near, nan=np.inf) <= tol)
            return idx.astype(np.int64), bad

        return HullFit(m, m.channel(), index, "written values (output alphabet, in increasing order)")


def _two_point_channel(eps: float, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    e = math.exp(eps)
    C = (e + 1) / (e - 1)
    p_plus = 0.5 + t * (e - 1) / (2 * (e + 1))
    return np.array([-C, C]), np.stack([1 - p_plus, p_plus], axis=1)


def _piecewise_channel(eps: float, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    a = math.exp(eps / 2)
    E = math.exp(eps)
    C = (a + 1) / (a - 1)
    high = (E - a) / (2 * a + 2)
    low = high / E
    left = (C + 1) / 2 * t - (C - 1) / 2
    right = left + C - 1
    pts = np.concatenate([[-C, C], left, right])
    pts = np.unique(np.clip(pts, -C, C))
    # merge breakpoints closer than float noise
    keep = np.concatenate([[True], np.diff(pts) > 1e-12 * C])
    pts = pts[keep]
    pts[-1] = C
    lo_edge, hi_edge = pts[:-1], pts[1:]
    mids = (lo_edge + hi_edge) / 2
    width = hi_edge - lo_edge
    inside = (mids[None, :] >= left[:, None]) & (mids[None, :] <= right[:, None])
    Q = np.where(inside, high, low) * width[None, :]
    Q /= Q.sum(axis=1, keepdims=True)  # exact up to rounding; removes float drift
    return mids, Q


@register
class TwoPoint(GridMechanism):
    """Bounded two-point mechanism (Duchi, Jordan, Wainwright 2018): report +-C."""

    name: ClassVar[str] = "two-point"
    Params: ClassVar[type[BaseModel]] = NoParams
    field_refusals: ClassVar[dict[str, str]] = {
        "grid": "two-point has no input grid (it reports one of two values); remove grid"}

    def __init__(self, epsilon: float, bounds: Any, grid: int = 1) -> None:
        super().__init__(epsilon, bounds, 1)

    def to_spec(self) -> dict[str, Any]:
        return self._layer_spec({"mechanism": self.name, "epsilon": self.epsilon, "bounds": [self.lo, self.hi]})

    def _channel(self) -> tuple[np.ndarray, np.ndarray]:
        return _two_point_channel(self.epsilon, self.inputs)

    # second layer (memoized columns; docs/formulas.md section 9.3) ---------------------------
    supports_second_layer: ClassVar[bool] = True

    @property
    def second_layer_words_per_row(self) -> int:
        return 1

    @staticmethod
    def second_layer_thresholds(epsilon2: float) -> tuple[int, int]:
        """(Lk, Lf), Lk + Lf = 2^64: binary randomized response at eps2 on the sign of the permanent
        report, kept w.p. Lk / 2^64 (``grr_thresholds`` with two outputs, rounded toward privacy:
        Lk / Lf <= e^eps2, so the layer alone is eps2-LDP)."""
        return grr_thresholds(exp_lower_bound(float(epsilon2)), 2)

    def _composite_masses(self, epsilon2: float) -> list[list[int]]:
        """The composite channel as exact integer masses (units of 2^-(50+64)), rows the grid
        inputs t = -1, 1, columns the outputs -C', +C': M[i][o] Lk + M[i][1-o] Lf."""
        M = [[int(v) for v in row] for row in self._integer_channel]
        Lk, Lf = self.second_layer_thresholds(epsilon2)
        return [[M[i][o] * Lk + M[i][1 - o] * Lf for o in range(2)] for i in range(2)]

    def second_layer_ratio(self, epsilon2: float) -> Fraction:
        """The exact worst likelihood ratio of the composite over its two outputs."""
        C = self._composite_masses(epsilon2)
        return max(Fraction(max(C[0][o], C[1][o]), min(C[0][o], C[1][o])) for o in range(2))

    def composite_epsilon(self, epsilon2: float) -> float:
        """Two-point with slope s = P(+C | t=1) - P(+C | t=-1), then the sign kept w.p. r:
        P'(+ | t) - 1/2 = (2r - 1)(P(+ | t) - 1/2), two-point with slope s' = (2r - 1) s; a two-point
        mechanism's slope is tanh(eps/2), so tanh(eps'/2) = (2r - 1) tanh(eps/2).  Stated from the
        exact ratio of the realized masses (``second_layer_ratio``), as the smallest float whose
        certified e^eps' is at least it."""
        return certified_epsilon(self.second_layer_ratio(epsilon2))

    def rerandomize(self, reports: list[pa.Array], words: np.ndarray, epsilon2: float) -> list[pa.Array]:
        """The sign of the permanent report kept when the row's word is below Lk, else flipped,
        written as the composite's value +-C' = +-(e^eps'+1)/(e^eps'-1) (the output alphabet of
        two-point at eps', normalized units): the row's unbiased estimate under the composite."""
        arr = reports[0]
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        vals = np.asarray(pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False))
        plus = vals > (self.lo + self.hi) / 2.0
        keep = words_below(words[:, 0], self.second_layer_thresholds(epsilon2)[0])
        alphabet = self.to_units(_two_point_channel(self.composite_epsilon(epsilon2), self.inputs)[0])
        return [pa.array(alphabet[np.where(keep, plus, ~plus).astype(np.int64)])]

@register
class Piecewise(GridMechanism):
    """Piecewise mechanism (Wang et al., ICDE 2019), exactly discretized."""

    name: ClassVar[str] = "piecewise"

    def _channel(self) -> tuple[np.ndarray, np.ndarray]:
        return _piecewise_channel(self.epsilon, self.inputs)


@register
class Hybrid(GridMechanism):
    """Hybrid mechanism (Wang et al., ICDE 2019): piecewise w.p. alpha, else two-point."""

    name: ClassVar[str] = "hybrid"

    @property
    def alpha(self) -> float:
        return 1 - math.exp(-self.epsilon / 2) if self.epsilon > HYBRID_THRESHOLD else 0.0

    def _channel(self) -> tuple[np.ndarray, np.ndarray]:
        o1, Q1 = _piecewise_channel(self.epsilon, self.inputs)
        o2, Q2 = _two_point_channel(self.epsilon, self.inputs)
        al = self.alpha
        outs = np.concatenate([o1, o2])
        Q = np.concatenate([al * Q1, (1 - al) * Q2], axis=1)
        if al == 0.0:
            return o2, Q2
        return outs, Q
