"""A starter policy from a table: the steward's first draft, to review line by line.

``draft_policy`` reads a CSV or Parquet table once, in batches (``io.TableSource``, the
release's own reader), keeps a steward-side profile of every column (missing cells, the
counts of at most ``DISTINCT_CAP`` distinct values, how nearly unique the values are within
each batch, and for numbers a compact quantile summary) and writes a commented YAML policy:

* a type per column; identifiers (by name, or text / code-like whole numbers nearly unique per row) are
  proposed as ``drop`` (one that looks like a person identifier also as a commented-out
  ``subject_key``);
* declared domains: a category seen fewer than ``min_count`` times is not proposed as its own
  category but left to ``unknown: as-category`` (released as ``<other>``); the draft says how
  many values were grouped, never which.  Numeric bounds are rounded outward to a round step
  from the 1st and 99th percentiles and never equal the observed minimum or maximum; a skewed
  column is proposed as bins;
* an eps per column: the smallest eps at which the planner (``plan.min_epsilon``) predicts the
  quality targets are met at the table's row count.

The draft is loaded back with ``policy.load_policy`` before it is moved into place (mode 0600,
by default in the steward's private folder, never in a folder that holds an extract or a
manifest).  The profile itself (counts, extremes) stays in memory: it is never written or shown.
"""

from __future__ import annotations

import json
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import yaml

from .errors import DataError, OptionError, OutputExistsError, PolicyError, UsageError, terminal_safe

DEFAULT_MIN_COUNT = 20          # rows a category needs to be proposed as its own (common practice, no published source)
DEFAULT_TARGET_SE = 0.02        # SE of each frequency share the draft plans for
DEFAULT_TARGET_RELATIVE_SE = 0.02   # SE of a mean as a share of the width of its bounds
DRAFT_DEFAULT_EPSILON = 1.0     # written when the planner cannot meet the targets at any eps
DISTINCT_CAP = 1000             # distinct values counted per column; a text column with more is dropped
SMALL_INT_LEVELS = 12           # whole-number columns with at most this many distinct values become categories
UNIQUE_SHARE = 0.9              # distinct values per non-missing row (within a batch) that marks an identifier
UNIQUE_MIN_ROWS = 20            # rows needed before that share means anything
CODE_SPREAD = 4                 # nearly unique whole numbers within CODE_SPREAD x rows of each other: a code
SKEW_LIMIT = 0.3                # |(p90 + p10 - 2 p50) / (p90 - p10)| above this: bins (a rule of thumb of ours)
SKETCH_POINTS = 1024            # quantile summary: points kept per batch
DRAFT_SUFFIXES = (".yaml", ".yml")

_NUMBER = r"^\s*[-+]?((\d+(\.\d*)?)|(\.\d+))([eE][-+]?\d+)?\s*$"
_TOKENS = re.compile(r"[A-Z]?[a-z]+|[A-Z]+(?![a-z])|\d+")
# words in a column name that mark a direct identifier or a strong quasi-identifier
IDENTIFIER_WORDS = frozenset({
    "id", "ids", "uid", "uuid", "guid", "ssn", "nin", "email", "mail", "name", "names", "firstname", "lastname",
    "surname", "forename", "fullname", "username", "login", "phone", "mobile", "telephone", "tel", "fax",
    "address", "street", "postcode", "zip", "zipcode", "ip", "iban", "passport", "dob", "birth", "birthdate",
    "birthday", "licence", "license", "account"})
# words that make an identifier look like the identifier of a person (a subject_key candidate)
_KEY_WORDS = frozenset({"id", "uid", "uuid", "guid", "number", "no", "key", "code"})


# words that make an identifier a poor subject_key (contact details, names, times)
_NOT_KEY_WORDS = frozenset({"email", "mail", "phone", "mobile", "telephone", "tel", "fax", "address", "street", "name",
                            "names", "firstname", "lastname", "surname", "forename", "fullname", "date", "time",
                            "timestamp", "when", "dob", "birth", "birthdate", "birthday", "ip"})


