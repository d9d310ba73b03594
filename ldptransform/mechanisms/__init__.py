"""Local randomizers.  ``build(spec)`` makes one from its manifest spec; ``choose``
picks the lowest-variance one for a domain and eps when the policy names none."""

from __future__ import annotations

from typing import Any

from .base import Mechanism, build, registry
from .categorical import GRR, OLH, OUE, SUE, FrequencyOracle
from .distribution import Hierarchy, SquareWave
from .numeric import DEFAULT_GRID, GridMechanism, Hybrid, Piecewise, TwoPoint

CATEGORICAL = ("grr", "oue", "olh", "sue")
NUMERIC = ("hybrid", "piecewise", "two-point")
DISTRIBUTION = ("square-wave", "hierarchy")

__all__ = ["Mechanism", "FrequencyOracle", "GridMechanism", "GRR", "SUE", "OUE", "OLH",
           "TwoPoint", "Piecewise", "Hybrid", "SquareWave", "Hierarchy", "build", "registry",
           "choose_categorical", "choose_numeric", "default_distribution", "make", "DEFAULT_DISTRIBUTION", "CATEGORICAL", "NUMERIC", "DISTRIBUTION"]


def choose_categorical(epsilon: float, categories: list[str]) -> tuple[FrequencyOracle, str]:
    """The frequency oracle with the lowest total exact variance (n * sum_v Var f_v, i.e.
    expected squared L2 error of the frequency vector) for this k and eps.  Ties go to
    the shorter report (GRR, then OLH, then OUE)."""
    cands = [GRR(epsilon, categories), OLH(epsilon, categories), OUE(epsilon, categories)]
    scored = [(m.total_variance(), i, m) for i, m in enumerate(cands)]
    best = min(scored, key=lambda s: (round(s[0] / scored[0][0], 9), s[1]))
    why = ("lowest total variance of the frequency vector among " +
           ", ".join(f"{m.name} {v:.4g}" for v, _, m in scored) + f" (n * sum of Var at k={len(categories)})")
    return best[2], why


def choose_numeric(epsilon: float, bounds: tuple[float, float], grid: int = DEFAULT_GRID) -> tuple[GridMechanism, str]:
    """The numeric mechanism with the lowest worst-case variance of one report (exact).
    Ties (hybrid equals two-point for eps <= 0.61) go to the shorter alphabet, two-point."""
    cands = [TwoPoint(epsilon, bounds), Hybrid(epsilon, bounds, grid), Piecewise(epsilon, bounds, grid)]
    scored = [(m.worst_variance(), i, m) for i, m in enumerate(cands)]
    best = min(scored, key=lambda s: (round(s[0] / scored[0][0], 9), s[1]))
    why = ("lowest worst-case variance of one report among " +
           ", ".join(f"{m.name} {v:.4g}" for v, _, m in scored) + " (column units squared)")
    return best[2], why


# The tool's default for a numeric column whose policy says `needs: [..., quantiles]` and names
# no mechanism: the one with the lowest median error in benchmarks/bench_quantiles.py (see
# benchmarks/README.md for the measured figures).
DEFAULT_DISTRIBUTION = "square-wave"
DEFAULT_DISTRIBUTION_REASON = ("needs quantiles: square-wave, the distribution mechanism with the lowest median error "
                               "in the tool's benchmark (benchmarks/bench_quantiles.py)")


def default_distribution(epsilon: float, bounds: tuple[float, float]) -> tuple[Mechanism, str]:
    """The tool's default mechanism for a numeric column whose policy needs quantiles."""
    return make(DEFAULT_DISTRIBUTION, "numeric", epsilon, bounds), DEFAULT_DISTRIBUTION_REASON


def make(name: str, kind: str, epsilon: float, domain: Any, **params: Any) -> Mechanism:
    spec: dict[str, Any] = {"mechanism": name, "epsilon": epsilon, **params}
    if kind == "categorical":
        spec["categories"] = list(domain)
    else:
        spec["bounds"] = list(domain)
    return build(spec)
