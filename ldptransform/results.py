"""Typed results of ``estimate`` and ``validate``.

Every result is a frozen dataclass with two views:

* ``to_dict()``: the JSON shape of ``ldpt estimate --format json`` / ``ldpt validate --format
  json`` (stable: scripts and tests read it);
* ``to_frame()``: a long pandas DataFrame, one row per statistic (what ``--format csv`` writes).

For scripts written against the earlier dict results, the top-level results also read like a
read-only mapping of their ``to_dict()`` (``result["columns"]["site"]``); new code should use
the typed fields.

This module imports nothing else of the package but ``distribution`` (for type hints only), so
the decoder, the validator and the command line can all import it without cycles.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

    from .distribution import Distribution

__all__ = [
    "DictView",
    "FRAME_COLUMNS",
    "CalibrationEntry",
    "CalibrationResult",
    "Check",
    "ColumnResult",
    "CrossTabCell",
    "CrossTabResult",
    "DistributionResult",
    "EstimateResult",
    "FrequencyResult",
    "GroupMean",
    "GroupedMeanResult",
    "MeanResult",
    "QuantileResult",
    "RangeResult",
    "ValidationReport",
]

FRAME_COLUMNS = ("column", "type", "mechanism", "epsilon", "statistic", "value", "estimate", "se", "ci_low",
                 "ci_high", "consistent", "estimand")


class DictView(Mapping):
    """Read-only mapping access to ``to_dict()`` (for code written against the dict results):
    the base of every result object that reads as a mapping (estimate, validate, plan, fit tests)."""

    def to_dict(self) -> dict[str, Any]:  # pragma: no cover - every subclass defines it
        raise NotImplementedError

    def __getitem__(self, key: str) -> Any:
        return self.to_dict()[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self.to_dict())

    def __len__(self) -> int:
        return len(self.to_dict())


class _Subscript:
    """``obj["key"]`` and ``obj.get("key")`` read ``to_dict()`` (for code written against dicts)."""

    def to_dict(self) -> dict[str, Any]:  # pragma: no cover - every subclass defines it
        raise NotImplementedError

    def __getitem__(self, key: str) -> Any:
        return self.to_dict()[key]

    def get(self, key: str, default: Any = None) -> Any:
        return self.to_dict().get(key, default)


def _interval(est: float | None, se: float | None, lo: float | None, hi: float | None) -> dict[str, Any]:
    return {"estimate": est, "se": se, "ci_low": lo, "ci_high": hi}


def _row(column: str, type_: str, mechanism: str | None, epsilon: float | None, statistic: str, value: str | None,
         est: Any, estimand: str, consistent: float | None = None) -> dict[str, Any]:
    return {"column": column, "type": type_, "mechanism": mechanism, "epsilon": epsilon, "statistic": statistic,
            "value": value, "estimate": est.estimate, "se": est.se, "ci_low": est.ci_low, "ci_high": est.ci_high,
            "consistent": consistent, "estimand": estimand}


def _frame(rows: list[dict[str, Any]], columns: tuple[str, ...] = FRAME_COLUMNS) -> pd.DataFrame:
    import pandas as pd

    frame = pd.DataFrame(rows, columns=list(columns))
    for c in ("epsilon", "estimate", "se", "ci_low", "ci_high", "consistent"):
        if c in frame:
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype("float64")
    return frame


# -- estimate -------------------------------------------------------------------------------

@dataclass(frozen=True)
class FrequencyResult(_Subscript):
    """One value of a categorical (or binned) column: its share of all rows."""

    value: str
    estimate: float | None
    se: float | None
    ci_low: float | None
    ci_high: float | None
    count_estimate: float
    consistent: float | None
    estimand: str = field(default="", compare=False)

    def to_dict(self) -> dict[str, Any]:
        return {"value": self.value, **_interval(self.estimate, self.se, self.ci_low, self.ci_high),
                "count_estimate": self.count_estimate, "consistent": self.consistent}


@dataclass(frozen=True)
class MeanResult(_Subscript):
    """A mean with its SE and normal-approximation interval (all None when not estimable)."""

    estimate: float | None
    se: float | None = None
    ci_low: float | None = None
    ci_high: float | None = None
    note: str | None = None
    estimand: str = field(default="", compare=False)

    def to_dict(self) -> dict[str, Any]:
        d = _interval(self.estimate, self.se, self.ci_low, self.ci_high)
        if self.note is not None:
            d["note"] = self.note
        return d


@dataclass(frozen=True)
class QuantileResult(_Subscript):
    q: float
    estimate: float | None
    se: float | None
    ci_low: float | None
    ci_high: float | None
    method: str | None
    estimand: str = field(default="", compare=False)

    def to_dict(self) -> dict[str, Any]:
        return {"q": self.q, **_interval(self.estimate, self.se, self.ci_low, self.ci_high), "method": self.method}


@dataclass(frozen=True)
class RangeResult(_Subscript):
    """Share of rows with low <= value < high."""

    low: float
    high: float
    estimate: float | None
    se: float | None
    ci_low: float | None
    ci_high: float | None
    method: str | None
    estimand: str = field(default="", compare=False)

    def to_dict(self) -> dict[str, Any]:
        return {"low": self.low, "high": self.high, **_interval(self.estimate, self.se, self.ci_low, self.ci_high),
                "method": self.method}


@dataclass(frozen=True)
class DistributionResult(_Subscript):
    """A decoded distribution: histogram, CDF at the edges, quantiles and range shares.
    ``source`` is the ``distribution.Distribution`` behind it (for further questions: cdf,
    quantile_ci, range_ci at other points or levels)."""

    method: str
    quantiles: tuple[QuantileResult, ...]
    ranges: tuple[RangeResult, ...]
    edges: tuple[float, ...]
    mass: tuple[float, ...]
    cdf: tuple[float, ...]
    source: Distribution | None = field(default=None, compare=False, repr=False)

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"method": self.method, "quantiles": [q.to_dict() for q in self.quantiles]}
        if self.ranges:
            d["ranges"] = [r.to_dict() for r in self.ranges]
        d["histogram"] = {"edges": list(self.edges), "mass": list(self.mass)}
        d["cdf"] = {"x": list(self.edges), "F": list(self.cdf)}
        return d


@dataclass(frozen=True)
class ColumnResult(_Subscript):
    """Everything estimated for one privatized column.  ``family`` says which statistics it
    has: "frequency" (``frequencies``, and ``distribution`` for a binned numeric column),
    "mean" (``mean``; with ``missing: as-answer``, the mean among rows with a value and, in
    ``frequencies``, the share missing) or "distribution" (``distribution`` and its ``mean``)."""

    name: str
    type: str
    mechanism: str | None
    epsilon: float | None
    family: str
    rows_reported: int | None = None
    frequencies: tuple[FrequencyResult, ...] = ()
    consistent_method: str | None = None
    bounds: tuple[float, float] | None = None
    mean: MeanResult | None = None
    distribution: DistributionResult | None = None
    # what the column's values are, as the release encoded them (clipping, bins, missing and
    # unknown values), from the manifest; every statistic's own estimand ends with it
    estimand: str = field(default="", compare=False)

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"type": self.type, "mechanism": self.mechanism, "epsilon": self.epsilon}
        if self.rows_reported is not None:
            d["rows_reported"] = self.rows_reported
        if self.family == "frequency":
            d["frequencies"] = [f.to_dict() for f in self.frequencies]
            d["consistent_method"] = self.consistent_method
        else:
            if self.frequencies:   # a numeric column with missing: as-answer: the share missing
                d["frequencies"] = [f.to_dict() for f in self.frequencies]
            d["bounds"] = None if self.bounds is None else list(self.bounds)
            if self.mean is not None:
                d["mean"] = self.mean.to_dict()
        if self.distribution is not None:
            d["distribution"] = self.distribution.to_dict()
        if self.estimand:
            d["estimand"] = self.estimand
        return d

    def frame_rows(self) -> list[dict[str, Any]]:
        head = (self.name, self.type, self.mechanism, self.epsilon)
        rows = [_row(*head, "frequency", f.value, f, f.estimand, f.consistent) for f in self.frequencies]
        if self.mean is not None:
            rows.append(_row(*head, "mean", None, self.mean, self.mean.estimand))
        if self.distribution is not None:
            rows += [_row(*head, "quantile", repr(q.q), q, q.estimand) for q in self.distribution.quantiles]
            rows += [_row(*head, "range share", f"{r.low:g}..{r.high:g}", r, r.estimand)
                     for r in self.distribution.ranges]
        return rows

    def to_frame(self) -> pd.DataFrame:
        return _frame(self.frame_rows())


@dataclass(frozen=True)
class CrossTabCell:
    """One cell of a cross-tab: the joint share (``joint``) of row value and column value among
    all rows, and the share of the column value among rows with the row value (``within``).
    ``consistent`` is the joint share post-processed with the other cells into a valid
    distribution (non-negative, summing to 1), ``within_consistent`` the within-row share
    computed from those (None where the row's consistent shares are all 0)."""

    row: str
    column: str
    joint: MeanResult
    consistent: float
    within: MeanResult
    within_consistent: float | None = None


@dataclass(frozen=True)
class CrossTabResult(_Subscript):
    rows: str
    columns: str
    rows_used: int
    cells: tuple[CrossTabCell, ...]
    consistent_method: str

    def to_dict(self) -> dict[str, Any]:
        def iv(m: MeanResult) -> dict[str, Any]:
            return _interval(m.estimate, m.se, m.ci_low, m.ci_high)

        return {"rows": self.rows, "columns": self.columns, "rows_used": self.rows_used,
                "cells": [{"row": c.row, "column": c.column, **iv(c.joint), "consistent": c.consistent}
                          for c in self.cells],
                "row_shares": [{"row": c.row, "column": c.column, **iv(c.within), "consistent": c.within_consistent}
                               for c in self.cells],
                "consistent_method": self.consistent_method}

    def frame_rows(self) -> list[dict[str, Any]]:
        name = f"{self.rows}:{self.columns}"
        out = []
        for c in self.cells:
            v = f"{c.row}|{c.column}"
            out.append(_row(name, "crosstab", None, None, "joint share", v, c.joint, c.joint.estimand, c.consistent))
            out.append(_row(name, "crosstab", None, None, "share within row", v, c.within, c.within.estimand,
                            c.within_consistent))
        return out


@dataclass(frozen=True)
class GroupMean(_Subscript):
    """The mean of a numeric column within one group; ``consistent``: the raw mean clipped
    into the column's bounds (None when there is no mean)."""

    group: str
    mean: MeanResult
    share: float | None
    note: str | None = None
    consistent: float | None = None

    def to_dict(self) -> dict[str, Any]:
        m = self.mean
        d: dict[str, Any] = {"group": self.group, "mean": _interval(m.estimate, m.se, m.ci_low, m.ci_high),
                             "share": self.share, "consistent": self.consistent}
        if self.note is not None:
            d["note"] = self.note
        return d


@dataclass(frozen=True)
class GroupedMeanResult(_Subscript):
    column: str
    by: str
    rows_used: int
    groups: tuple[GroupMean, ...]

    def to_dict(self) -> dict[str, Any]:
        return {"column": self.column, "by": self.by, "rows_used": self.rows_used,
                "groups": [g.to_dict() for g in self.groups]}

    def frame_rows(self) -> list[dict[str, Any]]:
        name = f"{self.column}:{self.by}"
        return [_row(name, "grouped mean", None, None, "mean", g.group, g.mean, g.mean.estimand, g.consistent)
                for g in self.groups]


@dataclass(frozen=True, eq=False)
class EstimateResult(DictView):
    """What ``estimate`` returns: per-column results, the requested joint analyses, notes."""

    rows: int
    confidence: float
    columns: dict[str, ColumnResult]
    se_method: str
    crosstabs: tuple[CrossTabResult, ...] = ()
    grouped_means: tuple[GroupedMeanResult, ...] = ()
    extracts: tuple[str, ...] = ()
    public_columns: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"rows": self.rows, "confidence": self.confidence,
                             "columns": {n: c.to_dict() for n, c in self.columns.items()}}
        if self.crosstabs:
            d["crosstabs"] = [x.to_dict() for x in self.crosstabs]
        if self.grouped_means:
            d["grouped_means"] = [g.to_dict() for g in self.grouped_means]
        if len(self.extracts) > 1:
            d["extracts"] = list(self.extracts)
        d["se_method"] = self.se_method
        if self.public_columns:
            d["public_columns"] = list(self.public_columns)
        return d

    def to_frame(self) -> pd.DataFrame:
        """One row per statistic (columns ``FRAME_COLUMNS``): frequencies, means, quantiles,
        range shares, cross-tab cells, grouped means; ``estimand`` says what each estimates."""
        rows = [r for c in self.columns.values() for r in c.frame_rows()]
        rows += [r for x in self.crosstabs for r in x.frame_rows()]
        rows += [r for g in self.grouped_means for r in g.frame_rows()]
        return _frame(rows)

    def __eq__(self, other: object) -> bool:
        if isinstance(other, EstimateResult):
            return self.to_dict() == other.to_dict()
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]


