"""Goodness of fit: are the reports in an extract consistent with the declared mechanism?

The tests themselves live with the mechanisms: the generic machinery (the accumulator, typed
results, Pearson's test, the hull fit, the binomial support bounds) in
``ldptransform/mechanisms/fit.py``, whose docstring explains which evidence each mechanism's
reports carry and what can and cannot be detected; each mechanism picks its test in
``Mechanism.fit_test()``.  This module keeps the entry points the validator and scripts use.
"""

from __future__ import annotations

from .mechanisms.base import Mechanism
from .mechanisms.fit import (
    EM_GAP_TOL,
    EM_MAX_ITER,
    HULL_MAX_CELLS,
    MIN_EXPECTED,
    SUPPORT_CHUNK,
    FitResult,
    FitStats,
    HullFit,
    SupportBoundsFit,
    _chi2_sf,
    hull_mle,
    pearson_test,
)

__all__ = ["fit_stats_for", "no_fit_reason", "FitResult", "FitStats", "HullFit", "SupportBoundsFit", "hull_mle",
           "pearson_test", "MIN_EXPECTED", "HULL_MAX_CELLS", "EM_GAP_TOL", "EM_MAX_ITER", "SUPPORT_CHUNK", "_chi2_sf"]


def fit_stats_for(mechanism: Mechanism) -> FitStats | None:
    """The goodness-of-fit accumulator for one column's mechanism, or None when no test is
    available for it (``no_fit_reason`` says why): ``mechanism.fit_test()``."""
    return mechanism.fit_test()


def no_fit_reason(mechanism: Mechanism) -> str:
    """Why ``fit_stats_for`` has no test for this mechanism ('' when it has one)."""
    return mechanism.no_fit_reason()
