"""Typed results of ``estimate`` and ``validate``.

Every result is a frozen dataclass with two views:

* ``to_dict()``: the JSON shape of ``ldpt estimate --format json`` / ``ldpt validate --format
  json`` (stable: scripts and tests read it);
* ``to_frame()``: a long pandas DataFrame holding everything ``to_dict()`` holds: for an
  estimate, one row per statistic and per descriptor (columns ``FRAME_COLUMNS``; what ``--format
  csv`` writes, through ``frame_csv``); for a report, one row per check.  ``from_frame`` reads a
  frame back (``EstimateResult.from_frame``, ``ValidationReport.from_frame``): its ``to_dict()``
  is the original's with every non-finite figure as None, as strict JSON writes it.

For scripts written against the earlier dict results, the top-level results also read like a
read-only mapping of their ``to_dict()`` (``result["columns"]["site"]``); new code should use
the typed fields.

This module imports nothing else of the package but ``distribution`` (for type hints only) and
``errors`` (inside ``spreadsheet_safe``), and pandas only inside the functions that need it, so
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
    "CALIBRATION_FRAME_COLUMNS",
    "DictView",
    "FRAME_COLUMNS",
    "VALIDATION_FRAME_COLUMNS",
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
    "csv_cell",
    "frame_csv",
]

FRAME_COLUMNS = ("column", "type", "mechanism", "epsilon", "statistic", "value", "estimate", "se", "ci_low",
                 "ci_high", "consistent", "estimand", "confidence", "count_estimate", "share", "rows_used", "low",
                 "high", "first", "second", "first_value", "second_value", "method", "note")
"""The columns of ``EstimateResult.to_frame()``, in order (docs/decoding.md, "Estimates as a table",
lists what each holds and which rows fill it)."""

_FLOAT_COLUMNS = ("epsilon", "estimate", "se", "ci_low", "ci_high", "consistent", "confidence", "count_estimate",
                  "share", "low", "high")
_INT_COLUMNS = ("rows_used",)


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

    def frame_rows(self) -> list[dict[str, Any]]:  # pragma: no cover - every subclass defines it
        raise NotImplementedError

    def __getitem__(self, key: str) -> Any:
        return self.to_dict()[key]

    def get(self, key: str, default: Any = None) -> Any:
        return self.to_dict().get(key, default)

    def to_frame(self) -> pd.DataFrame:
        """This part of an estimate as rows of the estimate frame (``FRAME_COLUMNS``); the
        context only the whole result knows (the column's name, the confidence) is empty."""
        return _frame(self.frame_rows())


def _interval(est: float | None, se: float | None, lo: float | None, hi: float | None) -> dict[str, Any]:
    return {"estimate": est, "se": se, "ci_low": lo, "ci_high": hi}


def _row(statistic: str, est: Any = None, **cells: Any) -> dict[str, Any]:
    """One row of the estimate frame: ``est`` (anything with estimate, se, ci_low, ci_high) gives
    the four figures; every other cell is named."""
    row = dict.fromkeys(FRAME_COLUMNS)
    row["statistic"] = statistic
    if est is not None:
        row.update(estimate=est.estimate, se=est.se, ci_low=est.ci_low, ci_high=est.ci_high)
    row.update(cells)
    return row


def _typed(frame: pd.DataFrame, floats: tuple[str, ...], ints: tuple[str, ...] = ()) -> pd.DataFrame:
    """Number columns as float64 (a missing or non-finite figure, null in strict JSON, as NaN)
    and whole-number columns as nullable Int64; text columns keep None for a missing text."""
    import numpy as np
    import pandas as pd

    for c in floats:
        if c in frame:
            col = pd.to_numeric(frame[c], errors="coerce").astype("float64")
            frame[c] = col.where(np.isfinite(col.to_numpy()), np.nan)
    for c in ints:
        if c in frame:
            frame[c] = pd.array([None if v is None else int(v) for v in frame[c].tolist()], dtype="Int64")
    return frame


def _frame(rows: list[dict[str, Any]], columns: tuple[str, ...] = FRAME_COLUMNS) -> pd.DataFrame:
    import pandas as pd

    frame = pd.DataFrame(rows, columns=list(columns), dtype=object)
    return _typed(frame, _FLOAT_COLUMNS, _INT_COLUMNS)


def _cell(v: Any) -> Any:
    """A frame cell as a JSON value: NaN, None and pandas' NA as None, numpy scalars as Python's."""
    if v is None or v is getattr(_pd(), "NA", None):
        return None
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if hasattr(v, "item"):   # a numpy scalar
        v = v.item()
        if isinstance(v, float) and not math.isfinite(v):
            return None
    return v


def _num(v: Any) -> float | None:
    v = _cell(v)
    return None if v is None else float(v)


def _int(v: Any) -> int | None:
    v = _cell(v)
    return None if v is None else int(v)


def _text(v: Any) -> str | None:
    v = _cell(v)
    return None if v is None else str(v)


def _pd() -> Any:
    import pandas as pd

    return pd


def _records(frame: pd.DataFrame, columns: tuple[str, ...]) -> list[dict[str, Any]]:
    """The rows of a result frame as dicts of JSON values; refuses a frame without ``columns``."""
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(f"the frame has no column {', '.join(missing)}: give a frame made by to_frame(), with "
                         "every column it has")
    cols = list(columns)
    return [dict(zip(cols, map(_cell, r))) for r in frame[cols].itertuples(index=False, name=None)]


# -- estimate -------------------------------------------------------------------------------

def _with(text: str, *clauses: str | None) -> str:
    return "; ".join([text, *[c for c in clauses if c]])


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

    def frame_rows(self, **head: Any) -> list[dict[str, Any]]:
        return [_row("frequency", self, **head, value=self.value, consistent=self.consistent,
                     count_estimate=self.count_estimate, estimand=self.estimand)]


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

    def frame_rows(self, **head: Any) -> list[dict[str, Any]]:
        return [_row("mean", self, **head, note=self.note, estimand=self.estimand)]


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

    def frame_rows(self, **head: Any) -> list[dict[str, Any]]:
        return [_row("quantile", self, **head, value=repr(self.q), method=self.method, estimand=self.estimand)]


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

    def frame_rows(self, **head: Any) -> list[dict[str, Any]]:
        return [_row("range share", self, **head, value=f"{self.low:g}..{self.high:g}", low=self.low,
                     high=self.high, method=self.method, estimand=self.estimand)]


@dataclass(frozen=True)
class DistributionResult(_Subscript):
    """A decoded distribution: histogram, CDF at the edges, quantiles and range shares.
    ``source`` is the ``distribution.Distribution`` behind it (for further questions: cdf,
    quantile_ci, range_ci at other points or levels); ``among`` the rows it is the distribution
    of ("all rows", or "rows with a value" for a column with ``missing: as-answer``)."""

    method: str
    quantiles: tuple[QuantileResult, ...]
    ranges: tuple[RangeResult, ...]
    edges: tuple[float, ...]
    mass: tuple[float, ...]
    cdf: tuple[float, ...]
    source: Distribution | None = field(default=None, compare=False, repr=False)
    among: str = field(default="all rows", compare=False)

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"method": self.method, "quantiles": [q.to_dict() for q in self.quantiles]}
        if self.ranges:
            d["ranges"] = [r.to_dict() for r in self.ranges]
        d["histogram"] = {"edges": list(self.edges), "mass": list(self.mass)}
        d["cdf"] = {"x": list(self.edges), "F": list(self.cdf)}
        return d

    def frame_rows(self, encoding: str = "", **head: Any) -> list[dict[str, Any]]:
        """A "distribution" row (its method), then its quantiles, range shares, histogram buckets
        (estimate: the bucket's share; low, high: its edges) and CDF points (estimate: F(high));
        ``encoding``: the column's encoding clauses, which end every estimand."""
        col = head.get("column") or "the column"
        rows = [_row("distribution", **head, method=self.method,
                     estimand=_with(f"the distribution of {col} among {self.among}", encoding))]
        rows += [r for q in self.quantiles for r in q.frame_rows(**head)]
        rows += [r for g in self.ranges for r in g.frame_rows(**head)]
        last = len(self.mass) - 1
        for j, m in enumerate(self.mass):
            lo, hi = self.edges[j], self.edges[j + 1]
            span = f"[{lo:g}, {hi:g}{']' if j == last else ')'}"
            rows.append(_row("histogram", **head, value=span, estimate=m, low=lo, high=hi,
                             estimand=_with(f"share of rows with {col} in {span} among {self.among} (a bucket of the "
                                            "estimated distribution's histogram)", encoding)))
        for x, f in zip(self.edges, self.cdf):
            rows.append(_row("cdf", **head, value=f"{x:g}", estimate=f, high=x,
                             estimand=_with(f"share of rows with {col} at most {x:g} among {self.among} (the "
                                            "estimated distribution's CDF)", encoding)))
        return rows


