"""The release: read the raw table in batches, randomize every column, write the
extract, then the public manifest (last), and the steward's private diagnostics.

The batch kernel ``privatize_batch`` is pure: (batch, global row offset, plan, key,
nonce) -> privatized batch.  Row ``r`` of column ``c`` always draws the PRF words for
(key, nonce, c, r), so the extract does not depend on the batch size.

Under ``budget.strategy: sample`` row ``r`` also draws one word per privatized column from
the stream (key, nonce, "sampling"); the m columns with the smallest words are reported
and the other cells are left empty (null).  The choice depends only on the key, the nonce,
the row index and the policy (never on the data); every column still draws its own words
for every row, so nothing else changes with the choice or the batch size.
"""

from __future__ import annotations

import hashlib
import json
import os
import secrets
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import __version__
from .errors import DataError, OutputError, PolicyError, UsageError
from .io import (BatchWriter, StagedFiles, TableSource, _rebatch, check_dataset_destination, check_destination,
                 file_format, is_dataset_output, sha256_file, write_text_atomic)
from .keys import MEMO_PRF_VERSION, PRF_VERSION, KeyedStream, SecretKey, SubjectPRF, check_nonce, new_nonce, to_unit
from .dataset import PART_NAME, dataset_digest, read_fragment
from .manifest import (CAUTIONS, ColumnEntry, ExtractInfo, Manifest, OutputColumn, PartInfo, Privacy,
                       default_manifest_path, now_utc)
from .policy import LoadedPolicy, NumericColumn, ResolvedColumn

DEFAULT_BATCH_ROWS = 65536
ENGINES = ("local", "dask")
_NUMBER = r"^\s*[-+]?((\d+(\.\d*)?)|(\.\d+))([eE][-+]?\d+)?\s*$"


def private_dir() -> Path:
    """The steward's private folder (mode 0700) for diagnostics and, later, the ledger.

    $LDPT_PRIVATE_DIR if set, else $XDG_STATE_HOME/ldptransform, else ~/.local/state/ldptransform.
    """
    env = os.environ.get("LDPT_PRIVATE_DIR")
    if env:
        d = Path(env)
    else:
        base = os.environ.get("XDG_STATE_HOME") or str(Path.home() / ".local" / "state")
        d = Path(base) / "ldptransform"
    d.mkdir(parents=True, exist_ok=True, mode=0o700)
    return d


# -- per-column statistics kept for the steward only ------------------------------------

@dataclass
class ColumnDiagnostics:
    missing: int = 0
    filled: int = 0
    unknown_as_other: int = 0
    missing_as_category: int = 0
    clipped_low: int = 0
    clipped_high: int = 0

    def as_dict(self) -> dict[str, int]:
        return {k: v for k, v in self.__dict__.items()}


@dataclass
class ColumnPlan:
    rc: ResolvedColumn
    fields: list[pa.Field]
    stream: KeyedStream | None = None
    draw_stream: KeyedStream | None = None  # mechanisms with a variable number of draws per row (rejection samplers)
    diag: ColumnDiagnostics = field(default_factory=ColumnDiagnostics)
    sample_index: int | None = None  # strategy sample: this column's position among the d privatized columns
    reported: int = 0                # strategy sample: cells reported so far (private diagnostics only)
    memo: SubjectPRF | None = None         # memoize: words keyed by (subject, value code), not (nonce, row)
    memo_offset: SubjectPRF | None = None  # memoize on a numeric column: per-subject offset of the coarse rounding


@dataclass
class ColumnSampler:
    """strategy sample: which m of its d privatized columns each row reports.

    One PRF word per (row, column) from ``stream``; a row reports the m columns with the
    smallest words.  The words of a row are i.i.d. uniform, so their order is a uniform
    random permutation and the first m positions a uniform m-subset (chosen without
    replacement; ties have probability about d^2/2^65 and are broken by column position).
    Columns are numbered in policy order, so the choice does not depend on the input.
    """

    stream: KeyedStream
    d: int
    m: int

    def reported(self, row0: int, n: int) -> np.ndarray:
        """Boolean matrix (n, d): True where row row0+i reports privatized column j."""
        words = self.stream.words(row0, n, self.d)
        chosen = np.argsort(words, axis=1, kind="stable")[:, : self.m]
        mask = np.zeros((n, self.d), dtype=bool)
        mask[np.arange(n)[:, None], chosen] = True
        return mask


