"""Check a policy against the steward's raw table, before a release (``ldpt policy check POLICY
--data TABLE``): every problem of every column in one streamed pass, each with its column, the
number of rows it concerns and a few example rows and values.

The table is read through the release's own reader (``io.TableSource``, in batches) and each
column is judged by the release's own rules (``release/encode.py``: values trimmed and looked up
among the labels, the same test of what text is a number, the same bounds, missing-value and
unknown-category handling; ``release/central.py``: one row per person), so the report says what
a release would do with the table: refuse it, change values (clip, fill, ``<other>``) or take it
as it is.

The report shows raw values of the table (the examples): it is for the steward only, printed on
the steward's terminal, never written beside an extract or handed to partners.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import yaml

from .errors import UsageError, terminal_safe
from .io import TableSource, delimiter_option, delimiter_problem
from .policy import MISSING_LABEL, OTHER_LABEL, LoadedPolicy, ResolvedColumn, load_policy
from .release.encode import _NUMBER, _as_string_array, _label_codes
from .release.memo import MAX_SUBJECT_BYTES
from .release.options import DEFAULT_BATCH_ROWS

__all__ = ["MAX_EXAMPLES", "MAX_VALUE_CHARS", "STEWARD_ONLY", "DataCheckReport", "Finding", "check_data",
           "invalid_utf8_rows"]

Severity = Literal["error", "warning", "note"]
SEVERITIES: tuple[Severity, ...] = ("error", "warning", "note")
MAX_EXAMPLES = 5          # example rows kept per problem (distinct values first)
FEW_EXAMPLES = 3          # ... of which rows repeating a value already shown fill at most this many
MAX_VALUE_CHARS = 40      # an example value is cut to this many characters
STEWARD_ONLY = "steward-only: shows raw values from the table; never send it to partners"
# YAML's own rule for the words it reads as booleans (PyYAML's resolver: yes/no/on/off/true/false)
_YAML_BOOL = next("".join(rx.pattern.split()) for rxs in yaml.SafeLoader.yaml_implicit_resolvers.values()
                  for tag, rx in rxs if tag.endswith(":bool"))
_YAML_BOOL_RE = re.compile(_YAML_BOOL)


@dataclass
class Finding:
    """One problem: its ``column`` (None for the table as a whole), ``kind`` (a stable name),
    ``severity`` (error: a release would refuse the table; warning: a release would change these
    values, or read them otherwise than they look; note: taken as the policy says, worth knowing),
    ``rows`` (how many rows; None for a problem of the column itself), up to MAX_EXAMPLES
    ``examples`` as (data row, value shown), and ``message`` (what a release does and how to fix)."""

    column: str | None
    kind: str
    severity: Severity
    rows: int | None
    message: str
    examples: list[tuple[int, str | None]] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {"column": self.column, "kind": self.kind, "severity": self.severity, "rows": self.rows,
                "examples": [{"row": r, "value": v} for r, v in self.examples], "message": self.message}


@dataclass
class DataCheckReport:
    """The result of ``check_data``.  ``ok``: no error and no warning (notes do not fail the
    check).  STEWARD ONLY: the examples are raw values of the table."""

    policy: str
    table: str
    format: str
    rows: int
    findings: list[Finding]

    @property
    def ok(self) -> bool:
        return not any(f.severity in ("error", "warning") for f in self.findings)

    def counts(self) -> dict[str, int]:
        return {s: sum(f.severity == s for f in self.findings) for s in SEVERITIES}

    def to_dict(self) -> dict[str, Any]:
        """The shape of `ldpt policy check POLICY --data TABLE --format json` (docs/policy.md)."""
        return {"steward_only": True, "notice": STEWARD_ONLY, "policy": self.policy, "table": self.table,
                "format": self.format, "rows": self.rows, "ok": self.ok, "counts": self.counts(),
                "problems": [f.to_dict() for f in self.findings]}


# -- showing a value -----------------------------------------------------------------------

def show_value(value: Any) -> str | None:
    """An example value as the report keeps it (None: missing): bytes that are not UTF-8 as \\xNN,
    control characters made visible, at most MAX_VALUE_CHARS characters (cut ones end in ...)."""
    if value is None:
        return None
    if isinstance(value, (bytes, bytearray, memoryview)):
        text = bytes(value).decode("utf-8", errors="backslashreplace")
    else:
        text = str(value)
    text = terminal_safe(text)
    if len(text) > MAX_VALUE_CHARS:
        text = text[:MAX_VALUE_CHARS - 3] + "..."
    return text


def example_text(value: str | None) -> str:
    """An example as the terminal shows it: in quotes, so that spaces show; <missing> for none."""
    return MISSING_LABEL if value is None else f"'{value}'"


# -- UTF-8, vectorized ---------------------------------------------------------------------

def invalid_utf8_rows(values: pa.Array) -> np.ndarray:
    """Per row of a binary (or text) array: True where its bytes are not valid UTF-8 (numpy over
    the array's bytes: lead bytes and their continuation bytes, overlong forms, surrogates and code
    points above U+10FFFF refused as Python's codec refuses them)."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    n = len(values)
    if n == 0:
        return np.zeros(0, dtype=bool)
    arr = pc.cast(values, pa.large_binary())
    bufs = arr.buffers()
    offs = np.frombuffer(bufs[1], dtype=np.int64)[arr.offset: arr.offset + n + 1]
    start = int(offs[0])
    raw = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else np.zeros(0, dtype=np.uint8)
    data = raw[start:int(offs[-1])]
    offs = offs - start
    high = np.flatnonzero(data >= 0x80)
    bad_rows = np.zeros(n, dtype=bool)
    if high.size == 0:
        return bad_rows
    b = data[high]
    row_of = np.searchsorted(offs, high, side="right") - 1
    row_end = offs[row_of + 1]
    length = np.select([(b >= 0xC2) & (b <= 0xDF), (b >= 0xE0) & (b <= 0xEF), (b >= 0xF0) & (b <= 0xF4)],
                       [2, 3, 4], default=0)
    lead = length > 0
    cont = (b >= 0x80) & (b <= 0xBF)
    bad_byte = ~lead & ~cont  # C0, C1, F5..FF
    covered = np.zeros(data.size, dtype=bool)
    lead_ok = lead.copy()
    for k in (1, 2, 3):
        need = lead & (length > k)
        q = high + k
        inside = need & (q < row_end)
        nxt = np.zeros(b.size, dtype=np.uint8)
        nxt[inside] = data[q[inside]]
        ok_k = inside & (nxt >= 0x80) & (nxt <= 0xBF)
        if k == 1:  # the second byte's narrower ranges (overlong forms, surrogates, above U+10FFFF)
            ok_k &= ~((b == 0xE0) & (nxt < 0xA0)) & ~((b == 0xED) & (nxt > 0x9F))
            ok_k &= ~((b == 0xF0) & (nxt < 0x90)) & ~((b == 0xF4) & (nxt > 0x8F))
        lead_ok &= ~need | ok_k
        covered[q[ok_k]] = True
    stray = cont & ~covered[high]
    bad_rows[row_of[bad_byte | (lead & ~lead_ok) | stray]] = True
    return bad_rows


# -- accumulating findings over batches ----------------------------------------------------

class _Tally:
    """Counts and the first examples of each (column, kind) problem, batch after batch."""

    def __init__(self) -> None:
        self.items: dict[tuple[str | None, str], Finding] = {}

    def add(self, column: str | None, kind: str, severity: Severity, message: str, mask: np.ndarray,
            values: pa.Array | None, row0: int) -> None:
        count = int(np.count_nonzero(mask))
        if count == 0:
            return
        f = self.items.get((column, kind))
        if f is None:
            f = self.items[(column, kind)] = Finding(column, kind, severity, 0, message)
        assert f.rows is not None
        f.rows += count
        room = MAX_EXAMPLES - len(f.examples)
        if room <= 0:
            return
        idx = np.flatnonzero(mask)
        if values is not None and (pa.types.is_string(values.type) or pa.types.is_large_string(values.type)):
            values = pc.cast(values, pa.large_binary())  # as bytes: a cell that is not UTF-8 is shown too
        if values is not None:  # the first row of each distinct value, values not shown yet first
            codes = _np(pc.dictionary_encode(values.take(pa.array(idx))).indices)
            _, first = np.unique(codes, return_index=True)
            first.sort()
            shown = {v for _, v in f.examples}
            picked = [(int(i), show_value(values[int(i)].as_py())) for i in idx[first[:MAX_EXAMPLES]]]
            fresh = [p for p in picked if p[1] not in shown]
            rest = [int(i) for i in idx[:MAX_EXAMPLES] if int(i) not in {p[0] for p in fresh}]
            fill = max(0, FEW_EXAMPLES - len(f.examples) - len(fresh))  # repeats of a value only to show a few
            chosen = (fresh + [(i, show_value(values[i].as_py())) for i in rest[:fill]])[:room]
            f.examples.extend(sorted(((row0 + i + 1, v) for i, v in chosen), key=lambda e: e[0]))
        else:
            f.examples.extend((row0 + int(i) + 1, None) for i in idx[:max(0, FEW_EXAMPLES - len(f.examples))])

    def column_problem(self, column: str | None, kind: str, severity: Severity, message: str) -> None:
        self.items[(column, kind)] = Finding(column, kind, severity, None, message)


class _Repeats:
    """Values seen before, over batches: sorted runs of 64-bit hashes merged as they grow (each
    batch is looked up by binary search in every run), as the release's one-row-per-person check
    hashes the subject column (8 bytes a row)."""

    def __init__(self) -> None:
        self.runs: list[np.ndarray] = []

    def seen_before(self, h: np.ndarray) -> np.ndarray:
        rep = np.zeros(h.size, dtype=bool)
        for run in self.runs:
            pos = np.minimum(np.searchsorted(run, h), run.size - 1)
            rep |= run[pos] == h
        uniq, first = np.unique(h, return_index=True)
        within = np.ones(h.size, dtype=bool)
        within[first] = False  # a later row of a value this batch already had
        rep |= within
        self.runs.append(uniq)
        while len(self.runs) > 1 and self.runs[-2].size <= 2 * self.runs[-1].size:
            last = self.runs.pop()
            self.runs[-1] = np.union1d(self.runs[-1], last)
        return rep


# -- one column of one batch ---------------------------------------------------------------

def _is_text(t: pa.DataType) -> bool:
    if pa.types.is_dictionary(t):
        return _is_text(t.value_type)
    return (pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_binary(t)
            or pa.types.is_large_binary(t) or pa.types.is_fixed_size_binary(t))


def _nested(t: pa.DataType) -> bool:
    return _nested(t.value_type) if pa.types.is_dictionary(t) else pa.types.is_nested(t)


def _np(a: Any) -> np.ndarray:
    return np.asarray(a.to_numpy(zero_copy_only=False))


@dataclass
class _Text:
    """A column of a batch as text: ``text`` (null where missing or not UTF-8), ``bad`` (rows not UTF-8)."""

    text: pa.Array | None   # None: the column is stored as numbers (or booleans), not text
    bad: np.ndarray
    raw: pa.Array


def _as_text(values: pa.Array) -> _Text:
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_dictionary(values.type):
        values = values.dictionary_decode()
    n = len(values)
    if not _is_text(values.type):
        return _Text(None, np.zeros(n, dtype=bool), values)
    binary = values if not (pa.types.is_string(values.type) or pa.types.is_large_string(values.type)) \
        else pc.cast(values, pa.large_binary())
    bad = invalid_utf8_rows(binary)
    if bad.any():
        binary = pc.if_else(pa.array(bad), pa.scalar(None, binary.type), binary)
    return _Text(pc.cast(binary, pa.large_string()), bad, values)


class _Checker:
    def __init__(self, lp: LoadedPolicy, src: TableSource) -> None:
        self.lp, self.src = lp, src
        self.tally = _Tally()
        self.repeats = _Repeats()
        pol = lp.policy
        self.subject = pol.subject_key
        self.memoized = any(rc.memoize for rc in lp.columns)
        self.ledger = pol.budget.lifetime_epsilon is not None
        self.one_row = pol.output.one_row_per_person and self.subject is not None

    # problems of the layout (before any row is read) ------------------------------------

    def layout(self) -> list[ResolvedColumn]:
        """Column-level problems; the policy columns to read."""
        lp, src, t = self.lp, self.src, self.tally
        names = src.column_names
        by_name = lp.by_name
        if self.subject is not None and self.subject not in names:
            t.column_problem(self.subject, "subject_key_not_in_table", "error",
                             f"the policy's subject_key {self.subject!r} is not a column of the table, so a release "
                             "refuses it. Name the column that identifies a person, or remove subject_key (and "
                             "memoize, lifetime_epsilon) from the policy.")
        for name in by_name:
            if name not in names:
                t.column_problem(name, "policy_column_not_in_table", "error",
                                 "the policy names this column but the table has none of that name, so a release "
                                 "refuses the table. Fix the name in the policy or remove the entry.")
        for name in names:
            if name in by_name or name == self.subject:
                continue
            if lp.policy.unlisted == "error":
                t.column_problem(name, "table_column_not_in_policy", "error",
                                 "the table has this column but the policy does not name it, and the policy says "
                                 "unlisted: error, so a release refuses the table. Add it to the policy (type: drop "
                                 "to leave it out), or set unlisted: drop.")
            else:
                t.column_problem(name, "table_column_not_in_policy", "note",
                                 "the policy does not name this column; it says unlisted: drop, so a release leaves "
                                 "it out (never read, never released).")
        return [rc for rc in lp.columns if rc.name in names and rc.type != "drop" and rc.name != self.subject
                and self._readable(rc)]

    def _readable(self, rc: ResolvedColumn) -> bool:
        """Problems of a policy column the table has; False when its values cannot be checked."""
        lp, src, t = self.lp, self.src, self.tally
        nulls = set(lp.policy.input.csv_null_values)
        if src.format == "csv" and rc.type == "categorical":
            clash = [lab for lab in rc.labels if lab in nulls]
            if clash:
                t.column_problem(rc.name, "category_is_missing_marker", "error",
                                 f"categor{'ies' if len(clash) > 1 else 'y'} {', '.join(map(repr, clash))} "
                                 "of the policy is also a CSV missing-value marker (input.csv_null_values), so "
                                 "such cells would be read as missing; a release refuses the policy. Remove it "
                                 "from input.csv_null_values or rename the category.")
        ftype = src.schema.field(rc.name).type
        if src.format == "parquet" and _nested(ftype):
            if rc.type != "public":
                t.column_problem(rc.name, "several_values_per_cell", "error",
                                 f"the table stores this column as {ftype}, several values per cell, and a "
                                 f"{rc.type} column takes one value per cell, so a release refuses it. Flatten "
                                 "it to one value per row, or drop it in the policy (type: drop).")
            else:
                t.column_problem(rc.name, "several_values_per_cell", "note",
                                 f"the table stores this public column as {ftype}, several values per cell: "
                                 "a Parquet extract copies it, a CSV extract cannot hold it (a release to CSV "
                                 "refuses it).")
            return False
        value_type = ftype.value_type if pa.types.is_dictionary(ftype) else ftype
        if src.format == "parquet" and rc.type in ("numeric", "binned") and not (
                pa.types.is_integer(value_type) or pa.types.is_floating(value_type)
                or pa.types.is_decimal(value_type) or pa.types.is_boolean(value_type)
                or pa.types.is_string(value_type) or pa.types.is_large_string(value_type)):
            t.column_problem(rc.name, "not_numbers", "error",
                             f"the table stores this numeric column as {ftype}, which a release refuses. Convert "
                             "it to numbers, or change the column's type in the policy.")
            return False
        if src.format == "parquet" and rc.type in ("numeric", "binned") and _is_text(ftype):
            t.column_problem(rc.name, "numbers_stored_as_text", "note",
                             f"the table stores this numeric column as text ({ftype}); a release reads each "
                             "cell's text as a number (text that is not a number is listed separately). "
                             "Storing it as numbers avoids surprises in other tools.")
        return True

    # per batch ----------------------------------------------------------------------------

    def batch(self, batch: pa.RecordBatch, cols: list[ResolvedColumn], row0: int) -> None:
        for rc in cols:
            tx = _as_text(batch.column(rc.name))
            if tx.bad.any():
                self.tally.add(rc.name, "not_utf8", "error",
                               "text that is not valid UTF-8 (an encoding problem; shown with \\xNN for the bytes "
                               "that are not): a release refuses the table. Re-encode the column as UTF-8 (for "
                               "example from Latin-1 or Windows-1252) in the input.", tx.bad, tx.raw, row0)
            if rc.type == "categorical":
                self._categorical(rc, tx, row0)
            elif rc.type in ("numeric", "binned"):
                self._numeric(rc, tx, row0)
        if self.subject is not None and self.subject in batch.schema.names:
            self._subject(batch.column(self.subject), row0)

    def _categorical(self, rc: ResolvedColumn, tx: _Text, row0: int) -> None:
        name, t = rc.name, self.tally
        strings = tx.text if tx.text is not None else _as_string_array(tx.raw)
        codes, missing = _label_codes(strings, rc.labels)   # the release's lookup: trimmed, then matched
        missing &= ~tx.bad
        if rc.missing_code is None:
            t.add(name, "missing", "error", "missing values, and the policy says missing: error (the default), so a "
                  "release refuses the table. Fill them in the input, or set missing: as-category to randomize "
                  f"them as {MISSING_LABEL!r}.", missing, None, row0)
        else:
            t.add(name, "missing", "note", f"missing values: released as {MISSING_LABEL!r} (missing: as-category), "
                  "randomized like any other answer.", missing, None, row0)
        unknown = (codes < 0) & ~missing & ~tx.bad
        trimmed = pc.utf8_trim_whitespace(strings)
        refused = rc.other_code is None
        then = ("the policy says unknown: error (the default), so a release refuses the table" if refused else
                f"released as {OTHER_LABEL!r} (unknown: as-category), which partners cannot tell apart")
        sev: Severity = "error" if refused else "warning"
        if unknown.any():
            boolish = _np(pc.fill_null(pc.match_substring_regex(trimmed, _YAML_BOOL), False)) & unknown
            if any(_YAML_BOOL_RE.fullmatch(lab) for lab in rc.labels) or pa.types.is_boolean(tx.raw.type):
                t.add(name, "boolean_spelling", sev, "values that YAML reads as booleans (yes/no, on/off, "
                      f"true/false in any of their spellings) but that are none of the declared categories "
                      f"({', '.join(map(repr, rc.labels[:6]))}{', ...' if len(rc.labels) > 6 else ''}): {then}. "
                      "Write the data's values as the policy's categories, or declare those spellings (quoted, "
                      "e.g. \"yes\") among the categories.", boolish, tx.raw, row0)
                unknown &= ~boolish
            folded = pc.utf8_lower(trimmed)
            case_only = unknown & _np(pc.is_in(folded, value_set=pa.array([lab.lower() for lab in rc.labels],
                                                                           pa.string())))
            numeric_labels = [float(lab) for lab in rc.labels if re.fullmatch(_NUMBER, lab)]
            if numeric_labels:  # '3.0' for the category 3: the release matches the text, not the number
                number = pc.if_else(pc.fill_null(pc.match_substring_regex(trimmed, _NUMBER), False), trimmed,
                                    pa.scalar(None, trimmed.type))
                same = unknown & _np(pc.is_in(pc.cast(number, pa.float64()), value_set=pa.array(numeric_labels)))
                t.add(name, "number_written_differently", sev, "values that are a declared category as a number "
                      "but written otherwise (such as 3.0 or 03 for the category 3; the release matches the text): "
                      f"{then}. Write them as the policy does (a spreadsheet export often adds .0), or declare that "
                      "spelling.", same, tx.raw, row0)
                unknown &= ~same
            t.add(name, "category_case_differs", sev, f"values that match a declared category only when upper and "
                  f"lower case are ignored (the release matches case exactly): {then}. Write them as the policy "
                  "does, or declare them as categories.", case_only, tx.raw, row0)
            t.add(name, "unknown_category", sev, f"values that are none of the declared categories: {then}. Add "
                  "them to the policy's categories if they are real answers, or fix them in the input.",
                  unknown & ~case_only, tx.raw, row0)
        padded = (codes >= 0) & _np(pc.fill_null(pc.not_equal(trimmed, strings), False))
        t.add(name, "padded_label", "note", "values with spaces at the start or end that equal a declared category "
              "only once trimmed: a release trims them and takes them as that category (other tools may not). "
              "Trim them in the input.", padded, tx.raw, row0)

    def _numeric(self, rc: ResolvedColumn, tx: _Text, row0: int) -> None:
        name, t, col = rc.name, self.tally, rc.config
        if tx.text is not None:
            missing = _np(pc.is_null(tx.text)) & ~tx.bad
            ok = _np(pc.fill_null(pc.match_substring_regex(tx.text, _NUMBER), True))  # the release's test
            notnum = ~ok & ~tx.bad
            t.add(name, "not_a_number", "error", "text that is not a number in a numeric column, so a release "
                  "refuses the table. Write plain numbers such as 1234.5 (no thousands separators, units, "
                  "currency signs or decimal commas), or empty such cells to treat them as missing.",
                  notnum, tx.raw, row0)
            good = pc.if_else(pa.array(ok & ~tx.bad), tx.text, pa.scalar(None, tx.text.type))
            x = np.array(pc.fill_null(pc.cast(pc.utf8_trim_whitespace(good), pa.float64()), np.nan)
                         .to_numpy(zero_copy_only=False), dtype=np.float64)
            valued = ~missing & ok & ~tx.bad
        else:  # numbers or booleans (``_readable`` refused other types)
            x = np.array(pc.fill_null(pc.cast(tx.raw, pa.float64()), np.nan).to_numpy(zero_copy_only=False),
                         dtype=np.float64)
            missing = np.isnan(x)
            valued = ~missing
        inf = np.isinf(x) & valued
        t.add(name, "infinite", "error", "infinite values, which a release refuses. Replace them with numbers "
              "within the bounds, or empty the cells to treat them as missing.", inf, tx.raw, row0)
        valued &= ~inf
        how = col.missing
        if how == "error":
            t.add(name, "missing", "error", "missing values, and the policy says missing: error (the default), so a "
                  "release refuses the table. Fill them in the input, set missing: as-answer, or missing: {fill: "
                  "VALUE}.", missing, None, row0)
        elif how == "as-answer":
            t.add(name, "missing", "note", "missing values: released as their own answer (missing: as-answer).",
                  missing, None, row0)
        else:
            t.add(name, "missing", "warning", f"missing values: released as {how.fill:g} (missing: {{fill: "
                  f"{how.fill:g}}}), so every statistic of the column describes the filled values.",
                  missing, None, row0)
        lo, hi = col.domain
        edges = "bins" if rc.type == "binned" else "bounds"
        for kind, mask, edge in (("below_bounds", valued & (x < lo), lo), ("above_bounds", valued & (x > hi), hi)):
            side = "below" if kind == "below_bounds" else "above"
            if col.out_of_bounds == "error":
                t.add(name, kind, "error", f"values {side} the {edges} [{lo:g}, {hi:g}], and the policy says "
                      "out_of_bounds: error, so a release refuses the table. Widen the "
                      f"{edges} or set out_of_bounds: clip.", mask, tx.raw, row0)
            else:
                t.add(name, kind, "warning", f"values {side} the {edges} [{lo:g}, {hi:g}]: a release clips them "
                      f"to {edge:g} (out_of_bounds: clip), pulling the column's statistics toward it. Widen the "
                      f"{edges} if such values are real; otherwise check the input.", mask, tx.raw, row0)

    def _subject(self, values: pa.Array, row0: int) -> None:
        name, t = self.subject, self.tally
        assert name is not None
        tx = _as_text(values)
        strings = tx.text if tx.text is not None else _as_string_array(tx.raw)
        needed = self.memoized or self.ledger
        if needed or self.one_row:   # the release reads the subject column
            t.add(name, "not_utf8", "error", "subject identifiers that are not valid UTF-8 (an encoding problem): "
                  "a release refuses the table. Re-encode the column as UTF-8 in the input.", tx.bad, tx.raw, row0)
        else:
            t.add(name, "not_utf8", "note", "subject identifiers that are not valid UTF-8 (an encoding problem): a "
                  "release with memoized columns, a ledger or one row per person would refuse the table.",
                  tx.bad, tx.raw, row0)
        trimmed = pc.utf8_trim_whitespace(strings)
        missing = _np(pc.is_null(trimmed)) & ~tx.bad
        if needed:
            t.add(name, "missing_subject", "error", "rows without a subject identifier (subject_key): the policy's "
                  "memoized columns or lifetime budget need to know whose row it is, so a release refuses the "
                  "table. Fill the identifier in the input.", missing, None, row0)
            long = _np(pc.fill_null(pc.greater(pc.binary_length(trimmed), MAX_SUBJECT_BYTES), False))
            t.add(name, "subject_too_long", "error", f"subject identifiers longer than {MAX_SUBJECT_BYTES} bytes, "
                  "which a release refuses. Use a shorter identifier (for example a stable hash of the long one).",
                  long, tx.raw, row0)
        else:
            t.add(name, "missing_subject", "note", "rows without a subject identifier (subject_key): a release "
                  "with a ledger (--ledger) or memoized columns would refuse them.", missing, None, row0)
        if self.one_row:
            import pandas as pd

            # as the release's check: the text as stored, missing as one value of its own
            h = pd.util.hash_array(np.asarray(pc.fill_null(strings, "\x00<missing>").to_numpy(zero_copy_only=False),
                                              dtype=object))
            rep = self.repeats.seen_before(np.asarray(h, dtype=np.uint64))
            t.add(name, "repeated_subject", "error", "rows whose subject identifier an earlier row already has, "
                  "and the policy says output.one_row_per_person: true, so a release refuses the table. Give each "
                  "person one row (aggregate, or keep one row per person), or set one_row_per_person: false.",
                  rep & ~tx.bad, tx.raw, row0)


def check_data(policy: LoadedPolicy | Path | str, table: Path | str, *,
               batch_rows: int = DEFAULT_BATCH_ROWS, delimiter: str | None = None) -> DataCheckReport:
    """Check ``policy`` (a loaded policy or its file) against the raw ``table`` (CSV or Parquet
    file, or a Parquet dataset folder, read as a release reads it) in one streamed pass, and
    report every problem of every column (``DataCheckReport``; ``.ok``, ``.to_dict()``).

    STEWARD ONLY: the report holds raw values of the table as examples; show it on the
    steward's terminal, never write it beside an extract or hand it to a partner.  A bad policy
    or an unreadable table raises the release's own errors (``PolicyError``, ``DataError``,
    ``InputFileError``: exit code 2 on the command line).  ``delimiter``: a text table's delimiter
    (one character, or the word tab), winning over the policy's ``input.csv_delimiter`` as
    ``privatize``'s does."""
    if batch_rows < 1:
        raise UsageError("check_data: batch_rows must be a positive number of rows.")
    if delimiter is not None:
        delimiter = delimiter_option(delimiter)
        problem = delimiter_problem(delimiter)
        if problem:
            raise UsageError(f"policy check --data: the --delimiter {delimiter!r} {problem}. Give another delimiter.")
    lp = policy if isinstance(policy, LoadedPolicy) else load_policy(policy)
    src = TableSource(table, csv_null_values=lp.policy.input.csv_null_values,
                      csv_delimiter=lp.policy.input.csv_delimiter, delimiter=delimiter)
    if delimiter is not None and src.format != "csv":
        raise UsageError(f"policy check --data: a --delimiter ({delimiter!r}) applies to a CSV or TSV table, but "
                         f"{table} is not one. Leave --delimiter out.")
    checker = _Checker(lp, src)
    cols = checker.layout()
    names = [rc.name for rc in cols]
    subject = lp.policy.subject_key
    if subject is not None and subject in src.column_names:
        names.append(subject)
    rows = 0
    if names:
        # CSV cells as bytes, so that every cell that is not UTF-8 is found (read as text, the first stops the reader)
        csv_types = {n: pa.binary() for n in names} if src.format == "csv" else None
        for batch in src.batches(names, batch_rows, csv_types=csv_types):
            checker.batch(batch, cols, rows)
            rows += batch.num_rows
    elif src.num_rows is not None:
        rows = int(src.num_rows)
    order = {s: i for i, s in enumerate(SEVERITIES)}
    position = {n: i for i, n in enumerate(src.column_names)}
    findings = sorted(checker.tally.items.values(),
                      key=lambda f: (order[f.severity], position.get(f.column or "", -1)))
    return DataCheckReport(lp.source, str(table), src.format, rows, findings)
