"""Encoding: raw input cells -> the integer codes or numbers a column's mechanism randomizes,
with missing, unknown and out-of-bounds values handled as the policy says (counted in the
column's steward-only diagnostics; a refused value is a ``DataError`` naming the rows)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import DataError
from ..policy import NumericColumn

if TYPE_CHECKING:
    from .columns import ColumnPlan

_NUMBER = r"^\s*[-+]?((\d+(\.\d*)?)|(\.\d+))([eE][-+]?\d+)?\s*$"


def _rows_text(mask: np.ndarray, row0: int) -> str:
    idx = np.flatnonzero(mask)
    first = int(idx[0]) + row0 + 1
    return f"{idx.size} value(s) in this batch, the first at data row {first}"


def _as_string_array(values: pa.Array, name: str | None = None, row0: int = 0) -> pa.Array:
    """A column's values as text (numbers as their decimal text).  Text stored as bytes (or as
    text) that is not valid UTF-8 is a ``DataError`` naming the column ``name`` and the first such
    row; the cells are never shown."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_dictionary(values.type):
        values = values.dictionary_decode()
    if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
        if pa.types.is_string(values.type) and name is not None:
            _check_utf8(values, name, row0)  # a Parquet writer may have stored any bytes as text
        return values
    try:
        return pc.cast(values, pa.string())
    except pa.ArrowInvalid:
        if not (pa.types.is_binary(values.type) or pa.types.is_large_binary(values.type)
                or pa.types.is_fixed_size_binary(values.type)):
            raise
        _check_utf8(values, name or "?", row0)
        raise


def check_text(values: pa.Array, name: str, row0: int) -> None:
    """A column copied as it is (a public column): text that is not valid UTF-8 is a DataError
    naming the column and its first such row (it would break every reader of the extract).
    Binary cells count as text here: a CSV extract can only hold them as text, and bytes that
    are not text in the clear are refused in a Parquet extract too (encode them, e.g. as hex,
    or drop the column)."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    t = values.type.value_type if pa.types.is_dictionary(values.type) else values.type
    if not (pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_binary(t)
            or pa.types.is_large_binary(t) or pa.types.is_fixed_size_binary(t)):
        return
    if pa.types.is_dictionary(values.type):
        if _utf8_ok(values.dictionary):
            return
        values = values.dictionary_decode()
    _check_utf8(values, name, row0)


def _utf8_ok(values: pa.Array) -> bool:
    try:
        if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
            values.validate(full=True)
        else:
            pc.cast(values, pa.string())
        return True
    except pa.ArrowInvalid:
        return False


def _check_utf8(values: pa.Array, name: str, row0: int) -> None:
    """Raise a DataError at the first row of ``values`` that is not valid UTF-8 (if any), found by
    halving: about log2(n) validations of slices, each vectorized."""
    if _utf8_ok(values):
        return
    lo, hi = 0, len(values)  # the first bad row is in [lo, hi)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _utf8_ok(values.slice(lo, mid - lo)):
            lo = mid
        else:
            hi = mid
    raise DataError(f"column {name!r} holds text that is not valid UTF-8 (an encoding problem), the first at data row "
                    f"{row0 + lo + 1}. Re-encode that column's text as UTF-8 in the input (for example decode it "
                    "from the encoding it was written in, such as Latin-1, and write it again as text) and run the "
                    "release again.")


def _label_codes(strings: pa.Array, labels: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """(codes, missing) of text values: trimmed, then looked up among the labels (-1: unknown)."""
    if pa.types.is_string(strings.type) or pa.types.is_large_string(strings.type):
        strings = pc.utf8_trim_whitespace(strings)
    missing = np.asarray(pc.is_null(strings).to_numpy(zero_copy_only=False))
    codes_arr = pc.index_in(strings, value_set=pa.array(labels, pa.string()))
    codes = np.asarray(pc.fill_null(codes_arr, -1).to_numpy(zero_copy_only=False)).astype(np.int64)
    return codes, missing


def encode_categorical(values: pa.Array, plan: ColumnPlan, row0: int) -> np.ndarray:
    """Policy labels -> integer codes; missing/unknown handled as the policy says (a joint group:
    its product codes, ``encode_joint``)."""
    if plan.members is not None:
        return encode_joint(values, plan, row0)
    rc = plan.rc
    name = rc.name
    if rc.type == "binned":
        raise AssertionError("binned columns use encode_binned")
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if pa.types.is_dictionary(values.type) and not _utf8_ok(values.dictionary):
        values = values.dictionary_decode()  # its rows are checked below (a bad entry may be in no row here)
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
        codes, missing = _label_codes(_as_string_array(values, name, row0), rc.labels)
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
    elif pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t) or pa.types.is_boolean(t):
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
                            f"missing: error. Fill them in the input, set missing: as-answer for {name!r} to "
                            "release missingness as its own answer (partners then estimate the share missing and "
                            "the statistics among rows with a value), or set missing: {fill: VALUE} (a value within "
                            "the bounds).")
        if col.missing == "as-answer":   # the mechanism randomizes 'missing' as its own answer (NaN here)
            plan.diag.missing_as_category += int(missing.sum())
        else:
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
    codes = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, len(edges) - 2).astype(np.int64)
    if plan.rc.missing_code is not None:   # missing: as-answer (encode_numeric left them NaN)
        codes[np.isnan(x)] = plan.rc.missing_code
    return codes


def encode_joint(values: pa.Array, plan: ColumnPlan, row0: int) -> np.ndarray:
    """A joint group's product codes: each member encoded as on its own (its diagnostics counted), the
    codes combined in mixed radix, the first member most significant (``joint.combine_codes``).
    ``values`` is the struct array of the members' columns (``ColumnPlan.values``)."""
    from ..joint import combine_codes

    assert plan.members is not None
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    codes = [encode(values.field(i), m, row0) for i, m in enumerate(plan.members)]
    plan.sum_member_diagnostics()
    return combine_codes(codes, [len(m.rc.domain_labels) for m in plan.members])


def encode(values: pa.Array, plan: ColumnPlan, row0: int) -> np.ndarray:
    """A privatized column's values as its mechanism takes them (codes, bin indices or numbers)."""
    if plan.members is not None:
        return encode_joint(values, plan, row0)
    if plan.rc.type == "categorical":
        return encode_categorical(values, plan, row0)
    if plan.rc.type == "binned":
        return encode_binned(values, plan, row0)
    return encode_numeric(values, plan, row0)