@dataclass(frozen=True)
class ColumnResult(_Subscript):
    """Everything estimated for one privatized column.  ``family`` says which statistics it
    has: "frequency" (``frequencies``, and ``distribution`` for a binned numeric column),
    "mean" (``mean``; with ``missing: as-answer``, the mean among rows with a value and, in
    ``frequencies``, the share missing), "distribution" (``distribution`` and its ``mean``) or
    "quantile" (``quantile``: the one quantile its mechanism tracks)."""

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
    # how the frequencies were decoded when not by the default unbiased projection: "likelihood"
    # (maximum-likelihood shares, ``estimate(decoder="likelihood")``), with how it was done
    decoder: str | None = None
    decoder_method: str | None = None
    # family "quantile": the one quantile its mechanism tracks, with SE and interval
    quantile: QuantileResult | None = None

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
        if self.quantile is not None:
            d["quantile"] = self.quantile.to_dict()
        if self.estimand:
            d["estimand"] = self.estimand
        if self.decoder is not None:
            d["decoder"] = {"name": self.decoder, "method": self.decoder_method}
        return d

    def frame_rows(self, rows: int | None = None, confidence: float | None = None) -> list[dict[str, Any]]:
        """A "column" row (value: the family; low, high: the bounds; method: the consistent
        method; estimand: the column's encoding), then its frequencies, mean and distribution;
        ``rows_used`` on each is the rows that reported the column (``rows``, the table's rows,
        when every row did)."""
        head = {"column": self.name, "type": self.type, "mechanism": self.mechanism, "epsilon": self.epsilon,
                "rows_used": self.rows_reported if self.rows_reported is not None else rows,
                "confidence": confidence}
        lo, hi = self.bounds if self.bounds is not None else (None, None)
        out = [_row("column", **head, value=self.family, low=lo, high=hi, method=self.consistent_method,
                    estimand=self.estimand or None)]
        if self.decoder is not None:
            out.append(_row("decoder", **head, value=self.decoder, method=self.decoder_method))
        out += [r for f in self.frequencies for r in f.frame_rows(**head)]
        if self.mean is not None:
            out += self.mean.frame_rows(**head)
        if self.distribution is not None:
            out += self.distribution.frame_rows(self.estimand, **head)
        if self.quantile is not None:
            out += self.quantile.frame_rows(**head)
        return out


