"""Discrete Laplace (two-sided geometric) noise on a declared grid, for means.

For stewards who must follow a Laplace-based convention.  The column's bounds [lo, hi]
are divided into G equal steps (``grid``).  A value is first rounded at random,
unbiasedly, to one of its two neighbouring grid points (exactly as the grid mechanisms of
``numeric.py`` do: one PRF word, ``to_unit(word) < frac``), giving an index i in 0..G.
The report is y = i + Z, where Z is two-sided geometric noise

    P(Z = z) = (1 - a) / (1 + a) * a^|z|,   a = exp(-eps / G),   z any integer,

the discrete analogue of Laplace noise (A. Ghosh, T. Roughgarden, M. Sundararajan,
"Universally Utility-Maximizing Privacy Mechanisms", STOC 2009 / SIAM J. Comput. 2012;
docs/formulas.md section 10.2).  Any two grid inputs are at most G apart, so for every
output y, P(y | i) / P(y | i') = a^(|y-i'| - |y-i|) <= a^-G = e^eps: the channel is
exactly eps-LDP, and random rounding (a mixture of two such channels) keeps it so.  The
written value lo + y * (hi - lo) / G (float64, column units) is the per-row unbiased
estimate of the value; it may fall outside [lo, hi], which is what keeps it unbiased.
Var(Z) = 2a / (1 - a)^2 (docs/formulas.md section 10.2, [D]); a report's variance adds the
rounding variance frac * (1 - frac) (both in grid steps, times the step squared).

Exact sampling, integer arithmetic only (C. L. Canonne, G. Kamath, T. Steinke, "The
Discrete Gaussian for Differential Privacy", NeurIPS 2020; docs/formulas.md section 10.3).
No floating-point logarithm or exponential is used to sample (I. Mironov, "On
Significance of the Least Significant Bits for Differential Privacy", CCS 2012):

* eps is taken as the exact rational its decimal text denotes, ``Fraction(repr(eps))``:
  a policy's 0.7 means 7/10 (not the binary double nearest 0.7), so eps / G = s / t in
  lowest terms with integers s, t.  The channel realized is exactly the one above with
  a = exp(-s/t), and ``max_log_ratio()`` is exactly G * s / t = the decimal eps.  The
  sampler needs s, t < 2^48; an eps written with too many decimal digits (for instance
  0.30000000000000004) is refused with a message.
* uniform integers below m: a 64-bit word w is accepted if w < floor(2^64 / m) * m and
  then reduced mod m, else a fresh word is drawn (exactly uniform, no modulo bias).
* Bernoulli(exp(-gamma)), gamma = num / den in [0, 1]: K = 1; repeat { draw
  A ~ Bernoulli(gamma / K) as [uniform below den*K] < num; if A = 0 stop; K += 1 };
  return K odd.
* Z: repeat { U uniform below t; if Bernoulli(exp(-U/t)) = 0 restart; V = number of
  successes of Bernoulli(exp(-1)) before the first failure; Y = floor((U + t V) / s);
  B uniform bit; if B = 1 and Y = 0 restart; Z = (1 - 2B) Y }.

The samplers themselves are variates (``random.variates``: ``RowDraws``, ``uniform_below``,
``bernoulli_exp``, ``discrete_laplace``); this module chooses s, t and the grid.  The loops
need an unbounded number of words per row, so the mechanism is driven by
``randomize_with(x, words, draw)``: ``words`` is the usual fixed block (words_per_row = 2;
word 0 drives the rounding stage, word 1 is reserved and unused), and
``draw(local_rows, draw_indices)`` returns one word per (row, draw index) pair (the
release passes ``lambda r, j: stream.words_at(row0 + r, j)``, see ``random.bits.KeyedStream``).
Every row keeps its own draw counter starting at 0 and walks the sequential algorithm
above, so its result depends only on its own words, never on the other rows of the
batch or on batch boundaries.  The loops are vectorized: each round processes all rows
still pending at that step at once.
"""

from __future__ import annotations

import math
from fractions import Fraction
from typing import Any, ClassVar, overload

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel

from ..errors import PolicyError
from ..random.variates import Draw, RowDraws, discrete_laplace, to_unit
from .base import MeanMechanism, register
from .fit import HullFit
from .numeric import DEFAULT_GRID, GridMechanismParams, grid_position

