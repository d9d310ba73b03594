"""Local randomizers.  ``build(spec)`` makes one from its manifest spec; ``choose_*``
picks the lowest-variance one for a domain and eps when the policy names none.

The contract every mechanism fills is the ``Mechanism`` base class (base.py), with three family
bases: ``FrequencyOracle`` (categorical.py), ``MeanMechanism`` and ``DistributionMechanism``
(base.py).  Nothing outside this package names a mechanism: policy, planner, validator and
decoder ask the class.  Registration of a new mechanism: its module (a family subclass with
``@register``), its import below, and its name in the listing of its family (CATEGORICAL,
NUMERIC or DISTRIBUTION: the order in which help texts and error messages list them).
"""

from __future__ import annotations

from typing import Any

from . import bounds as _bounds
from .base import (
    FAMILIES,
    DistributionMechanism,
    MeanMechanism,
    Mechanism,
    MechanismParamError,
    PerRowColumn,
    build,
    registry,
)
from .categorical import GRR, OLH, OUE, SUE, FrequencyOracle
from .discrete_laplace import DiscreteLaplace
from .distribution import Hierarchy, SquareWave
from .hadamard import HadamardResponse
from .matrix import Matrix
from .missing import DEFAULT_FLAG_SHARE, MissingFlag, MissingFlagDistribution, with_missing_flag
from .numeric import DEFAULT_GRID, GridMechanism, Hybrid, Piecewise, TwoPoint
from .quantile import QuantileDecoder, QuantileEstimate, SequentialQuantile
from .subset import SubsetSelection

# The listing of every registered mechanism by family (frequency, mean, distribution), in the
# order help texts and error messages show them.
CATEGORICAL = ("grr", "oue", "olh", "sue", "hadamard", "subset", "matrix")
NUMERIC = ("hybrid", "piecewise", "two-point", "discrete-laplace")
DISTRIBUTION = ("square-wave", "hierarchy")
QUANTILE = ("sequential-quantile",)
LISTED = CATEGORICAL + NUMERIC + DISTRIBUTION + QUANTILE
# The policy fields `mechanism: auto` takes on a numeric column (choose_numeric's parameters).
AUTO_NUMERIC_FIELDS = ("grid",)


def names_of(*families: str) -> tuple[str, ...]:
    """The registered mechanisms of these families (see FAMILIES), in listing order."""
    reg = registry()
    return tuple(n for n in LISTED if reg[n].family in families)


def field_owners(field: str, *families: str) -> tuple[str, ...]:
    """The mechanisms (of these families, or of any) whose policy parameters include ``field``."""
    reg = registry()
    return tuple(n for n in (names_of(*families) if families else LISTED) if field in reg[n].policy_fields())


__all__ = ["Mechanism", "FrequencyOracle", "MeanMechanism", "DistributionMechanism", "MechanismParamError",
           "FAMILIES", "LISTED", "AUTO_NUMERIC_FIELDS", "names_of", "field_owners", "GridMechanism", "GRR", "SUE",
           "OUE", "OLH", "TwoPoint", "Piecewise", "Hybrid", "DiscreteLaplace", "HadamardResponse", "SubsetSelection",
           "Matrix", "SquareWave", "Hierarchy", "build", "registry", "choose_categorical", "choose_numeric",
           "categorical_candidates", "AUTO_CATEGORICAL", "default_distribution", "make", "DEFAULT_DISTRIBUTION",
           "CATEGORICAL", "NUMERIC", "DISTRIBUTION", "MissingFlag", "MissingFlagDistribution", "with_missing_flag",
           "DEFAULT_FLAG_SHARE", "PerRowColumn", "QUANTILE", "QuantileDecoder", "QuantileEstimate", "choose_quantiles",
           "SequentialQuantile"]


# Candidates for `mechanism: auto` on a categorical column, in order of preference on a tie
# (shorter report first): GRR sends one value, hadamard one index, OLH a seed and a hash,
# subset and OUE k characters.  Subset with m = 1 is GRR, so GRR keeps that tie.
AUTO_CATEGORICAL = (GRR, HadamardResponse, OLH, SubsetSelection, OUE)


def categorical_candidates(epsilon: float, categories: list[str]) -> list[tuple[float, FrequencyOracle]]:
    """Every auto candidate with its exact total variance, in tie-break order."""
    return [(m.total_variance(), m) for m in (c(epsilon, categories) for c in AUTO_CATEGORICAL)]