# -- validate -------------------------------------------------------------------------------

@dataclass(frozen=True)
class Check:
    """One check of a release: ``ok`` True (pass), None (warn: reported, not judged) or False (fail)."""

    name: str
    ok: bool | None
    detail: str

    @property
    def status(self) -> str:
        return "pass" if self.ok else ("warn" if self.ok is None else "fail")

    def to_dict(self) -> dict[str, str]:
        return {"check": self.name, "status": self.status, "detail": self.detail}

    as_dict = to_dict


@dataclass(frozen=True)
class CalibrationEntry:
    """One statistic checked against the truth computed from the raw data.  ``score`` is the
    distance of the truth from the estimate in units of the interval's half-width on that side,
    times the interval's z (for a normal interval: |estimate - truth| / SE); None where the
    statistic has no interval (not judged)."""

    column: str
    statistic: str
    value: str | None
    truth: float
    estimate: float | None
    se: float | None
    ci_low: float | None
    ci_high: float | None
    inside: bool | None
    score: float | None
    estimand: str = ""


@dataclass(frozen=True, eq=False)
class CalibrationResult(DictView):
    statistics: int
    inside: int
    share_inside: float
    confidence: float
    max_abs_z: float
    max_abs_z_at: str
    z_limit: float
    entries: tuple[CalibrationEntry, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"statistics": self.statistics, "inside": self.inside, "share_inside": self.share_inside,
                "confidence": self.confidence, "max_abs_z": self.max_abs_z, "max_abs_z_at": self.max_abs_z_at,
                "z_limit": self.z_limit}

    def to_frame(self) -> pd.DataFrame:
        import pandas as pd

        cols = ("column", "statistic", "value", "truth", "estimate", "se", "ci_low", "ci_high", "inside", "score",
                "estimand")
        return pd.DataFrame([{c: getattr(e, c) for c in cols} for e in self.entries], columns=list(cols))

    __hash__ = None  # type: ignore[assignment]