def blank_unreported(arr: pa.Array, reported: np.ndarray) -> pa.Array:
    """``arr`` with the cells of unreported rows null.  Built from the reported values only
    (filter, then take with null indices), so no buffer of the result holds anything of an
    unreported cell's randomized value, whatever the array type: at most a copy of a value
    that another row reports."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    kept = arr.filter(pa.array(reported))
    idx = np.maximum(np.cumsum(reported, dtype=np.int64) - 1, 0)
    return pc.take(kept, pa.array(idx, mask=~reported))


def _rows_text(mask: np.ndarray, row0: int) -> str:
    idx = np.flatnonzero(mask)
    first = int(idx[0]) + row0 + 1
    return f"{idx.size} value(s) in this batch, the first at data row {first}"


def _as_string_array(values: pa.Array) -> pa.Array:
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_dictionary(values.type):
        values = values.dictionary_decode()
    if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
        return values
    return pc.cast(values, pa.string())


def _label_codes(strings: pa.Array, labels: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """(codes, missing) of text values: trimmed, then looked up among the labels (-1: unknown)."""
    if pa.types.is_string(strings.type) or pa.types.is_large_string(strings.type):
        strings = pc.utf8_trim_whitespace(strings)
    missing = np.asarray(pc.is_null(strings).to_numpy(zero_copy_only=False))
    codes_arr = pc.index_in(strings, value_set=pa.array(labels, pa.string()))
    codes = np.asarray(pc.fill_null(codes_arr, -1).to_numpy(zero_copy_only=False)).astype(np.int64)
    return codes, missing


def encode_categorical(values: pa.Array, plan: ColumnPlan, row0: int) -> np.ndarray:
    """Policy labels -> integer codes; missing/unknown handled as the policy says."""
    rc = plan.rc
    name = rc.name
    if rc.type == "binned":
        raise AssertionError("binned columns use encode_binned")
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_dictionary(values.type):
        # look up each distinct value once, then index by the row's dictionary index (same codes)
        d_codes, d_missing = _label_codes(_as_string_array(values.dictionary), rc.labels)
        idx = pc.fill_null(values.indices, 0).to_numpy(zero_copy_only=False).astype(np.int64)
        row_null = np.asarray(values.is_null().to_numpy(zero_copy_only=False))
        if len(d_codes):
            codes, missing = d_codes[idx], d_missing[idx] | row_null
        else:  # an empty dictionary: every row is missing
            codes, missing = np.full(len(values), -1, dtype=np.int64), row_null
    else:
        codes, missing = _label_codes(_as_string_array(values), rc.labels)
    codes = codes.copy()
    unknown = (codes < 0) & ~missing
    if missing.any():
        plan.diag.missing += int(missing.sum())
        if rc.missing_code is None:
            raise DataError(f"column {name!r} has missing values ({_rows_text(missing, row0)}) and the policy says "
                            f"missing: error. Fill them in the input, or set missing: as-category for {name!r} to "
                            "randomize 'missing' like any other answer.")
        codes[missing] = rc.missing_code
        plan.diag.missing_as_category += int(missing.sum())
    if unknown.any():
        if rc.other_code is None:
            raise DataError(f"column {name!r} has values that are not among its declared categories "
                            f"({_rows_text(unknown, row0)}). Add them to the policy's categories, or set "
                            f"unknown: as-category to release them as {'<other>'!r}.")
        codes[unknown] = rc.other_code
        plan.diag.unknown_as_other += int(unknown.sum())
    return codes


def _to_float(values: pa.Array, name: str, row0: int) -> tuple[np.ndarray, np.ndarray]:
    """Column -> (float64 values, missing mask).  Text that is not a number is an error."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_dictionary(values.type):
        values = values.dictionary_decode()
    t = values.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        missing = np.asarray(pc.is_null(values).to_numpy(zero_copy_only=False))
        ok = pc.fill_null(pc.match_substring_regex(values, _NUMBER), True)
        ok_np = np.asarray(ok.to_numpy(zero_copy_only=False))
        if not ok_np.all():
            raise DataError(f"column {name!r} is numeric in the policy but holds text that is not a number "
                            f"({_rows_text(~ok_np, row0)}). Clean the column (plain numbers such as 1234.5, no "
                            "thousands separators or units), or mark such cells empty to treat them as missing.")
        x = pc.cast(pc.utf8_trim_whitespace(values), pa.float64())
    elif pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
        x = pc.cast(values, pa.float64())
        missing = np.asarray(pc.is_null(x).to_numpy(zero_copy_only=False))
    elif pa.types.is_boolean(t):
        x = pc.cast(values, pa.float64())
        missing = np.asarray(pc.is_null(x).to_numpy(zero_copy_only=False))
    else:
        raise DataError(f"column {name!r} is numeric in the policy but the input stores it as {t}. Convert it to "
                        "numbers, or change the column's type in the policy.")
    arr = np.array(pc.fill_null(x, np.nan).to_numpy(zero_copy_only=False), dtype=np.float64)
    missing = missing | np.isnan(arr)
    inf = np.isinf(arr)
    if inf.any():
        raise DataError(f"column {name!r} holds infinite values ({_rows_text(inf, row0)}). Replace them with "
                        "numbers within the bounds, or leave the cells empty to treat them as missing.")
    return arr, missing


def encode_numeric(values: pa.Array, plan: ColumnPlan, row0: int) -> np.ndarray:
    rc = plan.rc
    col: NumericColumn = rc.config
    name = rc.name
    x, missing = _to_float(values, name, row0)
    if missing.any():
        plan.diag.missing += int(missing.sum())
        if col.missing == "error":
            raise DataError(f"column {name!r} has missing values ({_rows_text(missing, row0)}) and the policy says "
                            f"missing: error. Fill them in the input, or set missing: {{fill: VALUE}} for {name!r} "
                            "(a value within the bounds).")
        x[missing] = col.missing.fill
        plan.diag.filled += int(missing.sum())
    lo, hi = col.domain
    low, high = x < lo, x > hi
    if low.any() or high.any():
        if col.out_of_bounds == "error":
            bad = low | high
            raise DataError(f"column {name!r} has values outside its bounds [{lo:g}, {hi:g}] "
                            f"({_rows_text(bad, row0)}) and the policy says out_of_bounds: error. Widen the bounds "
                            "or set out_of_bounds: clip.")
        plan.diag.clipped_low += int(low.sum())
        plan.diag.clipped_high += int(high.sum())
        x = np.clip(x, lo, hi)
    return x


def encode_binned(values: pa.Array, plan: ColumnPlan, row0: int) -> np.ndarray:
    col: NumericColumn = plan.rc.config
    x = encode_numeric(values, plan, row0)
    edges = np.asarray(col.bins, dtype=float)
    codes = np.searchsorted(edges, x, side="right") - 1
    return np.clip(codes, 0, len(edges) - 2).astype(np.int64)


# -- planning -----------------------------------------------------------------------------

def plan_columns(policy: LoadedPolicy, input_columns: list[str], source: str) -> list[ColumnPlan]:
    by_name = policy.by_name
    subject = policy.policy.subject_key
    if subject is not None and subject not in input_columns:
        raise DataError(f"policy {policy.source}, field 'subject_key': column {subject!r} is not a column of input "
                        f"{source} (its columns: {', '.join(map(repr, input_columns))}). Name the input column that "
                        "identifies a person, or remove subject_key and memoize from the policy.")
    absent = [n for n in by_name if n not in input_columns]
    if absent:
        raise DataError(f"the policy names column(s) {', '.join(map(repr, absent))} that input {source} does not have "
                        f"(its columns: {', '.join(map(repr, input_columns))}). Fix the names in the policy or "
                        "remove those entries.")
    unlisted = [n for n in input_columns if n not in by_name and n != subject]  # the subject: never released
    if unlisted and policy.policy.unlisted == "error":
        raise DataError(f"input {source} has column(s) {', '.join(map(repr, unlisted))} that the policy does not "
                        "name. Add each one to the policy (type: drop to leave it out), or set unlisted: drop.")
    plans: list[ColumnPlan] = []
    for name in input_columns:
        rc = by_name.get(name)
        if rc is None or rc.type == "drop" or name == subject:
            continue
        if rc.type == "public":
            plans.append(ColumnPlan(rc, []))  # fields filled from the input schema
        else:
            assert rc.mechanism is not None
            plans.append(ColumnPlan(rc, rc.mechanism.output_fields(name)))
    if not plans:
        raise PolicyError(f"policy {policy.source}: every column is dropped; there is nothing to release.")
    return plans