def choose_categorical(epsilon: float, categories: list[str]) -> tuple[FrequencyOracle, str]:
    """The frequency oracle with the lowest total exact variance (n * sum_v Var f_v, the
    expected squared L2 error of the frequency vector times n) for this k and eps.  Ties
    (within 1e-9 relative) go to the shorter report.  The reason quotes every candidate's
    variance and its efficiency against the lower bound (mechanisms/bounds.py)."""
    k = len(categories)
    scored = categorical_candidates(epsilon, categories)
    low = min(v for v, _ in scored)
    best = next(m for v, m in scored if v <= low * (1 + 1e-9))
    bound = _bounds.frequency_lower_bound(epsilon, k)
    why = (f"lowest total variance of the frequency vector (n * sum of Var at k={k}) among " +
           ", ".join(f"{m.name} {v:.4g} (efficiency {bound / v:.3f})" for v, m in scored) +
           f"; lower bound for any eps-LDP frequency estimator {bound:.4g}")
    return best, why


def choose_numeric(epsilon: float, bounds: tuple[float, float], grid: int = DEFAULT_GRID) -> tuple[GridMechanism, str]:
    """The numeric mechanism with the lowest worst-case variance of one report (exact).
    Ties (hybrid equals two-point for eps <= 0.61) go to the shorter alphabet, two-point."""
    cands = [TwoPoint(epsilon, bounds), Hybrid(epsilon, bounds, grid), Piecewise(epsilon, bounds, grid)]
    scored = [(m.worst_variance(), i, m) for i, m in enumerate(cands)]
    best = min(scored, key=lambda s: (round(s[0] / scored[0][0], 9), s[1]))
    bound = _bounds.mean_lower_bound(epsilon, (float(bounds[0]), float(bounds[1])))
    why = ("lowest worst-case variance of one report (column units squared) among " +
           ", ".join(f"{m.name} {v:.4g} (efficiency {bound / v:.3f})" for v, _, m in scored) +
           f"; lower bound for any unbiased eps-LDP mean estimator {bound:.4g}")
    return best[2], why


# The tool's default for a numeric column whose policy says `needs: [..., quantiles]` and names
# no mechanism: the route with the lowest error among those whose intervals hold at their stated
# rate on skewed, spiky and discrete data (tests/test_coverage.py, benchmarks/bench_coverage.py).
# Square wave has a lower median error on smooth data (benchmarks/bench_quantiles.py), but its
# EMS smoothing bias has no bound, and its intervals miss on a point mass or a heavy tail.
DEFAULT_DISTRIBUTION = "hierarchy"
DEFAULT_DISTRIBUTION_REASON = ("needs quantiles: hierarchy, whose unbiased estimates give quantile, range and mean "
                               "intervals that hold whatever the column's shape (square-wave can have a lower median "
                               "error on smooth data, but its smoothing bias has no bound and its intervals miss on "
                               "skewed and spiky columns; name it with `mechanism: square-wave` to use it anyway)")


def default_distribution(epsilon: float, bounds: tuple[float, float]) -> tuple[Mechanism, str]:
    """The tool's default mechanism for a numeric column whose policy needs quantiles."""
    return make(DEFAULT_DISTRIBUTION, "numeric", epsilon, bounds), DEFAULT_DISTRIBUTION_REASON


def choose_quantiles(epsilon: float | None, bounds: Any, quantile: float | None) -> tuple[str, str]:
    """The mechanism for `needs: [quantiles]` without a named mechanism: the default distribution
    mechanism, or with one `quantile` named, the one with the smaller predicted SE of it
    (``quantile.choose_quantile_mechanism``): (its name, why)."""
    if quantile is None:
        return DEFAULT_DISTRIBUTION, DEFAULT_DISTRIBUTION_REASON
    from .quantile import choose_quantile_mechanism

    assert epsilon is not None
    chosen, why = choose_quantile_mechanism(epsilon, bounds, quantile, default_distribution(epsilon, bounds)[0])
    return chosen.name, why


def make(name: str, kind: str, epsilon: float, domain: Any, **params: Any) -> Mechanism:
    spec: dict[str, Any] = {"mechanism": name, "epsilon": epsilon, **params}
    if kind == "categorical":
        spec["categories"] = list(domain)
    else:
        spec["bounds"] = list(domain)
    return build(spec)