MAX_GRID = 4096
DL_TAIL = 1e-9              # fit test: lattice cells kept until each tail holds below this
# s and t (eps / G = s / t in lowest terms) must stay below this so that every product the
# sampler forms fits 64-bit integers: den * K < 2^64 for K < 2^16 in the Bernoulli loop.
RATIONAL_LIMIT = 1 << 48


# -- the mechanism ----------------------------------------------------------------------

def _fail(field: str, problem: str, fix: str) -> PolicyError:
    return PolicyError(f"mechanism discrete-laplace, field '{field}': {problem}. {fix}")


@register
class DiscreteLaplace(MeanMechanism):
    """Random rounding to a grid of G steps, then two-sided geometric noise with
    P(Z = z) proportional to exp(-|z| eps / G); exactly eps-LDP; unbiased per row."""

    name: ClassVar[str] = "discrete-laplace"
    variable_draws: ClassVar[bool] = True
    Params: ClassVar[type[BaseModel]] = GridMechanismParams
    exact_decimal_epsilon: ClassVar[bool] = True

    def __init__(self, epsilon: float, bounds: Any, grid: int = DEFAULT_GRID) -> None:
        if (isinstance(epsilon, bool) or not isinstance(epsilon, (int, float))
                or not math.isfinite(epsilon) or epsilon <= 0):
            raise _fail("epsilon", f"epsilon must be a positive finite number, got {epsilon!r}",
                        "Give the privacy budget of this column as a positive decimal number, e.g. 1.0.")
        self.epsilon = float(epsilon)
        try:
            lo, hi = (float(b) for b in bounds)
        except (TypeError, ValueError):
            raise _fail("bounds", f"bounds must be two numbers [low, high], got {bounds!r}",
                        "Declare the column's range as a list of two numbers, e.g. bounds: [0, 100].") from None
        if not (math.isfinite(lo) and math.isfinite(hi)) or not lo < hi or not math.isfinite(hi - lo):
            raise _fail("bounds", f"bounds must be finite numbers with low below high, got {bounds!r}",
                        "Declare a finite range [low, high] with low < high that covers the column's values.")
        self.lo, self.hi = lo, hi
        if isinstance(grid, bool) or not isinstance(grid, int) or not 1 <= grid <= MAX_GRID:
            raise _fail("grid", f"grid must be an integer from 1 to {MAX_GRID}, got {grid!r}",
                        f"Set grid to the number of equal steps the bounds are divided into, or leave it "
                        f"out for the default {DEFAULT_GRID}.")
        self.grid = grid
        # The exact rational the decimal text of eps denotes (repr of a Python float is its
        # shortest round-tripping decimal, so a policy's 0.7 gives 7/10).
        self.epsilon_exact = Fraction(repr(self.epsilon))
        ratio = self.epsilon_exact / grid
        self.s, self.t = ratio.numerator, ratio.denominator
        if self.s >= RATIONAL_LIMIT or self.t >= RATIONAL_LIMIT:
            raise _fail("epsilon", f"the exact value of epsilon/grid, read from epsilon's decimal text "
                        f"({repr(self.epsilon)}) with grid {grid}, is a fraction whose numerator or denominator "
                        "exceeds 2^48, beyond what the exact sampler handles",
                        "Write epsilon with fewer significant digits (for example 0.3 rather than "
                        "0.30000000000000004, or 0.333 rather than 0.3333333333333333).")

    # -- spec ----------------------------------------------------------------------------
    def to_spec(self) -> dict[str, Any]:
        return {"mechanism": self.name, "epsilon": self.epsilon, "bounds": [self.lo, self.hi], "grid": self.grid}

    @classmethod
    def from_spec(cls, spec: dict[str, Any]) -> DiscreteLaplace:
        cls._check_family(spec)
        missing = [f for f in ("epsilon", "bounds") if f not in spec]
        if missing:
            raise _fail(missing[0], "the spec lacks this field",
                        "Give epsilon and bounds (and optionally grid) for a discrete-laplace column.")
        return cls(spec["epsilon"], spec["bounds"], spec.get("grid", DEFAULT_GRID))

    # -- structure -----------------------------------------------------------------------
    @property
    def step(self) -> float:
        """Width of one grid step in column units, (hi - lo) / G."""
        return (self.hi - self.lo) / self.grid

    @property
    def noise_rate(self) -> float:
        """eps / G = s / t as a float (analysis only; the sampler uses the integers s, t)."""
        return self.s / self.t

    @property
    def a(self) -> float:
        """a = exp(-eps/G), the geometric ratio of the noise pmf (analysis only)."""
        return math.exp(-self.noise_rate)

    @overload
    def pmf(self, z: int) -> float:
        ...

    @overload
    def pmf(self, z: np.ndarray) -> np.ndarray:
        ...

    def pmf(self, z: np.ndarray | int) -> np.ndarray | float:
        """Exact target P(Z = z) = (1-a)/(1+a) * a^|z| (evaluated in float64; (1-a)/(1+a) is
        computed as tanh(eps/(2G)) to keep precision for small eps/G)."""
        x = self.noise_rate
        out = math.tanh(x / 2) * np.exp(-np.abs(np.asarray(z, dtype=float)) * x)
        return out if np.ndim(z) else float(out)

    def report_pmf(self, y: np.ndarray, i: np.ndarray | int) -> np.ndarray:
        """Exact channel from grid index i (0..G) to report y (integer grid units): pmf(y - i)."""
        return np.asarray(self.pmf(np.asarray(y) - np.asarray(i)))

    def noise_variance(self) -> float:
        """Var(Z) = 2a / (1-a)^2 in grid steps (docs/formulas.md section 10.2, [D])."""
        x = self.noise_rate
        return 2.0 * math.exp(-x) / math.expm1(-x) ** 2

    def _position(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Lower grid index i0 (0..G-1) and fraction in [0, 1] of x, as GridMechanism rounds."""
        _, i0, frac = grid_position(x, self.lo, self.hi, self.grid)
        return i0, frac

    # -- randomization -------------------------------------------------------------------
    @property
    def words_per_row(self) -> int:
        return 2

    def output_fields(self, column: str) -> list[pa.Field]:
        return [pa.field(column, pa.float64())]

    def output_meaning(self, field_name: str) -> str:
        return ("randomized value on the grid lower bound + j * step (j any integer: values may fall outside the "
                "bounds); on average equal to the true value (per-row unbiased estimate, column units)")

    def grid_index(self, x: np.ndarray, word0: np.ndarray) -> np.ndarray:
        """Unbiased random rounding of x (column units) to a grid index 0..G, one word per row
        (the first stage of ``GridMechanism.randomize_index``)."""
        i0, frac = self._position(x)
        return i0 + (to_unit(np.asarray(word0)) < frac)

    def sample_noise(self, n: int, draw: Draw) -> np.ndarray:
        """Z for rows 0..n-1 (int64), each row drawing words draw(row, 0), draw(row, 1), ..."""
        return discrete_laplace(RowDraws(n, draw), n, self.s, self.t)

    def randomize(self, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        raise TypeError("mechanism discrete-laplace needs an unbounded number of random words per row "
                        "(exact rejection sampling); call randomize_with(x, words, draw) with a draw function "
                        "such as lambda r, j: stream.words_at(row0 + r, j)")

    def randomize_with(self, x: np.ndarray, words: np.ndarray, draw: Draw) -> list[pa.Array]:
        """Reports for values ``x`` (column units): ``words`` (n, 2) fixed words (word 0 rounds,
        word 1 is reserved), ``draw(local_rows, draw_indices)`` one uint64 word per pair."""
        x = np.asarray(x, dtype=float)
        words = np.asarray(words)
        n = x.shape[0]
        if x.ndim != 1 or words.ndim != 2 or words.shape[0] != n or words.shape[1] < 1:
            raise ValueError(f"discrete-laplace: expected x of shape (n,) and words of shape (n, 2), "
                             f"got {x.shape} and {words.shape}")
        if not np.isfinite(x).all():
            raise ValueError("discrete-laplace: inputs must be finite (missing values are encoded before "
                             "randomization)")
        y = self.grid_index(x, words[:, 0]) + self.sample_noise(n, draw)
        return [pa.array(self.lo + y.astype(np.float64) * self.step, type=pa.float64())]

    def count_invalid(self, arrays: list[pa.Array]) -> int:
        """Rows that are null, not finite, or not on the lattice lo + k * step (k an integer,
        |k| < 2^53), within 1e-9 of the bounds' width plus float rounding of the value."""
        arr = arrays[0]
        if isinstance(arr, pa.ChunkedArray):
            arr = arr.combine_chunks()
        if not (pa.types.is_floating(arr.type) or pa.types.is_integer(arr.type)):
            return len(arr)
        vals = pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False)
        ok = np.isfinite(vals)
        v = np.where(ok, vals, self.lo)
        k = np.rint((v - self.lo) / self.step)
        ok &= np.abs(k) < 2.0 ** 53
        near = np.abs(v - (self.lo + k * self.step))
        tol = 1e-9 * (self.hi - self.lo) + 8 * np.finfo(float).eps * np.abs(v)
        ok &= near <= tol
        return int((~ok).sum())

    # -- analysis ------------------------------------------------------------------------
    def max_log_ratio(self) -> float:
        """Exactly G * s / t = eps (the worst pair of inputs is 0 and G, outputs outside them)."""
        return float(Fraction(self.s, self.t) * self.grid)

    def variance(self, x: np.ndarray | float) -> np.ndarray | float:
        """Exact Var of one report (column units) for true value(s) x: step^2 * (frac (1-frac)
        + Var Z), random rounding included."""
        _, frac = self._position(np.atleast_1d(np.asarray(x, dtype=float)))
        out = (frac * (1.0 - frac) + self.noise_variance()) * self.step ** 2
        return out if np.ndim(x) else float(out[0])

    def worst_variance(self) -> float:
        """Largest Var of one report over [lo, hi] (column units): at a grid midpoint."""
        return (0.25 + self.noise_variance()) * self.step ** 2

    @property
    def memoize_refusal(self) -> str:
        return (f"mechanism {self.name} draws a variable number of random words per row, which memoized randomness "
                "does not support; remove memoize, or choose another mechanism for this column (for example hybrid "
                "or piecewise)")

    def fit_test(self) -> HullFit:
        """The report's lattice index j (value = lo + j * step) from input grid
        index i in 0..G, P(j | i) = pmf(j - i).  The alphabet is all integers, so it is cut to
        cells j = -T..G+T plus one cell for each tail (j < -T, j > G+T) with its exact mass
        a^(T+1+d) / (1+a) at distance d beyond the cut (geometric series of the pmf); T grows
        until a tail holds below DL_TAIL, at most 4 G.  The cut is data-independent, so the
        hull test's conservative reference still holds; a coarser cut only costs power."""
        m = self
        G, a = m.grid, m.a
        x = m.noise_rate
        T = int(min(4 * G, math.ceil(math.log(DL_TAIL) / -x) if x > 0 else 4 * G))
        j = np.arange(-T, G + T + 1)
        i = np.arange(G + 1)
        core = m.report_pmf(j[None, :], i[:, None])
        # P(Z >= t) = a^t / (1 + a) for t >= 1 (sum of (1-a)/(1+a) a^z over z >= t)
        left = np.exp(-(T + 1 + i) * x) / (1 + a)            # j <= -T-1: Z <= -(T+1+i)
        right = np.exp(-(G + T + 1 - i) * x) / (1 + a)       # j >= G+T+1: Z >= G+T+1-i
        Q = np.concatenate([left[:, None], core, right[:, None]], axis=1)
        tol = 1e-9 * (m.hi - m.lo)

        def index(arrays: list[pa.Array]) -> tuple[np.ndarray, np.ndarray]:
            arr = arrays[0]
            if not (pa.types.is_floating(arr.type) or pa.types.is_integer(arr.type)):
                return np.zeros(len(arr), dtype=np.int64), np.ones(len(arr), dtype=bool)
            vals = np.asarray(pc.fill_null(pc.cast(arr, pa.float64()), np.nan).to_numpy(zero_copy_only=False))
            fin = np.isfinite(vals)
            v = np.where(fin, vals, m.lo)
            jj = np.rint((v - m.lo) / m.step)
            ok = fin & (np.abs(jj) < 2.0 ** 53)
            ok &= np.abs(v - (m.lo + jj * m.step)) <= tol + 8 * np.finfo(float).eps * np.abs(v)
            cell = np.clip(jj, -T - 1, G + T + 1).astype(np.int64) + T + 1
            return np.where(ok, cell, 0), ~ok

        return HullFit(m, Q, index, f"written values (lattice cells {-T}..{G + T} of step {m.step:.6g}, tails pooled)")

    def describe(self) -> str:
        return (f"discrete-laplace (eps {self.epsilon:g} = {self.epsilon_exact} exactly; grid of {self.grid} "
                f"steps of {self.step:.6g}; two-sided geometric noise with scale G/eps = {1 / self.noise_rate:.6g} "
                f"steps; worst sd of one report {math.sqrt(self.worst_variance()):.6g})")