@dataclass(frozen=True)
class CrossTabCell(_Subscript):
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

    def to_dict(self) -> dict[str, Any]:
        """The cell alone (in an estimate's JSON its two shares are under ``cells`` and
        ``row_shares``)."""
        def iv(m: MeanResult) -> dict[str, Any]:
            return _interval(m.estimate, m.se, m.ci_low, m.ci_high)

        return {"row": self.row, "column": self.column, "joint": iv(self.joint), "consistent": self.consistent,
                "within": iv(self.within), "within_consistent": self.within_consistent}

    def frame_rows(self, **head: Any) -> list[dict[str, Any]]:
        cell = {"value": f"{self.row}|{self.column}", "first_value": self.row, "second_value": self.column}
        return [_row("joint share", self.joint, **head, **cell, consistent=self.consistent,
                     estimand=self.joint.estimand or None),
                _row("share within row", self.within, **head, **cell, consistent=self.within_consistent,
                     estimand=self.within.estimand or None)]


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

    def frame_rows(self, confidence: float | None = None) -> list[dict[str, Any]]:
        """Per cell a "joint share" and a "share within row" row (first, second: the two
        columns; first_value, second_value: the cell's labels); a cross-tab without cells (fewer
        than two rows) is one "joint share" row without figures."""
        head = {"column": f"{self.rows}:{self.columns}", "type": "crosstab", "first": self.rows,
                "second": self.columns, "rows_used": self.rows_used, "method": self.consistent_method,
                "confidence": confidence}
        if not self.cells:
            return [_row("joint share", **head)]
        return [r for c in self.cells for r in c.frame_rows(**head)]


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

    def frame_rows(self, **head: Any) -> list[dict[str, Any]]:
        return [_row("mean", self.mean, **head, value=self.group, second_value=self.group, share=self.share,
                     note=self.note, consistent=self.consistent, estimand=self.mean.estimand or None)]