def _output_schema(plans: list[ColumnPlan], input_schema: pa.Schema, fmt_in: str) -> pa.Schema:
    fields: list[pa.Field] = []
    for p in plans:
        if p.rc.type == "public":
            t = pa.string() if fmt_in == "csv" else input_schema.field(p.rc.name).type
            p.fields = [pa.field(p.rc.name, t)]
        fields.extend(p.fields)
    names = [f.name for f in fields]
    clash = sorted({n for n in names if names.count(n) > 1})
    if clash:
        raise DataError(f"output column name(s) {', '.join(map(repr, clash))} would be written twice (an input "
                        "column has the same name as a column another mechanism adds, such as NAME__hash). "
                        "Rename the input column.")
    return pa.schema(fields)


# -- memoized randomness ("permanent randomized response") ----------------------------------

MAX_SUBJECT_BYTES = 256


def memo_context(rc: ResolvedColumn) -> bytes:
    """SHA-256 of a memoized column's mechanism spec, memo grid and type: what its randomness is bound to."""
    assert rc.mechanism is not None
    context = json.dumps({"spec": rc.mechanism.to_spec(), "memo_grid": rc.memo_grid, "type": rc.type},
                         sort_keys=True, separators=(",", ":"), default=str).encode()
    return hashlib.sha256(context).digest()


def memo_streams(key: SecretKey, rc: ResolvedColumn) -> tuple[SubjectPRF, SubjectPRF | None]:
    """The PRFs of a memoized column: reports keyed by (key, column, mechanism spec, memo grid,
    subject, value code), never by the nonce or the row; for a numeric column also the rounding
    offset keyed by (key, column, subject) only.  A changed mechanism spec or grid gives fresh
    randomness (a new release at the new settings), never the old words through a new channel."""
    report = SubjectPRF(key, "report", rc.name, memo_context(rc))
    offset = SubjectPRF(key, "rounding-offset", rc.name) if rc.type == "numeric" else None
    return report, offset


def subject_bytes(values: pa.Array, name: str, row0: int) -> tuple[np.ndarray, np.ndarray]:
    """The subject column as (concatenated UTF-8 bytes, n + 1 offsets): text as written (numbers
    as their decimal text), surrounding spaces removed.  A missing or over-long subject is an error."""
    strings = _as_string_array(values)
    strings = pc.utf8_trim_whitespace(strings)
    missing = np.asarray(pc.is_null(strings).to_numpy(zero_copy_only=False))
    if missing.any():
        raise DataError(f"column {name!r} is the policy's subject_key but has missing values "
                        f"({_rows_text(missing, row0)}); memoized columns need to know whose row it is. Fill the "
                        "identifier in the input, or remove memoize from the policy's columns.")
    binary = pc.cast(strings, pa.large_binary())
    if isinstance(binary, pa.ChunkedArray):
        binary = binary.combine_chunks()
    bufs = binary.buffers()
    n = len(binary)
    offs = np.frombuffer(bufs[1], dtype=np.int64)[binary.offset: binary.offset + n + 1]
    data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else np.zeros(0, dtype=np.uint8)
    long = np.diff(offs) > MAX_SUBJECT_BYTES
    if long.any():
        raise DataError(f"column {name!r} (the policy's subject_key) has identifiers longer than "
                        f"{MAX_SUBJECT_BYTES} bytes ({_rows_text(long, row0)}). Use a shorter identifier (for "
                        "example a stable hash of the long one) in the input.")
    return data, offs


