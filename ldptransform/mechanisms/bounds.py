"""What is possible at all: lower bounds on the error of any eps-LDP estimator, and each
mechanism's efficiency against them.

Frequencies (categorical columns, k values)
-------------------------------------------
The unit is n * sum_v Var(f_v): the expected squared L2 error of the whole frequency
vector times the number of reports, for a fixed data set.  For the pure protocols it does
not depend on the data (the exact variance is linear in f and sum f = 1).

The bound used is the smallest total error of the symmetric subset family, minimized over
the integer subset size m (docs/formulas.md section 4, a closed form derived for that family
and checked numerically [D]):

    n * L2*(eps, k) = min over m in 1..k-1 of
                      (k-1) [(m E + k - m)^2 - (m E^2 + k - m)] / (m (k - m) (E - 1)^2),   E = e^eps.

Why this is the bound: M. Pan, "Strict Optimality of Frequency and Distribution Estimation
Under Local Differential Privacy" (arXiv:2603.11523, 2026) states that a linear estimator
with a symmetric, extremal configuration of constant, optimized support size attains the
lower bound of the L2 loss; M. Ye and A. Barg ("Optimal Schemes for Discrete Distribution
Estimation under Locally Differential Privacy", IEEE Trans. Inf. Theory 2018) show the
subset family is asymptotically optimal for all k and eps.  Only the papers' abstracts were
seen; that the closed form above *is* the theorem's bound is the tool's inference, not a
confirmed fact (docs/formulas.md section 14, item 7).  It is the best bound the tool knows; a
proven bound for all estimators, if different, could only be lower.

Per value: no mechanism can make every value's variance smaller than the bound's average,
since the largest of k variances is at least their mean: max_v n Var(f_v) >= L2* / k.

Means (numeric columns on [lo, hi])
-----------------------------------
Restricting the inputs to the two ends lo and hi turns mean estimation into estimating one
binary share, f = P(hi): mean = lo + (hi - lo) f.  Any unbiased eps-LDP mean mechanism is
then a binary frequency estimator, so its worst-case variance over data is at least
(hi - lo)^2 times the k = 2 bound per value, L2*(eps, 2) / 2 = E / (E - 1)^2 (binary
randomized response, Warner 1965; two-point reaches it at the ends).  Derived [D]; it is a
bound on the worst case over data sets, not on the variance at every data set.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from .base import Mechanism


def subset_total_variance(epsilon: float, k: int, m: np.ndarray | int) -> np.ndarray:
    """n * sum_v Var(f_v) of the symmetric subset family with subset size m (docs/formulas.md
    section 4 [D]); vectorized over m."""
    E = math.exp(epsilon)
    m = np.asarray(m, dtype=float)
    return (k - 1) * ((m * E + k - m) ** 2 - (m * E * E + k - m)) / (m * (k - m) * (E - 1.0) ** 2)


def best_subset_size(epsilon: float, k: int) -> int:
    """The integer m in 1..k-1 minimizing the total variance (ties to the smaller m)."""
    if k < 2:
        raise ValueError("k must be at least 2")
    m = np.arange(1, k)
    return int(m[int(np.argmin(subset_total_variance(epsilon, k, m)))])


def frequency_lower_bound(epsilon: float, k: int) -> float:
    """n * (smallest total variance of the frequency vector any eps-LDP mechanism is known to
    reach) for a domain of k values; see the module docstring for the source and its status."""
    return float(subset_total_variance(epsilon, k, best_subset_size(epsilon, k)))


def frequency_item_lower_bound(epsilon: float, k: int) -> float:
    """n * Var that at least one value's frequency estimate must reach: L2* / k."""
    return frequency_lower_bound(epsilon, k) / k


def mean_lower_bound(epsilon: float, bounds: tuple[float, float]) -> float:
    """n * worst-case Var of any unbiased eps-LDP mean estimate on [lo, hi] (column units
    squared): (hi - lo)^2 e^eps / (e^eps - 1)^2 (module docstring; [D])."""
    lo, hi = bounds
    E = math.exp(epsilon)
    return (hi - lo) ** 2 * E / (E - 1.0) ** 2


def efficiency(mechanism: Mechanism) -> float | None:
    """bound / the mechanism's own variance (1 = as good as possible), for frequency oracles
    (total variance) and mean mechanisms (worst-case variance); None for others
    (``Mechanism.efficiency``)."""
    return mechanism.efficiency()