@dataclass(frozen=True)
class GroupedMeanResult(_Subscript):
    column: str
    by: str
    rows_used: int
    groups: tuple[GroupMean, ...]

    def to_dict(self) -> dict[str, Any]:
        return {"column": self.column, "by": self.by, "rows_used": self.rows_used,
                "groups": [g.to_dict() for g in self.groups]}

    def frame_rows(self, confidence: float | None = None) -> list[dict[str, Any]]:
        """One "mean" row per group (value, second_value: the group; share: its estimated share of
        all rows); without groups, one such row without figures."""
        head = {"column": f"{self.column}:{self.by}", "type": "grouped mean", "first": self.column,
                "second": self.by, "rows_used": self.rows_used, "confidence": confidence}
        if not self.groups:
            return [_row("mean", **head)]
        return [r for g in self.groups for r in g.frame_rows(**head)]


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

    def frame_rows(self) -> list[dict[str, Any]]:
        c = self.confidence
        rows = [_row("rows", rows_used=self.rows, method=self.se_method, confidence=c)]
        rows += [r for col in self.columns.values() for r in col.frame_rows(self.rows, c)]
        rows += [r for x in self.crosstabs for r in x.frame_rows(c)]
        rows += [r for g in self.grouped_means for r in g.frame_rows(c)]
        if len(self.extracts) > 1:
            rows += [_row("extract", value=e, confidence=c) for e in self.extracts]
        rows += [_row("public column", column=p, type="public", confidence=c,
                      note="released in the clear: not protected, nothing estimated") for p in self.public_columns]
        return rows

    def to_frame(self) -> pd.DataFrame:
        """Everything in ``to_dict()`` as one long table (columns ``FRAME_COLUMNS``), one row per
        statistic (frequency, mean, quantile, range share, histogram bucket, CDF point, cross-tab
        cell share, group mean) and per descriptor (the table's rows, each column, each
        distribution, extracts, public columns); ``estimand`` says what each figure estimates.
        A figure that is missing or not finite (null in the JSON) is NaN; a missing text is None.
        ``EstimateResult.from_frame`` reads it back."""
        return _frame(self.frame_rows())

    def to_csv(self) -> str:
        """``to_frame()`` as CSV text (``frame_csv``): what ``ldpt estimate --format csv`` writes."""
        return frame_csv(self.to_frame())

    @classmethod
    def from_frame(cls, frame: pd.DataFrame) -> EstimateResult:
        """The result a frame of ``to_frame()`` holds: ``from_frame(r.to_frame()).to_dict()`` is
        ``r.to_dict()`` with every non-finite figure as None (what the strict JSON of ``--format
        json`` holds).  Not kept: the decoded ``Distribution`` objects (``source``), and the one
        extract's name when a single extract was read (the JSON omits it too)."""
        return _EstimateReader(_records(frame, FRAME_COLUMNS)).result()

    def __eq__(self, other: object) -> bool:
        if isinstance(other, EstimateResult):
            return self.to_dict() == other.to_dict()
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]