def memo_round(p: ColumnPlan, x: np.ndarray, subjects: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Round numeric values to the column's coarse memo grid (memo_grid steps between the
    bounds) with a per-subject offset u in [0, 1) from the keyed PRF (alpha-point rounding):
    grid index j = floor((x - lo) / step + u).  Over subjects u is uniform, so j = floor(t) + 1
    with probability frac(t): unbiased, with rounding variance frac(t)(1 - frac(t)) step^2 <=
    step^2 / 4 per row.  Returns (rounded values, grid indices)."""
    assert p.memo_offset is not None and p.rc.memo_grid is not None
    lo, hi = p.rc.config.domain
    g = p.rc.memo_grid
    data, offs = subjects
    u = to_unit(p.memo_offset.words(p.memo_offset.seeds(data, offs, np.zeros(len(x), dtype=np.int64)), 1)[:, 0])
    t = (x - lo) * (g / (hi - lo))
    j = np.clip(np.floor(t + u), 0, g).astype(np.int64)
    rounded = np.where(j == g, hi, lo + j * ((hi - lo) / g))
    return np.minimum(rounded, hi), j


def memo_note(rc: ResolvedColumn) -> str:
    grid = ""
    if rc.memo_grid is not None:
        lo, hi = rc.config.domain
        grid = (f"; before randomization each value is rounded to a grid of memo_grid = {rc.memo_grid} steps of "
                f"{(hi - lo) / rc.memo_grid:g} between the bounds, with a random offset fixed per person (unbiased; "
                "adds at most step^2/4 variance per row)")
    return (f"memoized: true ({MEMO_PRF_VERSION}): the report is drawn from randomness keyed by the person "
            "(the policy's subject_key, not released) and the value, so the same person with the same value gets "
            "the same report in every release, and rows with the same person and value within a release are "
            "identical; a report that changes between releases shows that the value changed" + grid)


def privatize_batch(batch: pa.RecordBatch, row0: int, plans: list[ColumnPlan], schema: pa.Schema,
                    sampler: ColumnSampler | None = None, subject_key: str | None = None) -> pa.RecordBatch:
    """The pure batch kernel: raw batch rows [row0, row0+n) -> privatized batch."""
    n = batch.num_rows
    arrays: list[pa.Array] = []
    reported = sampler.reported(row0, n) if sampler is not None else None
    subjects = subject_bytes(batch.column(subject_key), subject_key, row0) if subject_key is not None else None
    for p in plans:
        values = batch.column(p.rc.name)
        if p.rc.type == "public":
            arrays.append(values if values.type == p.fields[0].type else pc.cast(values, p.fields[0].type))
            continue
        if p.rc.type == "categorical":
            x: np.ndarray = encode_categorical(values, p, row0)
        elif p.rc.type == "binned":
            x = encode_binned(values, p, row0)
        else:
            x = encode_numeric(values, p, row0)
        m = p.rc.mechanism
        assert m is not None and p.stream is not None
        codes = None
        if p.memo is not None:
            assert subjects is not None, "memoized column without subject_key"
            if p.rc.type == "numeric":
                x, codes = memo_round(p, x, subjects)
            else:
                codes = x
        out = randomize_rows(p, x, row0, subjects, codes)
        if reported is None:
            arrays.extend(out)
        else:
            assert p.sample_index is not None
            rep = reported[:, p.sample_index]
            p.reported += int(rep.sum())
            arrays.extend(blank_unreported(a, rep) for a in out)
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


MAX_WORDS_PER_CALL = 1 << 22  # 32 MiB of PRF words per randomize call, whatever the report width


def randomize_rows(p: ColumnPlan, x: np.ndarray, row0: int,
                   subjects: tuple[np.ndarray, np.ndarray] | None = None,
                   codes: np.ndarray | None = None) -> list[pa.Array]:
    """Randomize encoded values ``x`` of global rows row0.. in slices of at most
    MAX_WORDS_PER_CALL words (wide reports such as subsets of a large domain), so memory does
    not grow with the report width.  Words are addressed by global row, so slicing cannot
    change any output.  Mechanisms that draw a variable number of words per row (exact
    rejection samplers) also get ``draw(rows, j)``: word j of each given row, from a stream of
    their own.  A memoized column takes its words from ``p.memo`` keyed by (subject, value code)
    instead (``subjects`` = (bytes, offsets) of the batch's subject column, ``codes`` the value codes)."""
    m = p.rc.mechanism
    assert m is not None and p.stream is not None
    n, wpr = len(x), m.words_per_row
    # a report may be wider than its words (a k-character subset string from 1 + m words):
    # budget a slice by whichever is larger, words in or bytes out (counted in 8-byte words)
    out_words = -(-m.output_bytes_per_row // 8)
    step = max(1, MAX_WORDS_PER_CALL // max(wpr, out_words, 1))
    parts: list[list[pa.Array]] = []
    for s in range(0, n, step):
        e = min(n, s + step)
        if p.memo is not None:
            assert subjects is not None and codes is not None
            data, offs = subjects
            words = p.memo.words(p.memo.seeds(data, offs[s:e + 1], codes[s:e]), wpr)
        else:
            words = p.stream.words(row0 + s, e - s, wpr)
        if m.variable_draws:
            ds, base = p.draw_stream, row0 + s
            assert ds is not None
            parts.append(m.randomize_with(x[s:e], words, lambda r, j, ds=ds, base=base: ds.words_at(base + r, j)))
        else:
            parts.append(m.randomize(x[s:e], words))
    if len(parts) == 1:
        return parts[0]
    return [pa.concat_arrays([pt[i] for pt in parts]) for i in range(len(parts[0]))]


def column_entries(plans: list[ColumnPlan], report_rate: float = 1.0) -> list[ColumnEntry]:
    out = []
    for p in plans:
        rc = p.rc
        if rc.type == "public":
            out.append(ColumnEntry(name=rc.name, type="public", outputs=[OutputColumn(
                name=rc.name, dtype=str(p.fields[0].type), meaning="copied from the input as is: NOT privatized")],
                note="released in the clear; local differential privacy does not protect this column"))
            continue
        m = rc.mechanism
        assert m is not None
        outs = [OutputColumn(name=f.name, dtype=str(f.type), meaning=m.output_meaning(f.name))
                for f in p.fields]
        cfg = rc.config
        out.append(ColumnEntry(
            name=rc.name, type=rc.type, mechanism=m.to_spec(), chosen_because=rc.chosen_because,
            labels=list(rc.labels) if rc.labels else None,
            bins=[float(b) for b in cfg.bins] if rc.type == "binned" else None,
            outputs=outs, report_rate=report_rate, note=memo_note(rc) if rc.memoize else None))
    return out


def memo_composition_text(policy: LoadedPolicy) -> str:
    """What memoization means for composition, for the manifest ('' without memoized columns)."""
    memo = [rc for rc in policy.columns if rc.memoize]
    if not memo:
        return ""
    names = ", ".join(f"{rc.name} (rounded to a grid of {rc.memo_grid} steps with a per-person offset first)"
                      if rc.memo_grid else rc.name for rc in memo)
    return (f"; memoized columns: {names}. Their randomness is keyed by the person and the value, not by the "
            "release, so a person whose value has not changed gets the very same report in every release under "
            "this key and repeating it adds no eps; a changed value gets a fresh report and costs its eps again, "
            "and a report that changes shows that the value changed (not to what)")


def _privacy(policy: LoadedPolicy, plans: list[ColumnPlan]) -> Privacy:
    d, m = len(policy.policy.privatized_columns), policy.policy.reported_columns
    memo_text = memo_composition_text(policy)
    common = dict(model="local differential privacy: every row is randomized on its own, column by column",
                  epsilon_per_row_budget=policy.policy.budget.epsilon_per_row,
                  public_columns=[p.rc.name for p in plans if p.rc.type == "public"],
                  strategy=policy.strategy, privatized_columns=d, reported_columns=m)
    if policy.strategy == "sample":
        return Privacy(**common, epsilon_per_row_used=policy.epsilon_total,
                       composition=f"sequential over the columns a row reports: each row reports {m} of its {d} "
                                   f"privatized columns, each randomized at eps {policy.policy.sampled_epsilon:g} "
                                   f"(epsilon_per_row / {m}), so a row's epsilon is {m} x that; which columns a row "
                                   "reports is chosen by the keyed PRF independently of the data (the other cells "
                                   "are empty); releases about the same people add up" + memo_text)
    used = sum(p.rc.mechanism.epsilon for p in plans if p.rc.mechanism is not None)
    return Privacy(**common, epsilon_per_row_used=used,
                   composition="sequential: a row's epsilon is the sum over its privatized columns; releases about "
                               "the same people add up" + memo_text)


# -- the privacy ledger: per-subject charges of this release -------------------------------

@dataclass
class LedgerCharges:
    """What this release charges, from the pre-pass (all steward-only, data-dependent)."""

    subjects: np.ndarray          # distinct subject hashes (S32), sorted
    eps: np.ndarray               # eps each distinct subject is charged
    within: np.ndarray            # per distinct subject: stays within lifetime_epsilon
    row_within: np.ndarray        # per input row: its subject stays within (rows to release)
    memo: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]  # column -> (row index, subject hash, value hash)
    over_count: int = 0
    max_overshoot: float = 0.0

    def memo_updates(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Memo state of the released rows only (held-back subjects keep their old state)."""
        out = {}
        for col, (rows, sh, vh) in self.memo.items():
            keep = self.row_within[rows]
            out[col] = (sh[keep], vh[keep])
        return out


def subject_text(values: pa.Array, name: str, row0: int) -> pa.Array:
    """The subject column as trimmed text, checked as ``subject_bytes`` checks it (the same identity
    memoization uses, so the ledger and the memoized reports agree on who a person is)."""
    subject_bytes(values, name, row0)  # missing / over-long identifiers: a DataError naming the rows
    return pc.utf8_trim_whitespace(_as_string_array(values))


def ledger_prepass(src: TableSource, plans: list[ColumnPlan], policy: LoadedPolicy, key: SecretKey,
                   batch_rows: int, sampler: ColumnSampler | None, ledger: Any | None,
                   cap: float | None) -> LedgerCharges:
    """Read only the subject column and the memoized columns, in batches, and work out each
    subject's charge for this release.  Under split a row costs the eps of its non-memoized
    privatized columns, plus each memoized column's eps when the (subject, value) hash differs from
    the ledger's last recorded one for that column (first release: charged).  Under sample a row
    costs epsilon_per_row_used, memoized or not (simple and conservative).  Rows of one subject add
    up.  ``ledger`` None: no ledger yet (nothing spent, no last values).  Nothing is written."""
    from .ledger import memo_value_hashes, subject_hashes

    subject = policy.policy.subject_key
    assert subject is not None
    memo_plans = [replace(p, diag=ColumnDiagnostics()) for p in plans if p.memo is not None]  # no double counts
    contexts = {p.rc.name: memo_context(p.rc) for p in memo_plans}
    priv = [p for p in plans if p.rc.mechanism is not None]
    sample = sampler is not None
    base = policy.epsilon_total if sample else sum(p.rc.mechanism.epsilon for p in priv if p.memo is None)
    hashes: list[np.ndarray] = []
    charges: list[np.ndarray] = []
    memo: dict[str, list[tuple[np.ndarray, np.ndarray, np.ndarray]]] = {p.rc.name: [] for p in memo_plans}
    row0 = 0
    for batch in src.batches([subject] + [p.rc.name for p in memo_plans], batch_rows):
        n = batch.num_rows
        col = batch.column(subject)
        sh = subject_hashes(key, subject_text(col, subject, row0))
        eps = np.full(n, float(base))
        reported = sampler.reported(row0, n) if sample else None
        subjects = subject_bytes(col, subject, row0) if memo_plans else None
        where = ledger.positions(sh) if ledger is not None and memo_plans and not sample else None
        for p in memo_plans:
            values = batch.column(p.rc.name)
            if p.rc.type == "categorical":
                codes = encode_categorical(values, p, row0)
            elif p.rc.type == "binned":
                codes = encode_binned(values, p, row0)
            else:
                assert subjects is not None
                _, codes = memo_round(p, encode_numeric(values, p, row0), subjects)
            vh = memo_value_hashes(key, p.rc.name, contexts[p.rc.name], sh, codes)
            rows = np.arange(row0, row0 + n, dtype=np.int64)
            if reported is not None:  # sample: the state is the last value a row *reported*
                rep = reported[:, p.sample_index]
                rows, shr, vhr = rows[rep], sh[rep], vh[rep]
            else:
                shr, vhr = sh, vh
                last = (ledger.last_values(p.rc.name, sh, where) if ledger is not None
                        else np.zeros(n, dtype=sh.dtype))
                eps += np.where(vh != last, p.rc.mechanism.epsilon, 0.0)
            memo[p.rc.name].append((rows, shr, vhr))
        hashes.append(sh)
        charges.append(eps)
        row0 += n
    all_h = np.concatenate(hashes) if hashes else np.zeros(0, dtype="S32")
    all_e = np.concatenate(charges) if charges else np.zeros(0)
    uniq, inv = np.unique(all_h, return_inverse=True)
    inv = inv.reshape(-1)
    eps_u = np.bincount(inv, weights=all_e, minlength=len(uniq))
    if cap is not None:
        total = (ledger.spent(uniq) if ledger is not None else np.zeros(len(uniq))) + eps_u
        from .ledger import CAP_TOLERANCE

        within = total <= cap * (1 + CAP_TOLERANCE)
        over = int((~within).sum())
        overshoot = float((total - cap).max()) if over else 0.0
    else:
        within, over, overshoot = np.ones(len(uniq), dtype=bool), 0, 0.0
    memo_cat = {}
    for c, parts in memo.items():
        memo_cat[c] = tuple(np.concatenate([pt[i] for pt in parts]) if parts else np.zeros(0, dtype=dt)
                            for i, dt in enumerate((np.int64, "S32", "S32")))
    return LedgerCharges(uniq, eps_u, within, within[inv], memo_cat, over, max(overshoot, 0.0))


# -- datasets: one output part per input fragment ---------------------------------------------

@dataclass
class PartJob:
    """What every part of a release shares (picklable: sent to workers by the dask engine).
    The plans carry only keys derived for this release and column, never the secret key."""

    read_cols: list[str]
    batch_rows: int
    plans: list[ColumnPlan]
    schema: pa.Schema
    sampler: ColumnSampler | None
    subject_key: str | None
    dictionary: list[str] = field(default_factory=list)  # Parquet text columns read dictionary-encoded


@dataclass
class PartResult:
    file: str
    sha256: str
    bytes: int
    rows: int                     # rows written (fewer than input_rows under --allow-partial)
    input_rows: int
    diag: dict[str, dict[str, int]]  # steward-only diagnostics of this part
    reported: dict[str, int]


def write_part(job: PartJob, batches: Any, row0: int, keep: np.ndarray | None, path: Path, *,
               on_batch: Callable[[int], None] | None = None) -> PartResult:
    """Privatize rows [row0, row0 + n) given as ``batches`` into the Parquet file ``path``.
    Pure apart from writing ``path``: the same rows, row0, plans and nonce give the same bytes
    on any machine, in any order of parts."""
    plans = [replace(p, diag=ColumnDiagnostics(), reported=0) for p in job.plans]
    writer = BatchWriter(Path(path), "parquet", job.schema)
    rows = released = 0
    try:
        for batch in batches:
            n = batch.num_rows
            out_batch = privatize_batch(batch, row0 + rows, plans, job.schema, job.sampler, job.subject_key)
            if keep is not None:
                out_batch = out_batch.filter(pa.array(keep[rows:rows + n]))
            writer.write(out_batch)
            released += out_batch.num_rows
            rows += n
            if on_batch is not None:
                on_batch(n)
    finally:
        writer.close()
    digest, size = sha256_file(Path(path))
    return PartResult(Path(path).name, digest, size, released, rows,
                      {p.rc.name: p.diag.as_dict() for p in plans if p.rc.mechanism is not None},
                      {p.rc.name: p.reported for p in plans if p.rc.mechanism is not None})


def fragment_part(job: PartJob, fs: Any, frag: Any, keep: np.ndarray | None, folder: str) -> PartResult:
    """One Parquet fragment of the input -> its output part (what a dask worker runs)."""
    batches = _rebatch(read_fragment(fs, frag, job.read_cols, job.batch_rows, job.dictionary), job.batch_rows)
    return write_part(job, batches, frag.row0, keep, Path(folder) / frag.part_name)


class RowCutter:
    """Cuts a stream of batches into consecutive runs of a given number of rows, lazily
    (slicing a batch at a boundary), so that a part is written while it is read."""

    def __init__(self, batches: Any) -> None:
        self._it = iter(batches)
        self._head: pa.RecordBatch | None = None

    def take(self, n: int) -> Any:
        left = n
        while left > 0:
            if self._head is None:
                self._head = next(self._it, None)
                if self._head is None:
                    return
            b = self._head
            if b.num_rows <= left:
                self._head = None
                left -= b.num_rows
                if b.num_rows:
                    yield b
            else:
                self._head = b.slice(left)
                yield b.slice(0, left)
                left = 0

    def exhausted(self) -> bool:
        while self._head is None or self._head.num_rows == 0:
            self._head = next(self._it, None)
            if self._head is None:
                return True
        return False


def _keep_slice(keep: np.ndarray | None, row0: int, n: int) -> np.ndarray | None:
    return None if keep is None else keep[row0:row0 + n]


def run_parts_local(job: PartJob, src: Any, keep: np.ndarray | None, folder: Path, fragment_rows: int,
                    staged: StagedFiles, on_progress: Callable[[int], None] | None) -> list[PartResult]:
    """The local engine's dataset output: parts one after the other, in order."""

    def tick(n: int) -> None:
        staged.check()
        if on_progress is not None:
            on_progress(n)

    results: list[PartResult] = []
    ds = src.parquet_dataset(fragment_rows) if hasattr(src, "parquet_dataset") else None
    if ds is not None:
        for frag in ds.fragments:
            batches = _rebatch(read_fragment(ds.fs, frag, job.read_cols, job.batch_rows, job.dictionary),
                               job.batch_rows)
            results.append(write_part(job, batches, frag.row0, _keep_slice(keep, frag.row0, frag.rows),
                                      folder / frag.part_name, on_batch=tick))
    else:  # CSV (or a frame): parts of fragment_rows rows, cut while reading
        cutter = RowCutter(src.batches(job.read_cols, job.batch_rows))
        row0 = 0
        while True:
            i = len(results)
            part_keep = _keep_slice(keep, row0, fragment_rows)
            res = write_part(job, _rebatch(cutter.take(fragment_rows), job.batch_rows), row0, part_keep,
                             folder / PART_NAME.format(i), on_batch=tick)
            results.append(res)
            row0 += res.input_rows
            if cutter.exhausted():
                break
    if not results:  # a dataset without row groups: one empty part keeps the schema
        results.append(write_part(job, iter(()), 0, None, folder / PART_NAME.format(0)))
    return results


@dataclass
class ReleaseResult:
    manifest: Manifest
    extract_path: Path
    manifest_path: Path
    diagnostics_path: Path
    seconds: float
    ledger_path: Path | None = None
    ledger_release_id: int | None = None
    held_back_subjects: int = 0  # --allow-partial: data-dependent, steward's stderr and diagnostics only
    held_back_rows: int = 0


def privatize(input_path: Path | str | Any, policy: LoadedPolicy, key: SecretKey, out: Path | str, *,
              manifest_path: Path | str | None = None, diagnostics_path: Path | str | None = None,
              batch_rows: int = DEFAULT_BATCH_ROWS, overwrite: bool = False, nonce: str | None = None,
              on_progress: Callable[[int], None] | None = None, ledger_path: Path | str | None = None,
              allow_partial: bool = False, engine: str = "local", scheduler: str | None = None,
              fragment_rows: int | None = None) -> ReleaseResult:
    """Privatize ``input_path`` under ``policy`` into ``out`` (+ manifest, + private diagnostics).

    With a ledger (``ledger_path``, or the default path when the policy sets
    budget.lifetime_epsilon) a pre-pass works out each subject's charge before anything is
    written; over the cap the release is refused, or with ``allow_partial`` only the rows of
    subjects within it are released.  The release is recorded in the ledger after the extract
    and manifest are staged and before they are renamed into place: a refused record leaves
    nothing; a crash between the ledger commit and the rename leaves an over-count (safe side).

    ``input_path`` may be a file, a Parquet dataset (folder or URI; dataset.py) or, through
    ``engine_dask.privatize_frame``, a dask DataFrame.  An ``out`` without a file extension
    writes a Parquet dataset of parts of at most ``fragment_rows`` rows; ``engine="dask"``
    writes those parts on dask workers (``scheduler``: a running cluster's address; None: a
    local cluster), byte for byte as the local engine does."""
    from .dataset import DEFAULT_FRAGMENT_ROWS, is_uri

    t0 = time.perf_counter()
    frame_input = not isinstance(input_path, (str, Path))  # a dask DataFrame (engine_dask.privatize_frame)
    if not frame_input and not is_uri(input_path):
        input_path = Path(input_path)
    out = Path(out)
    dataset_out = is_dataset_output(out)
    fmt_out = "parquet" if dataset_out else file_format(out, "output")
    manifest_path = Path(manifest_path) if manifest_path else default_manifest_path(out)
    if batch_rows < 1:
        raise UsageError("--batch-rows must be a positive number of rows")
    fragment_rows = DEFAULT_FRAGMENT_ROWS if fragment_rows is None else int(fragment_rows)
    if fragment_rows < 1:
        raise UsageError("the rows per output part (fragment_rows) must be a positive number")
    if engine not in ENGINES:
        raise UsageError(f"--engine {engine!r} is not known; use one of: {', '.join(ENGINES)}.")
    if engine == "dask" and not dataset_out:
        raise UsageError(f"--engine dask writes a Parquet dataset (one part per input fragment, written in "
                         f"parallel): give --out a folder path without a file extension (for example "
                         f"{out.with_suffix('')}/), not the file {out}.")
    if scheduler is not None and engine != "dask":
        raise UsageError("--scheduler applies only with --engine dask.")
    nonce = check_nonce(nonce) if nonce else new_nonce()
    if frame_input:
        from .engine_dask import FrameSource

        src = FrameSource(input_path)
    else:
        src = TableSource(input_path, csv_null_values=policy.policy.input.csv_null_values,
                          csv_delimiter=policy.policy.input.csv_delimiter)
    if isinstance(input_path, Path):
        try:
            same = out.exists() and out.resolve() == input_path.resolve()
        except OSError:
            same = False
        if same or manifest_path.resolve() == input_path.resolve():
            raise UsageError(f"output {out} is the input; write the extract to another path.")
    if manifest_path.resolve() == out.resolve():
        raise UsageError("the manifest path and the output path are the same; give different paths.")
    if dataset_out:
        check_dataset_destination(out, overwrite)
    else:
        check_destination(out, "output", overwrite)
    check_destination(manifest_path, "manifest", overwrite)
    if diagnostics_path is None:
        # a fresh name per run: re-running a release (same nonce, same file name) must not collide
        diagnostics_path = private_dir() / f"{out.stem}.{nonce[:12]}.{secrets.token_hex(4)}.PRIVATE-diagnostics.json"
    diagnostics_path = Path(diagnostics_path)
    check_destination(diagnostics_path, "diagnostics file", overwrite)
    cap = policy.policy.budget.lifetime_epsilon
    if allow_partial and cap is None:
        raise UsageError(f"--allow-partial applies only with a lifetime budget: policy {policy.source} does not set "
                         "budget.lifetime_epsilon. Set it, or leave out --allow-partial.")
    if ledger_path is not None or cap is not None:
        if policy.policy.subject_key is None:
            raise UsageError(f"--ledger needs policy field 'subject_key' (the input column that identifies a person, "
                             f"whose spend the ledger adds up); policy {policy.source} does not set it. Add "
                             "subject_key: COLUMN to the policy, or leave out --ledger.")
        from .ledger import default_ledger_path

        ledger_path = Path(ledger_path) if ledger_path is not None else default_ledger_path()
        if not ledger_path.exists() and not ledger_path.parent.is_dir():
            raise UsageError(f"cannot create ledger {ledger_path}: folder {ledger_path.parent} does not exist. "
                             "Create it first (private to the steward, like the key), or give another --ledger.")

    plans = plan_columns(policy, src.column_names, getattr(src, "location", str(input_path)))
    if src.format == "csv":
        nulls = set(policy.policy.input.csv_null_values)
        for p in plans:
            clash = [lab for lab in p.rc.labels if lab in nulls]
            if clash:
                raise PolicyError(f"policy {policy.source}: column {p.rc.name!r}, field 'categories': "
                                  f"{', '.join(map(repr, clash))} is also a CSV missing-value marker "
                                  "(input.csv_null_values), so such cells would be read as missing. Remove it "
                                  "from input.csv_null_values or rename the category.")
    schema = _output_schema(plans, src.schema, src.format)
    for p in plans:
        if p.rc.mechanism is not None:
            p.stream = KeyedStream(key, nonce, "column", p.rc.name)
            if p.rc.mechanism.variable_draws:
                p.draw_stream = KeyedStream(key, nonce, "column-draws", p.rc.name)
            if p.rc.memoize:
                p.memo, p.memo_offset = memo_streams(key, p.rc)
    sampler = None
    if policy.strategy == "sample":
        order = policy.policy.privatized_columns  # policy order: the choice never depends on the input's layout
        sampler = ColumnSampler(KeyedStream(key, nonce, "sampling"), len(order), policy.policy.reported_columns)
        for p in plans:
            if p.rc.mechanism is not None:
                p.sample_index = order.index(p.rc.name)
    read_cols = [p.rc.name for p in plans]
    subject_key = policy.policy.subject_key if any(p.memo is not None for p in plans) else None
    if subject_key is not None:
        read_cols.append(subject_key)
    dict_cols = src.dictionary_columns([p.rc.name for p in plans if p.rc.type == "categorical"]) \
        if hasattr(src, "dictionary_columns") else []

    charges: LedgerCharges | None = None
    if ledger_path is not None:
        from .ledger import BudgetExhaustedError, Ledger

        led = Ledger.open(ledger_path, create=False) if ledger_path.exists() else None  # creates nothing
        try:
            if led is not None:
                led.check_key(key.fingerprint())
            charges = ledger_prepass(src, plans, policy, key, batch_rows, sampler, led, cap)
        finally:
            if led is not None:
                led.close()
        if charges.over_count and not allow_partial:
            raise BudgetExhaustedError(
                f"this release would take {charges.over_count} subject(s) past the lifetime budget "
                f"(budget.lifetime_epsilon = {cap:g} in ledger {ledger_path}), by up to "
                f"{charges.max_overshoot:.6g}; nothing was written. Run with --allow-partial to release only the "
                "subjects still within the budget, lower the release's eps, or (after review) raise the lifetime "
                "budget.")
        if not charges.within.any():
            raise BudgetExhaustedError(
                f"every subject of this release is past the lifetime budget (budget.lifetime_epsilon = {cap:g} in "
                f"ledger {ledger_path}); nothing was written, as there is nothing left to release.")
    keep_rows = None if charges is None or charges.within.all() else charges.row_within
    if keep_rows is not None and dataset_out:
        raise UsageError(
            f"--allow-partial would hold back {int((~charges.within).sum())} subject(s) (steward-only figure), "
            "and a dataset extract would show how many rows each part lost: every part covers a known range "
            "of input rows. Write a single-file extract instead (--out FILE.parquet), or release without "
            "--allow-partial once everyone is within the budget; nothing was written.")

    rows = 0
    released = 0
    with StagedFiles() as staged:
        tmp_extract = staged.add(out)
        if dataset_out:
            job = PartJob(read_cols, batch_rows, plans, schema, sampler, subject_key, dict_cols)
            os.mkdir(tmp_extract, 0o755)
            if engine == "dask":
                from .engine_dask import run_parts

                parts = run_parts(job, src, keep_rows, tmp_extract, fragment_rows, scheduler, staged, on_progress)
            else:
                parts = run_parts_local(job, src, keep_rows, tmp_extract, fragment_rows, staged, on_progress)
            for part in parts:
                for p in plans:
                    if p.rc.name in part.diag:
                        for k, v in part.diag[p.rc.name].items():
                            setattr(p.diag, k, getattr(p.diag, k) + v)
                        p.reported += part.reported.get(p.rc.name, 0)
            rows = sum(part.input_rows for part in parts)
            released = sum(part.rows for part in parts)
            infos = [PartInfo(file=part.file, sha256=part.sha256, bytes=part.bytes, rows=part.rows) for part in parts]
            extract_info = ExtractInfo(file=out.name, format="parquet-dataset",
                                       sha256=dataset_digest([i.model_dump() for i in infos]),
                                       bytes=sum(i.bytes for i in infos), columns=schema.names, parts=infos,
                                       part_rows=fragment_rows)
        else:
            writer = BatchWriter(tmp_extract, fmt_out, schema)
            try:
                for batch in src.batches(read_cols, batch_rows, dictionary=dict_cols):
                    out_batch = privatize_batch(batch, rows, plans, schema, sampler, subject_key)
                    if keep_rows is not None:  # --allow-partial: drop the rows of subjects past the budget
                        out_batch = out_batch.filter(pa.array(keep_rows[rows:rows + batch.num_rows]))
                    writer.write(out_batch)
                    released += out_batch.num_rows
                    rows += batch.num_rows
                    staged.check()  # stop between batches on SIGTERM/SIGINT
                    if on_progress is not None:
                        on_progress(batch.num_rows)
            finally:
                writer.close()
            digest, size = sha256_file(tmp_extract)
            extract_info = ExtractInfo(file=out.name, format=fmt_out, sha256=digest, bytes=size, columns=schema.names)
        manifest = Manifest(
            tool_version=__version__, created_utc=now_utc(), rows=released, nonce=nonce,
            key_fingerprint=key.fingerprint(), prf=PRF_VERSION, policy_sha256=policy.policy.sha256(),
            policy=policy.policy.canonical(),
            privacy=_privacy(policy, plans),
            extract=extract_info,
            columns=column_entries(plans, policy.report_rate), cautions=list(CAUTIONS))
        tmp_manifest = staged.add(manifest_path)
        write_text_atomic_into(tmp_manifest, manifest.to_json())
        seconds = time.perf_counter() - t0
        diag = {
            "PRIVATE": "steward-only diagnostics: data-dependent counts. Do not give this file to partners.",
            "extract": str(out), "manifest": str(manifest_path), "nonce": nonce, "rows": released,
            "input_rows": rows, "engine": engine,
            "seconds": round(seconds, 3), "batch_rows": batch_rows,
            "input": str(input_path) if not frame_input else "a dask DataFrame",
            "columns": {p.rc.name: p.diag.as_dict() for p in plans if p.rc.mechanism is not None},
        }
        if sampler is not None:
            diag["reported_cells"] = {p.rc.name: p.reported for p in plans if p.rc.mechanism is not None}
        held_subjects = held_rows = 0
        if charges is not None:
            held_subjects = int((~charges.within).sum())
            held_rows = rows - released
            diag["ledger"] = {
                "path": str(ledger_path), "lifetime_epsilon": cap, "subjects_charged": int(charges.within.sum()),
                "held_back_subjects": held_subjects, "held_back_rows": held_rows,
                "eps_charged_max": float(charges.eps[charges.within].max()) if charges.within.any() else 0.0,
            }
        tmp_diag = staged.add(diagnostics_path)
        write_text_atomic_into(tmp_diag, json.dumps(diag, indent=2) + "\n", mode=0o600)
        release_id = None
        if charges is not None:
            staged.check()  # a stop asked for before the ledger commit leaves nothing at all
            release_id = _record(ledger_path, charges, plans, policy, manifest, cap)
        try:
            if overwrite and manifest_path.exists():
                manifest_path.unlink()  # never leave an old manifest beside a new extract
            # once the ledger counts the release, a stop signal no longer cancels it
            staged.commit(check=release_id is None)
        except OSError as err:
            if release_id is None:
                raise
            raise OutputError(
                f"the release was recorded in ledger {ledger_path} as release {release_id}, but its files could not "
                f"be moved into place ({err.strerror or err}: {err.filename or out}); nothing was published. The "
                "ledger counts this release for every subject in it (an over-count, the safe side: nobody's spend "
                "is understated). Fix the output folder and run the release again; tell your privacy officer if "
                "the extra count matters.") from None
    return ReleaseResult(manifest, out, manifest_path, diagnostics_path, time.perf_counter() - t0,
                         ledger_path if charges is not None else None, release_id, held_subjects, held_rows)


def _record(ledger_path: Path, charges: LedgerCharges, plans: list[ColumnPlan], policy: LoadedPolicy,
            manifest: Manifest, cap: float | None) -> int:
    """Record the staged release in the ledger (one transaction; the cap re-checked under its lock)."""
    from .ledger import Ledger, ReleaseMeta

    meta = ReleaseMeta(policy_sha256=manifest.policy_sha256, extract_sha256=manifest.extract.sha256,
                       nonce=manifest.nonce,
                       columns={p.rc.name: {"eps": float(p.rc.mechanism.epsilon), "memoized": bool(p.rc.memoize)}
                                for p in plans if p.rc.mechanism is not None})
    with Ledger.open(ledger_path, create=True) as led:
        return led.record_release(meta, charges.subjects[charges.within], charges.eps[charges.within],
                                  charges.memo_updates(), lifetime_epsilon=cap,
                                  key_fingerprint=manifest.key_fingerprint)


def write_text_atomic_into(tmp: Path, text: str, mode: int = 0o644) -> None:
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    with os.fdopen(fd, "w", encoding="utf-8") as f:
        f.write(text)
        f.flush()
        os.fsync(f.fileno())