def _tokens(name: str) -> list[str]:
    return [t.lower() for t in _TOKENS.findall(name)]


# -- the profile (steward-only) -------------------------------------------------------------

@dataclass
class _Stats:
    """What one pass keeps of one column (all of it steward-only)."""

    kind: str                          # "text", "number" or "other" (a type the release cannot privatize)
    temporal: bool = False             # stored as a date or time (Parquet)
    rows: int = 0
    missing: int = 0
    counts: pa.Table | None = None     # distinct trimmed text -> rows (None once past DISTINCT_CAP)
    overflow: bool = False
    batch_distinct: int = 0            # sum over batches of the distinct values within the batch
    numeric: bool = True               # every non-missing value is a number the release reads
    whole: bool = True                 # every number is a whole number
    infinite: int = 0
    n: int = 0
    vmin: float = math.inf
    vmax: float = -math.inf
    points: list[np.ndarray] = field(default_factory=list)
    weights: list[np.ndarray] = field(default_factory=list)

    def add(self, values: pa.Array) -> None:
        if isinstance(values, pa.ChunkedArray):
            values = values.combine_chunks()
        if pa.types.is_dictionary(values.type):
            values = values.dictionary_decode()
        self.rows += len(values)
        if self.kind == "other":
            self.missing += values.null_count
            return
        t = values.type
        x: np.ndarray | None = None
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
            x = np.asarray(pc.cast(values, pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64)
            nan = np.isnan(x)
            self.missing += int(nan.sum())
            x = x[~nan]
            text = pc.cast(values, pa.string())
        else:
            text = values if (pa.types.is_string(t) or pa.types.is_large_string(t)) else pc.cast(values, pa.string())
            self.missing += text.null_count
            if self.numeric:
                ok = pc.fill_null(pc.match_substring_regex(text, _NUMBER), True)
                if pc.all(ok).as_py() is False:
                    self.numeric = False
                else:
                    f = pc.cast(pc.utf8_trim_whitespace(pc.drop_null(text)), pa.float64())
                    x = np.asarray(f.to_numpy(zero_copy_only=False), dtype=np.float64)
        text = pc.drop_null(pc.utf8_trim_whitespace(text))
        self.batch_distinct += int(pc.count_distinct(text).as_py())
        self._count(text)
        if x is not None and self.numeric:
            self._numbers(x)

    def _count(self, text: pa.Array) -> None:
        if self.overflow:
            return
        vc = pc.value_counts(text)
        part = pa.table({"value": vc.field("values"), "n": pc.cast(vc.field("counts"), pa.int64())})
        if self.counts is not None:
            both = pa.concat_tables([self.counts, part])
            part = both.group_by("value").aggregate([("n", "sum")]).rename_columns(["value", "n"])
        if part.num_rows > DISTINCT_CAP:
            self.overflow, self.counts = True, None
        else:
            self.counts = part

    def _numbers(self, x: np.ndarray) -> None:
        inf = np.isinf(x)
        if inf.any():
            self.infinite += int(inf.sum())
            x = x[~inf]
        if x.size == 0:
            return
        self.whole = self.whole and bool(np.all(x == np.floor(x)))
        self.n += x.size
        self.vmin, self.vmax = min(self.vmin, float(x.min())), max(self.vmax, float(x.max()))
        if x.size <= SKETCH_POINTS:
            self.points.append(np.sort(x))
            self.weights.append(np.ones(x.size))
        else:
            self.points.append(np.quantile(x, (np.arange(SKETCH_POINTS) + 0.5) / SKETCH_POINTS))
            self.weights.append(np.full(SKETCH_POINTS, x.size / SKETCH_POINTS))
        if sum(p.size for p in self.points) > 16 * SKETCH_POINTS:
            self._compact()

    def _compact(self) -> None:
        p, w = np.concatenate(self.points), np.concatenate(self.weights)
        order = np.argsort(p, kind="stable")
        p, w = p[order], w[order]
        cw = np.cumsum(w)
        at = (np.arange(SKETCH_POINTS) + 0.5) / SKETCH_POINTS * cw[-1]
        self.points = [p[np.minimum(np.searchsorted(cw, at), p.size - 1)]]
        self.weights = [np.full(SKETCH_POINTS, cw[-1] / SKETCH_POINTS)]

    def quantiles(self, qs: list[float]) -> list[float]:
        p, w = np.concatenate(self.points), np.concatenate(self.weights)
        order = np.argsort(p, kind="stable")
        p, cw = p[order], np.cumsum(w[order])
        idx = np.minimum(np.searchsorted(cw, np.asarray(qs) * cw[-1]), p.size - 1)
        return [float(v) for v in p[idx]]

    def distinct(self) -> int | None:
        return None if self.overflow or self.counts is None else self.counts.num_rows


def _kind(t: pa.DataType) -> str:
    if pa.types.is_dictionary(t):
        t = t.value_type
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
        return "number"
    if (pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_boolean(t) or pa.types.is_temporal(t)):
        return "text"
    return "other"


def profile_table(table: Path | str, *, batch_rows: int = 65536,
                  delimiter: str | None = None) -> tuple[int, dict[str, _Stats]]:
    """(rows, per-column profile) of a CSV or Parquet table in one streamed pass (steward-only).
    ``delimiter``: of a text table (default: a tab for .tsv/.tab, else a comma)."""
    from .io import TableSource
    from .policy import DEFAULT_CSV_NULLS

    src = TableSource(table, csv_null_values=list(DEFAULT_CSV_NULLS), delimiter=delimiter)
    names = src.column_names
    if not names:
        raise DataError(f"input {table} has no columns. Give a table with a header row (CSV) or a schema (Parquet).")
    stats = {n: _Stats("text" if src.format == "csv" else _kind(src.schema.field(n).type),
                       temporal=src.format != "csv" and pa.types.is_temporal(src.schema.field(n).type)) for n in names}
    rows = 0
    for batch in src.batches(names, batch_rows):
        rows += batch.num_rows
        for i, n in enumerate(names):
            stats[n].add(batch.column(i))
    if rows == 0:
        raise DataError(f"input {table} has no data rows: a draft is proposed from the table's values. Give the "
                        "table with its rows (the draft is steward-only and never leaves the private folder).")
    return rows, stats


# -- proposals --------------------------------------------------------------------------------

@dataclass
class ColumnDraft:
    """What the draft proposes for one column (no raw value of the data)."""

    name: str
    kind: str                          # categorical, numeric, binned or drop
    fields: dict[str, Any] = field(default_factory=dict)
    notes: dict[str, str] = field(default_factory=dict)   # field -> the REVIEW note on its line
    about: list[str] = field(default_factory=list)        # comment lines above the column
    grouped_values: int = 0            # distinct values left to <other>
    grouped_rows: int = 0
    subject_candidate: bool = False
    epsilon: float = 0.0               # the suggested eps (privatized columns)
    planner_note: str | None = None

    @property
    def summary(self) -> str:
        f = self.fields
        if self.kind == "categorical":
            extra = (" + missing" if f.get("missing") else "") + (" + other" if f.get("unknown") else "")
            text = f"{len(f['categories'])} categories{extra}"
            if self.grouped_values:
                text += f" ({self.grouped_values} rare value(s) grouped into <other>)"
            return text
        if self.kind == "binned":
            return f"{len(f['bins']) - 1} bins on [{_num(f['bins'][0])}, {_num(f['bins'][-1])}]"
        if self.kind == "numeric":
            return f"bounds [{_num(f['bounds'][0])}, {_num(f['bounds'][1])}]"
        return "not released"


def _num(v: float) -> str:
    from .policy import number_label

    return number_label(round(float(v), 10))


def _nice_step(x: float, whole: bool) -> float:
    """The smallest 1, 2, 2.5 or 5 times a power of ten at or above ``x`` (at least 1 for whole numbers)."""
    if not x > 0 or not math.isfinite(x):
        return 1.0
    e = math.floor(math.log10(x))
    for f in (1.0, 2.0, 2.5, 5.0, 10.0):
        step = f * 10.0 ** e
        if step >= x * (1 - 1e-12):
            break
    return max(step, 1.0) if whole else step


def _round_sig(v: float, whole: bool) -> float:
    """``v`` to two significant digits (whole numbers stay whole)."""
    if v == 0:
        return 0.0
    step = 10.0 ** (math.floor(math.log10(abs(v))) - 1)
    step = max(step, 1.0) if whole else step
    return round(round(v / step) * step, 10)


def _bounds(st: _Stats) -> tuple[float, float, float]:
    """Rounded, generalised bounds (lo, hi) from the 1st-99th percentiles, and the step used:
    outward to a round step, and one more step out where that lands on the observed extreme."""
    p_lo, p_hi = st.quantiles([0.01, 0.99])
    width = p_hi - p_lo
    if width <= 0:
        width = max(abs(p_hi), 1.0)
    step = _nice_step(width / 10.0, st.whole)
    lo = round(math.floor(p_lo / step + 1e-9) * step, 10)
    hi = round(math.ceil(p_hi / step - 1e-9) * step, 10)
    tol = 1e-9 * step
    if abs(lo - st.vmin) <= tol:
        lo = round(lo - step, 10)
    if abs(hi - st.vmax) <= tol:
        hi = round(hi + step, 10)
    if hi <= lo:
        hi = round(lo + step, 10)
    return lo, hi, step


def _skewed(st: _Stats) -> bool:
    p10, p50, p90 = st.quantiles([0.1, 0.5, 0.9])
    return p90 > p10 and abs((p90 + p10 - 2 * p50) / (p90 - p10)) > SKEW_LIMIT


def _bins(st: _Stats, lo: float, hi: float) -> list[float]:
    qs = st.quantiles([0.1, 0.25, 0.5, 0.75, 0.9])
    inner = sorted({_round_sig(q, st.whole) for q in qs})
    edges = [lo] + [e for e in inner if lo < e < hi] + [hi]
    if len(edges) < 3:
        edges = [lo, _round_sig((lo + hi) / 2, st.whole), hi]
        if not lo < edges[1] < hi:
            edges = [lo, round((lo + hi) / 2, 10), hi]
    return edges


def _label_sort_key(label: str) -> tuple[int, float, str]:
    try:
        return (0, float(label), label)
    except ValueError:
        return (1, 0.0, label)


def _drop(name: str, why: str, about: list[str] | None = None) -> ColumnDraft:
    return ColumnDraft(name, "drop", {"type": "drop"}, {"type": why}, about or [])


def propose_column(name: str, st: _Stats, min_count: int) -> ColumnDraft:
    """The draft's proposal for one column from its profile."""
    present = st.rows - st.missing
    toks = set(_tokens(name))
    if st.kind == "other":
        return _drop(name, "stored as a type the release cannot privatize (lists, structs or bytes); not released")
    if present == 0:
        return _drop(name, "every cell is missing: nothing to release")
    by_name = bool(toks & IDENTIFIER_WORDS)
    # numbers are an identifier only when they look like a code: whole numbers packed in a range a
    # few times the rows (staff numbers 10001..14000), not a measure spread widely (pay, amounts)
    code_like = st.numeric and st.whole and st.n > 0 and (st.vmax - st.vmin + 1) <= CODE_SPREAD * present
    unique = (present >= UNIQUE_MIN_ROWS and st.batch_distinct >= UNIQUE_SHARE * present
              and (not st.numeric or code_like))
    if by_name or unique:
        why = ("its name looks like an identifier" if by_name else
               "its values are nearly unique per row (an identifier)")
        d = _drop(name, f"{why}: never released; if it is not about a person, give it a type after review")
        d.subject_candidate = st.missing == 0 and not st.temporal and (unique or bool(toks & _KEY_WORDS)) and not (
            toks & _NOT_KEY_WORDS)
        return d
    distinct = st.distinct()
    if distinct == 1 and st.missing == 0:
        return _drop(name, "one value only: nothing to learn from it (type: public would copy it in the clear, "
                           "NOT protected by local DP)")
    small = st.numeric and st.whole and distinct is not None and distinct <= SMALL_INT_LEVELS
    if st.numeric and st.n > 0 and not small:
        return _propose_number(name, st, present, min_count)
    return _propose_categories(name, st, min_count)


def _propose_categories(name: str, st: _Stats, min_count: int) -> ColumnDraft:
    """A column released as categories: the values seen at least ``min_count`` times, the rest to <other>."""
    from .policy import MISSING_LABEL, OTHER_LABEL

    if st.distinct() is None:
        return _drop(name, f"more than {DISTINCT_CAP} distinct values: free text, an identifier or a fine code; "
                           "recode it into a few groups before release if partners need it")
    assert st.counts is not None
    values = st.counts.column("value").to_pylist()
    counts = st.counts.column("n").to_numpy()
    frequent = counts >= min_count
    # never a category: empty once trimmed, the reserved labels, and a stored NaN (the release reads it as "nan")
    reserved = ["", MISSING_LABEL, OTHER_LABEL] + (["nan"] if st.kind == "number" else [])
    unusable = np.isin(np.asarray(values, dtype=object), reserved)
    keep = frequent & ~unusable
    labels = [v for v, k in zip(values, keep) if k]
    grouped_values, grouped_rows = int((~frequent).sum()), int(counts[~frequent].sum())
    odd_values, odd_rows = int((frequent & unusable).sum()), int(counts[frequent & unusable].sum())
    if not labels:
        return _drop(name, f"no value is seen {min_count} times or more: every value would single people out; "
                           "recode it into larger groups before release")
    if len(labels) == 1 and grouped_values + odd_values == 0 and st.missing == 0:
        return _drop(name, "one value only: nothing to learn from it (type: public would copy it in the clear, "
                           "NOT protected by local DP)")
    labels.sort(key=_label_sort_key)
    d = ColumnDraft(name, "categorical", {"type": "categorical", "categories": labels}, {
        "type": "categories: text values" if not st.numeric else
                f"categories: whole numbers with at most {SMALL_INT_LEVELS} distinct values",
        "categories": f"the values seen at least {min_count} times (in label order, not by frequency); check it "
                      "is the full list partners may know"})
    d.grouped_values, d.grouped_rows = grouped_values, grouped_rows
    if grouped_values or odd_values:
        d.fields["unknown"] = "as-category"
        notes = []
        if grouped_values:
            notes.append(f"{grouped_values} value(s) seen fewer than {min_count} times ({grouped_rows} row(s)) are "
                         "not listed: they are released as <other>, so no rare value is named")
        if odd_values:
            notes.append(f"{odd_values} frequent value(s) ({odd_rows} row(s)) cannot be a category (empty once "
                         "trimmed, a stored NaN, or the reserved <missing> / <other>) and are released as <other> too")
        d.notes["unknown"] = "; ".join(notes)
    if st.missing:
        d.fields["missing"] = "as-category"
        d.notes["missing"] = "missing cells seen: released as the answer <missing>"
    return d


def _propose_number(name: str, st: _Stats, present: int, min_count: int) -> ColumnDraft:
    if present < min_count:
        return _drop(name, f"fewer than {min_count} values: too few to release without singling people out")
    lo, hi, _ = _bounds(st)
    about = ["the bounds are rounded outward from the 1st-99th percentiles (never the observed minimum or",
             "maximum, which is someone's value); values outside are clipped. Use the column's natural limits",
             "(e.g. 0) instead if they are known."]
    if st.infinite:
        about.append("infinite values seen: the release refuses them; clean the column first.")
    if _skewed(st):
        edges = _bins(st, lo, hi)
        d = ColumnDraft(name, "binned", {"type": "numeric", "bins": edges}, {
            "type": "numbers, released as bins (frequencies)",
            "bins": "skewed column: bins with rounded edges near its deciles and quartiles; values outside are "
                    "clipped into the first or last bin"}, about)
    else:
        d = ColumnDraft(name, "numeric", {"type": "numeric", "bounds": [lo, hi]}, {
            "type": "numbers, released as a bounded number (mean)",
            "bounds": "rounded, generalised bounds; values outside are clipped"}, about)
    if st.missing:
        d.fields["missing"] = "as-answer"
        d.notes["missing"] = ("missing cells seen: 'missing' is released as its own answer (or use {fill: V} "
                              "with a value within the bounds)")
    return d


def suggest_epsilon(d: ColumnDraft, rows: int, target_se: float, target_relative_se: float) -> float:
    """The smallest eps at which the planner predicts the targets are met at ``rows`` rows, or
    ``DRAFT_DEFAULT_EPSILON`` (with ``d.planner_note`` saying so) when no eps up to 50 does."""
    from .plan import min_epsilon
    from .policy import CategoricalColumn, NumericColumn, Quality, resolve_column

    model = CategoricalColumn if d.kind == "categorical" else NumericColumn
    col = model.model_validate({**d.fields, "epsilon": 1.0})
    quality = Quality(max_se=target_se, max_relative_se=target_relative_se)
    eps = min_epsilon(resolve_column(d.name, col), rows, 1.0, quality)
    if eps is None:
        d.planner_note = (f"the planner finds no eps up to 50 that meets the targets at {rows} rows: the "
                          f"placeholder {DRAFT_DEFAULT_EPSILON:g} is written; more rows or looser targets are needed")
        return DRAFT_DEFAULT_EPSILON
    what = "frequency share SE" if d.kind in ("categorical", "binned") else "mean SE as a share of the width"
    target = target_se if d.kind in ("categorical", "binned") else target_relative_se
    d.planner_note = (f"the smallest eps meeting a {what} of {target:g} at {rows} rows (planner); one report can "
                      f"shift the odds about a person's value by up to e^eps = {math.exp(eps):.3g}")
    return float(eps)


# -- the YAML text ----------------------------------------------------------------------------

def yaml_scalar(value: Any) -> str:
    """One YAML scalar on one line: text double-quoted (escapes for anything unprintable), numbers plain."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return _num(value)
    text = yaml.dump(str(value), default_style='"', allow_unicode=True, width=2 ** 31)
    return text.removesuffix("\n...\n").rstrip("\n")


def _flow(values: list[Any]) -> str:
    return "[" + ", ".join(yaml_scalar(v) for v in values) + "]"


HEADER = """\
# DRAFT release policy written by `ldpt policy draft` from a profile of the table. NOT REVIEWED.
# It is a starting point, not a decision: the steward must review every line with the privacy
# officer (and local law) before any release, and remove this header once done.
# - eps is a policy choice: the values below only meet the precision targets the planner was
#   given; they do not say how much protection is enough.
# - Local DP protects only the privatized columns: a column given type: public is copied in the
#   clear and is NOT protected.
# - Columns kept together can be linked with other sources (a place, a role and a length of
#   service may single a person out even when each column is randomized); drop what partners do
#   not need.
# - Every decision is marked `# REVIEW:`. Categories seen fewer than the minimum count are not
#   listed (they go to <other>); bounds are rounded outward, never an observed extreme.
# - This file is steward-only: keep it in a private folder; partners see the policy only through
#   the manifest of a release.
"""


def render(drafts: list[ColumnDraft], rows: int, min_count: int, target_se: float, target_relative_se: float,
           budget: float, delimiter: str | None = None) -> str:
    """The commented YAML text of the draft."""
    out = [HEADER.rstrip("\n"), "",
           f"# The minimum count ({min_count} rows) is a common practice for small cells, without a published "
           "source.", "budget:",
           f"  epsilon_per_row: {_num(budget)}   # REVIEW: the sum of the column eps below (split over the columns); "
           "a policy choice", "",
           f"# The targets the eps below were planned for, at {rows} rows:", "quality:",
           f"  max_se: {_num(target_se)}   # REVIEW: SE of each frequency share (ldpt plan and validate check it)",
           f"  max_relative_se: {_num(target_relative_se)}   # REVIEW: SE of a mean as a share of its bounds' width",
           "", "unlisted: error   # REVIEW: a data column this file does not name stops the release", ""]
    if delimiter is not None and delimiter != ",":
        out += ["input:", f"  csv_delimiter: {json.dumps(delimiter)}   # REVIEW: the delimiter the table was read "
                "with (--delimiter)", ""]
    subject = next((d for d in drafts if d.subject_candidate), None)
    if subject is not None:
        out += ["# REVIEW: this column looks like a person identifier. Uncomment to key memoized columns and the",
                "# per-person eps record on it (it stays type: drop, never released):",
                f"# subject_key: {yaml_scalar(subject.name)}", ""]
    out.append("columns:")
    for d in drafts:
        out.append(f"  {yaml_scalar(d.name)}:")
        out += [f"    # {line}" for line in d.about]
        for key, value in d.fields.items():
            text = _flow(value) if isinstance(value, list) else str(value)   # type, missing, unknown: fixed words
            note = d.notes.get(key, "proposed")
            out.append(f"    {key}: {text}   # REVIEW: {note}")
        if d.kind != "drop":
            out.append(f"    epsilon: {_num(d.epsilon)}   # REVIEW: {d.planner_note}")
    return "\n".join(out) + "\n"


# -- writing ----------------------------------------------------------------------------------

@dataclass
class DraftResult:
    """What ``draft_policy`` wrote (no raw value of the data)."""

    path: Path
    rows: int
    columns: list[ColumnDraft]
    epsilon_per_row: float
    subject_key: str | None

    def summary_lines(self) -> list[str]:
        return [f"{terminal_safe(d.name)}: {d.kind}, {d.summary}" + (f", eps {_num(d.epsilon)}" if d.kind != "drop"
                                                                      else "") for d in self.columns]


def _partner_folder(folder: Path) -> str | None:
    """What makes ``folder`` a folder partners receive (an extract's manifest, its signature, the
    parts of a dataset extract), or None."""
    try:
        names = os.listdir(folder)
    except OSError:
        return None
    for n in sorted(names):
        if n.endswith(".manifest.json") or n == "manifest.json" or n.endswith(".manifest.json.sig"):
            return f"the manifest {n}"
        if re.fullmatch(r"part-\d{5,}\.parquet", n):
            return f"the dataset extract part {n}"
    return None


def default_draft_path(table: Path | str) -> Path:
    """Where the draft goes without --out: the steward's private folder, named after the table."""
    from .io import private_dir

    stem = Path(str(table).rstrip("/")).name.split(".")[0] or "table"
    return private_dir() / f"{stem}.policy-draft.yaml"


def check_draft_destination(out: Path, table: Path | str, overwrite: bool) -> None:
    """Refuse (exit 2, or 5 for an existing file without ``overwrite``) a destination that is not
    a .yaml file, lies beside a release partners receive, or is the table, a key or a ledger."""
    from .outputs import INPUT, check_outputs

    if out.suffix.lower() not in DRAFT_SUFFIXES:
        raise UsageError(f"--out {out}: the draft is a YAML policy; give a path ending in .yaml or .yml.")
    beside = _partner_folder(out.parent)
    if beside is not None:
        raise UsageError(f"--out {out} lies in {out.parent}, which holds {beside}: that folder is what partners "
                         "receive, and the draft is steward-only (it is read off the data). Give --out a path in a "
                         "private folder (mode 0700), or leave it out to use the steward's private folder.")
    check_outputs([("policy draft", out)], [(INPUT, Path(table))], overwrite=overwrite)


def draft_policy(table: Path | str, out: Path | str | None = None, *, min_count: int = DEFAULT_MIN_COUNT,
                 target_se: float = DEFAULT_TARGET_SE, target_relative_se: float = DEFAULT_TARGET_RELATIVE_SE,
                 overwrite: bool = False, batch_rows: int = 65536, delimiter: str | None = None) -> DraftResult:
    """Profile ``table`` (CSV or Parquet) in one streamed pass and write a commented draft policy
    to ``out`` (default: the steward's private folder), mode 0600, loaded back as a valid policy
    before it is moved into place.  Refused (nothing written): an ``out`` that exists without
    ``overwrite`` (exit 5), that is not .yaml/.yml, lies beside an extract or manifest, or is the
    table, a key or a ledger (exit 2).  ``delimiter``: of a text table (one character, or ``tab``;
    default: a tab for .tsv/.tab, else a comma); a delimiter other than the comma is written into
    the draft's ``input.csv_delimiter``, so that releases read the table as it was profiled."""
    from .io import delimiter_option, delimiter_problem, partial_path, remove_stale_partials
    from .policy import load_policy

    if isinstance(min_count, bool) or not (isinstance(min_count, int) and min_count >= 1):
        raise OptionError("draft_policy", f"{{min_count}} must be a whole number of rows of at least 1, got "
                                          f"{min_count!r}.")
    for name, v in (("target_se", target_se), ("target_relative_se", target_relative_se)):
        if isinstance(v, bool) or not (isinstance(v, (int, float)) and math.isfinite(v) and 0 < v < 1):
            raise OptionError("draft_policy", f"{{{name}}} must be a number between 0 and 1 (a standard error as "
                                              f"a share), got {v!r}.")
    if delimiter is not None:
        delimiter = delimiter_option(delimiter)
        problem = delimiter_problem(delimiter)
        if problem:
            raise OptionError("draft_policy", f"the {{delimiter}} {delimiter!r} {problem}. Give another delimiter.")
    dest = Path(out) if out is not None else default_draft_path(table)
    check_draft_destination(dest, table, overwrite)
    rows, stats = profile_table(table, batch_rows=batch_rows, delimiter=delimiter)
    drafts = [propose_column(n, st, min_count) for n, st in stats.items()]
    if not any(d.kind != "drop" for d in drafts):
        raise DataError(f"input {table}: no column could be proposed for release (every one looks like an "
                        "identifier, is empty, or has no value seen often enough); a policy needs at least one "
                        "released column. Recode the table into coarser groups, or write the policy by hand.")
    total = 0.0
    for d in drafts:
        if d.kind != "drop":
            d.epsilon = suggest_epsilon(d, rows, target_se, target_relative_se)
            total += d.epsilon
    budget = math.ceil(round(total, 9) * 100 - 1e-6) / 100
    subject = next((d.name for d in drafts if d.subject_candidate), None)
    text = render(drafts, rows, min_count, target_se, target_relative_se, budget, delimiter)
    check_draft_destination(dest, table, overwrite)   # again: the pass may have taken a while
    remove_stale_partials(dest)
    tmp = partial_path(dest)
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        try:
            load_policy(tmp)
        except PolicyError as err:   # a draft that is not a valid policy is a bug (exit 3): never put in place
            raise RuntimeError(f"the policy draft does not load back as a valid policy: {err}") from err
        if dest.exists() and not overwrite:
            raise OutputExistsError(f"policy draft {dest} already exists. Give --overwrite to replace it, or choose "
                                    "another path.")
        os.replace(tmp, dest)
    finally:
        if tmp.exists():
            tmp.unlink()
    return DraftResult(dest, rows, drafts, budget, subject)


__all__ = ["draft_policy", "profile_table", "propose_column", "suggest_epsilon", "render", "yaml_scalar",
           "ColumnDraft", "DraftResult", "default_draft_path", "check_draft_destination", "DEFAULT_MIN_COUNT",
           "DEFAULT_TARGET_SE", "DEFAULT_TARGET_RELATIVE_SE", "DRAFT_DEFAULT_EPSILON", "DISTINCT_CAP"]