def _ci(r: dict[str, Any]) -> tuple[float | None, float | None, float | None, float | None]:
    return _num(r["estimate"]), _num(r["se"]), _num(r["ci_low"]), _num(r["ci_high"])


class _EstimateReader:
    """Rebuilds an ``EstimateResult`` from the rows of its frame, in their order."""

    def __init__(self, records: list[dict[str, Any]]) -> None:
        self.records = records
        self.columns: dict[str, dict[str, Any]] = {}
        self.joint: list[dict[str, Any]] = []

    @staticmethod
    def _refuse(text: str) -> ValueError:
        return ValueError(f"{text}: give a frame made by EstimateResult.to_frame(), with its rows in their order")

    def result(self) -> EstimateResult:
        head = next((r for r in self.records if r["statistic"] == "rows" and r["column"] is None), None)
        if head is None or head["rows_used"] is None or head["confidence"] is None:
            raise self._refuse("the frame has no row with statistic 'rows' (the table's rows and confidence)")
        rows, extracts, public = int(head["rows_used"]), [], []
        for r in self.records:
            st, kind = r["statistic"], r["type"]
            if r is head:
                continue
            if st == "extract":
                extracts.append(str(r["value"]))
            elif st == "public column":
                public.append(str(r["column"]))
            elif kind in ("crosstab", "grouped mean"):
                self._joint(r)
            elif st == "decoder" and r["column"] in self.columns:   # how a column's frequencies were decoded
                self.columns[r["column"]].update(decoder=_text(r["value"]), decoder_method=_text(r["method"]))
            else:
                self._column(r, rows)
        columns = {n: self._column_result(b) for n, b in self.columns.items()}
        xt = tuple(self._crosstab(j) for j in self.joint if j["kind"] == "crosstab")
        gm = tuple(GroupedMeanResult(j["first"], j["second"], j["rows_used"], tuple(j["items"]))
                   for j in self.joint if j["kind"] == "grouped mean")
        return EstimateResult(rows, float(head["confidence"]), columns, head["method"] or "", xt, gm,
                              tuple(extracts), tuple(public))

    def _column(self, r: dict[str, Any], rows: int) -> None:  # noqa: C901 (one branch per statistic)
        name, st = r["column"], r["statistic"]
        if st == "column":
            lo, hi = _num(r["low"]), _num(r["high"])
            used = _int(r["rows_used"])
            self.columns[name] = {
                "name": name, "type": r["type"], "mechanism": r["mechanism"], "epsilon": _num(r["epsilon"]),
                "family": r["value"], "rows_reported": None if used == rows else used,
                "consistent_method": r["method"], "bounds": None if lo is None or hi is None else (lo, hi),
                "estimand": r["estimand"] or "", "frequencies": [], "mean": None, "distribution": None}
            return
        b = self.columns.get(name)
        if b is None:
            raise self._refuse(f"the frame has a {st!r} row of column {name!r} before the column's 'column' row")
        est, se, lo, hi = _ci(r)
        what = r["estimand"] or ""
        d = b["distribution"]
        if st == "frequency":
            count: Any = _num(r["count_estimate"])   # None where the JSON has null
            b["frequencies"].append(FrequencyResult(str(r["value"]), est, se, lo, hi, count, _num(r["consistent"]),
                                                    what))
        elif st == "mean":
            b["mean"] = MeanResult(est, se, lo, hi, r["note"], what)
        elif st == "distribution":
            col, enc = r["column"], b["estimand"]
            among = what.removeprefix(f"the distribution of {col} among ")
            among = among.removesuffix(f"; {enc}") if enc else among
            b["distribution"] = {"method": r["method"] or "", "among": among, "quantiles": [], "ranges": [],
                                 "mass": [], "edges": [], "x": [], "F": []}
        elif st == "quantile" and d is None and b["family"] == "quantile":   # the one quantile of its family
            b["quantile"] = QuantileResult(float(r["value"]), est, se, lo, hi, r["method"], what)
        elif d is None:
            raise self._refuse(f"the frame has a {st!r} row of column {name!r} before its 'distribution' row")
        elif st == "quantile":
            d["quantiles"].append(QuantileResult(float(r["value"]), est, se, lo, hi, r["method"], what))
        elif st == "range share":
            d["ranges"].append(RangeResult(_num(r["low"]), _num(r["high"]), est, se, lo, hi,  # type: ignore[arg-type]
                                           r["method"], what))
        elif st == "histogram":
            if not d["edges"]:
                d["edges"].append(_num(r["low"]))
            d["edges"].append(_num(r["high"]))
            d["mass"].append(est)
        elif st == "cdf":
            d["x"].append(_num(r["high"]))
            d["F"].append(est)
        else:
            raise self._refuse(f"the frame has a row with statistic {st!r} (column {name!r}), which no estimate has")

    @staticmethod
    def _column_result(b: dict[str, Any]) -> ColumnResult:
        d = b.pop("distribution")
        dist = None if d is None else DistributionResult(
            d["method"], tuple(d["quantiles"]), tuple(d["ranges"]), tuple(d["x"] or d["edges"]), tuple(d["mass"]),
            tuple(d["F"]), among=d["among"])
        return ColumnResult(**{**b, "frequencies": tuple(b["frequencies"]), "distribution": dist})

    def _joint(self, r: dict[str, Any]) -> None:
        key = (r["type"], r["first"], r["second"])
        if not self.joint or self.joint[-1]["key"] != key:
            self.joint.append({"key": key, "kind": r["type"], "first": r["first"], "second": r["second"],
                               "rows_used": _int(r["rows_used"]), "method": r["method"] or "", "items": [],
                               "cells": {}})
        j = self.joint[-1]
        est, se, lo, hi = _ci(r)
        m = MeanResult(est, se, lo, hi, estimand=r["estimand"] or "")
        if r["second_value"] is None:          # an analysis without cells or groups
            return
        if j["kind"] == "grouped mean":
            j["items"].append(GroupMean(str(r["second_value"]), m, _num(r["share"]), r["note"],
                                        _num(r["consistent"])))
        elif r["statistic"] == "joint share":
            j["cells"][(r["first_value"], r["second_value"])] = (m, _num(r["consistent"]))
        else:
            labels = (r["first_value"], r["second_value"])
            joint, cons = j["cells"].pop(labels, (None, None))
            if joint is None:
                raise self._refuse(f"cross-tab {r['column']!r}: the share within row of cell {labels} comes before "
                                   "its joint share")
            j["items"].append(CrossTabCell(str(labels[0]), str(labels[1]), joint, cons, m, _num(r["consistent"])))

    @staticmethod
    def _crosstab(j: dict[str, Any]) -> CrossTabResult:
        return CrossTabResult(j["first"], j["second"], j["rows_used"], tuple(j["items"]), j["method"])


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

    def to_frame(self) -> pd.DataFrame:
        """One row: check, status, ok, detail."""
        import pandas as pd

        return pd.DataFrame([{"check": self.name, "status": self.status, "ok": self.ok, "detail": self.detail}],
                            columns=["check", "status", "ok", "detail"], dtype=object)


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