@dataclass(frozen=True, eq=False)
class ValidationReport(DictView):
    """What ``validate`` returns: the checks in order, and the calibration figures (with the raw
    data and the key)."""

    extract: str
    manifest: str
    checks: tuple[Check, ...] = ()
    calibration: CalibrationResult | None = None

    @property
    def ok(self) -> bool:
        return all(c.ok is not False for c in self.checks)

    def check(self, name: str) -> Check | None:
        return next((c for c in self.checks if c.name == name), None)

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"extract": self.extract, "manifest": self.manifest, "ok": self.ok,
                             "checks": [c.to_dict() for c in self.checks]}
        if self.calibration is not None:
            d["calibration"] = self.calibration.to_dict()
        return d

    as_dict = to_dict

    def to_frame(self) -> pd.DataFrame:
        """One row per check: check, status, ok, detail."""
        import pandas as pd

        return pd.DataFrame([{"check": c.name, "status": c.status, "ok": c.ok, "detail": c.detail}
                             for c in self.checks], columns=["check", "status", "ok", "detail"])

    __hash__ = None  # type: ignore[assignment]


_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?")


def formula_like(text: str) -> bool:
    """Text a spreadsheet would read as a formula (``spreadsheet_safe`` makes it inert)."""
    return text.startswith(_FORMULA_START) and not _PLAIN_NUMBER.fullmatch(text)


def spreadsheet_safe(text: str) -> str:
    """A text cell of a CSV file meant to be opened in a spreadsheet, made inert: text that
    starts with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return (which a spreadsheet
    reads as a formula: ``=HYPERLINK(...)``, ``+cmd|...``) gets a leading apostrophe, the
    common convention for "this is text".  A cell that is exactly a number (``-1``, ``+2.5``)
    is kept: a spreadsheet reads it as that number, never as a formula.  Control characters
    (escape sequences, bidi overrides) are written as visible escapes (errors.terminal_safe), so
    the CSV cannot act on a terminal it is printed to either."""
    from .errors import terminal_safe

    if formula_like(text):
        text = "'" + text
    return terminal_safe(text, keep_layout=True)


def finite(v: float | None) -> bool:
    return v is not None and math.isfinite(v)