CALIBRATION_FRAME_COLUMNS = ("column", "statistic", "value", "truth", "estimate", "se", "ci_low", "ci_high", "inside",
                             "score", "estimand")
_CALIBRATION_SUMMARY = ("statistics", "inside", "share_inside", "confidence", "max_abs_z", "max_abs_z_at", "z_limit")


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
        """One row per statistic checked (``CALIBRATION_FRAME_COLUMNS``: the truth from the raw
        data beside the estimate and its interval; ``inside`` and ``score`` None where the
        statistic has no interval); the summary (``to_dict()``) is in the report's frame."""
        frame = _pd().DataFrame([{c: getattr(e, c) for c in CALIBRATION_FRAME_COLUMNS} for e in self.entries],
                                columns=list(CALIBRATION_FRAME_COLUMNS), dtype=object)
        return _typed(frame, ("truth", "estimate", "se", "ci_low", "ci_high", "score"))

    __hash__ = None  # type: ignore[assignment]


VALIDATION_FRAME_COLUMNS = ("check", "status", "ok", "detail", "extract", "manifest", *_CALIBRATION_SUMMARY)
"""The columns of ``ValidationReport.to_frame()``, in order."""


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
        """One row per check, in order (``VALIDATION_FRAME_COLUMNS``): check, status (pass, warn,
        fail), ok (True, None, False), detail, and the extract and manifest checked; the
        calibration's summary figures (``CalibrationResult.to_dict()``) fill their columns on the
        row of the check named "calibration" (a row of its own, without status, if there is no
        such check).  ``ValidationReport.from_frame`` reads it back."""
        files = {"extract": self.extract, "manifest": self.manifest}
        rows = [{**dict.fromkeys(VALIDATION_FRAME_COLUMNS), "check": c.name, "status": c.status, "ok": c.ok,
                 "detail": c.detail, **files} for c in self.checks]
        if self.calibration is not None:
            at = next((r for r in rows if r["check"] == "calibration"), None)
            if at is None:
                at = {**dict.fromkeys(VALIDATION_FRAME_COLUMNS), "check": "calibration", **files}
                rows.append(at)
            at.update(self.calibration.to_dict())
        if not rows:
            rows.append({**dict.fromkeys(VALIDATION_FRAME_COLUMNS), **files})
        frame = _pd().DataFrame(rows, columns=list(VALIDATION_FRAME_COLUMNS), dtype=object)
        return _typed(frame, ("share_inside", "confidence", "max_abs_z", "z_limit"), ("statistics", "inside"))

    @classmethod
    def from_frame(cls, frame: pd.DataFrame) -> ValidationReport:
        """The report a frame of ``to_frame()`` holds: its ``to_dict()`` is the original's with
        every non-finite figure as None (what the strict JSON of ``--format json`` holds); the
        calibration's per-statistic entries are not in the report's frame."""
        recs = _records(frame, VALIDATION_FRAME_COLUMNS)
        if not recs:
            raise ValueError("the frame has no rows: give a frame made by ValidationReport.to_frame()")
        ok = {"pass": True, "warn": None, "fail": False}
        checks = []
        for r in recs:
            if r["status"] is None:
                continue
            if r["status"] not in ok:
                raise ValueError(f"check {r['check']!r} has status {r['status']!r}: a status is pass, warn or fail")
            checks.append(Check(str(r["check"]), ok[r["status"]], str(r["detail"])))
        cal = next((r for r in recs if r["statistics"] is not None), None)
        calibration = None if cal is None else CalibrationResult(
            _int(cal["statistics"]), _int(cal["inside"]), _num(cal["share_inside"]),  # type: ignore[arg-type]
            _num(cal["confidence"]), _num(cal["max_abs_z"]), _text(cal["max_abs_z_at"]),  # type: ignore[arg-type]
            _num(cal["z_limit"]))  # type: ignore[arg-type]
        return cls(str(recs[0]["extract"]), str(recs[0]["manifest"]), tuple(checks), calibration)

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


def csv_cell(v: Any) -> str:
    """One cell of a result frame as CSV text: empty for a missing value (None, NaN, pandas'
    NA), the shortest exact text (repr) for a float, and text through ``spreadsheet_safe``."""
    v = _cell(v)
    if v is None:
        return ""
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, str):
        return spreadsheet_safe(v)
    return str(v)


def frame_csv(frame: pd.DataFrame) -> str:
    """A result frame (``to_frame()``) as CSV text, every row and column of it: a header row of
    its column names, then one line per row (``csv_cell``), floats written exactly."""
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([csv_cell(str(c)) for c in frame.columns])
    w.writerows([csv_cell(v) for v in row] for row in frame.itertuples(index=False, name=None))
    return buf.getvalue()


def finite(v: float | None) -> bool:
    return v is not None and math.isfinite(v)
