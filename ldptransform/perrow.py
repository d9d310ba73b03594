"""The partner's per-row reader: an extract as a pandas DataFrame of per-row unbiased estimates.

``read_estimates(extract, manifest=None)`` turns every report into its row's unbiased estimate,
as the decoders of ``ldpt estimate`` do before they add them up (``Mechanism.per_row_columns`` /
``per_row_values``, mechanisms/base.py), so that the mean of a frame column over the rows is
exactly the point estimate ``estimate`` gives:

* a column released by a mean mechanism: one column of its name, the written value;
* a categorical or binned column: one column per category, ``<column>=<category>``, the row's
  unbiased indicator (1[v in S(y)] - q*) / (p* - q*) (docs/formulas.md section 0.3; a ``matrix``
  column: the row of the inverse channel of its report, section 11);
* a numeric column with ``missing: as-answer`` and no bins: ``<column>=<missing>``, the row's
  unbiased missing indicator, and ``<column>*present``, the value times the present indicator,
  whose mean divided by the share present is the mean among rows with a value (section 18);
* a column with no per-row unbiased estimate (a distribution mechanism) is left out, with the
  reason in ``frame.attrs["notes"]``: never a biased column dressed as an unbiased one;
* public columns pass through as they are (released in the clear, not protected).

Under ``budget.strategy: sample`` a row reports only some of its columns (which ones, by the keyed
PRF, independently of the data): an unreported cell is 0 and every reported cell of the column is
divided by the share of rows that reported it, so the column's mean and sums stay unbiased (and
its mean is, again, exactly ``estimate``'s average over the reporting rows).

The extract is described by its manifest (given, or beside the extract under its default name,
whose hash and size the extract must match, as ``estimate`` requires), or else by the Arrow field
metadata that a Parquet extract carries (``manifest.field_metadata``; docs/extract-format.md).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from . import mechanisms as mech
from .errors import DataError, LdptError, ManifestError

if TYPE_CHECKING:
    import pandas as pd

    from .manifest import ColumnEntry, Manifest

#: What may and may not be computed from the frame (``frame.attrs["caution"]``, docs/extract-format.md).
CAUTION = (
    "Each privatized value in this frame is one row's unbiased estimate: on average over the noise it equals "
    "the row's true value (as the release encoded it), but the noise that protects the row dominates it, so "
    "it is not that value. Valid: means, sums and shares of a column over all rows or over groups defined by "
    "PUBLIC columns, and differences of such means, are unbiased. The mean of the product of two columns "
    "made from two different privatized input columns is unbiased too, because each input column is "
    "randomized independently within a row; the variance of such a product is not, nor is the product of two "
    "columns made from the same input column (two of its categories, or its value and its share missing). "
    "Under budget.strategy sample the unreported cells are 0 and the reported ones are divided by the share "
    "of rows that reported the column: means and sums stay unbiased, products of two privatized columns do "
    "not. NOT valid: medians, quantiles, minima and maxima, the variance or standard deviation of a column "
    "and any square of it, thresholds, filters or groupings on a privatized column, correlations computed "
    "naively, and any model fitted as if the values were true. Standard errors must come from ldpt estimate "
    "(or account for each mechanism's variance): the spread of these columns is mostly noise. A mean over "
    "few rows is mostly noise too. Linking rows to other data to single out people may be unlawful and "
    "breach your agreement with the data steward."
)

#: Rows decoded per batch (as ``estimate`` reads).
BATCH_ROWS = 65536


@dataclass
class _Column:
    """One input column of the extract: its entry, and for a privatized one its mechanism, the frame
    columns it gives and the per-batch values of them."""

    entry: ColumnEntry
    mechanism: mech.Mechanism | None
    outputs: list[mech.PerRowColumn]
    chunks: list[Any]
    reported: int = 0


def read_estimates(extract: Path | str, manifest: Path | str | None = None) -> pd.DataFrame:
    """The extract as a DataFrame of per-row unbiased estimates, for partners who run their own
    analyses: ``frame[col].mean()`` is the unbiased estimate of the column's mean (a category
    column ``"site=North Works"``: the share of rows in it), equal to ``estimate``'s point estimate.

    ``manifest``: the release's manifest (by default the extract's name with .manifest.json, if
    that file exists; the extract must then match its hash and size).  Without one, a Parquet
    extract is described by its own field metadata (docs/extract-format.md).

    ``frame.attrs``: ``caution`` (what is and is not valid to compute from the frame: means, sums,
    shares and differences of means over rows or groups of PUBLIC columns are unbiased; medians,
    quantiles, extremes, variances, filters or groupings on privatized columns, naive correlations
    and models fitted as if the values were true are not; standard errors come from ``estimate``),
    ``columns`` (frame column -> what its mean estimates), ``left_out`` (input columns with no
    per-row unbiased estimate) and ``notes`` (why, and how unreported cells were handled).
    """
    import pandas as pd

    path = Path(extract)
    entries, src, where, rows_stated, release = _describe(path, None if manifest is None else Path(manifest))
    cols = _columns(entries, where)
    names = [o.name for c in cols for o in c.entry.outputs]
    frame_names = [n for c in cols for n in _frame_names(c)]
    dup = sorted({n for n in frame_names if frame_names.count(n) > 1})
    if dup:
        raise DataError(f"{where}: the per-row frame would hold two columns named {', '.join(map(repr, dup))} (a "
                        "column of the extract has the name of a category column NAME=CATEGORY of another). Read "
                        "the extract with pandas or pyarrow, or estimate it with ldpt estimate.")
    from .estimate import csv_type, damaged_extract

    types = {o.name: csv_type(o.dtype) for c in cols for o in c.entry.outputs}
    rows = 0
    try:
        for batch in src.batches(names, BATCH_ROWS, csv_types=types):
            _add_batch(cols, batch, where, rows)
            rows += batch.num_rows
    except LdptError:
        raise
    except (pa.ArrowException, IndexError, OverflowError, ValueError) as err:
        raise damaged_extract(where, rows + 1, err) from None
    if rows_stated is not None and rows != rows_stated:
        raise ManifestError(f"{where}: the extract has {rows} rows but its manifest says {rows_stated}. The files do "
                            "not belong together, or the extract is incomplete; run `ldpt validate`.")
    data: dict[str, Any] = {}
    meanings: dict[str, str] = {}
    notes: list[str] = []
    left_out: list[str] = []
    for c in cols:
        _finish(c, rows, src, data, meanings, notes, left_out)
    if release is not None and release.privacy.placeholder_rows:
        notes.append(f"placeholder rows: {release.privacy.placeholder_rows}")
    frame = pd.DataFrame(data, index=pd.RangeIndex(rows), columns=frame_names)
    frame.attrs["caution"] = CAUTION
    frame.attrs["columns"] = meanings
    frame.attrs["left_out"] = left_out
    frame.attrs["notes"] = notes
    return frame


def _describe(path: Path, manifest: Path | None) -> tuple[list[ColumnEntry], Any, str, int | None, Manifest | None]:
    """(column entries, a reader of the extract, its name for messages, the stated row count or None,
    the manifest or None): from the manifest when one is given or lies beside the extract, else from
    the extract's field metadata."""
    from .estimate import open_extract
    from .io import TableSource
    from .manifest import default_manifest_path, entries_from_fields

    default = default_manifest_path(path)
    if manifest is not None or default.exists():
        m, src, mpath = open_extract(path, manifest, verify=True)
        return list(m.columns), src, f"extract {path} (manifest {mpath})", m.rows, m
    src = TableSource(path)
    where = f"extract {path}"
    entries = entries_from_fields(list(src.schema), where) if src.format == "parquet" else None
    if entries is None:
        what = ("a CSV extract carries no column metadata" if src.format == "csv" else
                "its columns carry no ldptransform metadata (an extract written before extracts described "
                "themselves)")
        raise ManifestError(f"{where}: {what}, and there is no manifest beside it ({default.name}). Give the "
                            "release's manifest: read_estimates(extract, manifest=PATH).")
    return entries, src, where, None, None


def _columns(entries: list[ColumnEntry], where: str) -> list[_Column]:
    out = []
    for e in entries:
        if e.mechanism is None:
            out.append(_Column(e, None, [], []))
            continue
        try:
            m = mech.build(e.mechanism)
        except LdptError as err:
            raise DataError(f"{where}: the mechanism spec of column {e.name!r} cannot be rebuilt ({err}). Ask the "
                            "data steward for an intact copy of the release.") from None
        want = [f.name for f in m.output_fields(e.name)]
        if [o.name for o in e.outputs] != want:
            raise DataError(f"{where}: column {e.name!r} is described with the extract column(s) "
                            f"{', '.join(repr(o.name) for o in e.outputs)}, but its mechanism writes "
                            f"{', '.join(map(repr, want))}. Ask the data steward for an intact copy of the release.")
        out.append(_Column(e, m, m.per_row_columns(e.name), []))
    return out


def _frame_names(c: _Column) -> list[str]:
    if c.mechanism is None:
        return [c.entry.name]
    return [o.name for o in c.outputs]


def _add_batch(cols: list[_Column], batch: pa.RecordBatch, where: str, row0: int) -> None:
    from .estimate import _chunk, _take, reported_mask

    n = batch.num_rows
    for c in cols:
        if c.mechanism is None:
            c.chunks.append(_chunk(batch.column(c.entry.name)))
            continue
        arrays = [_chunk(batch.column(o.name)) for o in c.entry.outputs]
        mask = reported_mask(arrays)
        mine = _take(arrays, mask)
        bad = c.mechanism.count_invalid(mine)
        if bad:
            raise DataError(f"{where}: column {c.entry.name!r} has {bad} value(s) outside the output alphabet of its "
                            f"mechanism ({c.mechanism.name}) near data row {row0 + 1}. The extract was altered or "
                            "does not belong to its description; run `ldpt validate` for details.")
        c.reported += len(mine[0])
        if not c.outputs:
            continue
        values = np.asarray(c.mechanism.per_row_values(mine), dtype=float)
        if mask is None:
            c.chunks.append(values)
            continue
        full = np.zeros((n, len(c.outputs)))
        full[mask] = values
        c.chunks.append(full)


def _finish(c: _Column, rows: int, src: Any, data: dict[str, Any], meanings: dict[str, str], notes: list[str],
            left_out: list[str]) -> None:
    """The frame columns of one input column (into ``data``, with their meanings), and its notes."""
    name = c.entry.name
    if c.mechanism is None:
        typ = c.chunks[0].type if c.chunks else src.schema.field(name).type
        data[name] = pa.chunked_array(c.chunks, type=typ).to_pandas()
        meanings[name] = ("copied from the extract as it is: a public column, released in the clear and NOT "
                          "protected by local differential privacy")
        return
    note = c.mechanism.per_row_note(name)
    if note:
        notes.append(note)
    if not c.outputs:
        left_out.append(name)
        return
    values = np.concatenate(c.chunks) if c.chunks else np.zeros((0, len(c.outputs)))
    if c.reported == 0 and rows > 0:
        values = np.full((rows, len(c.outputs)), np.nan)
        notes.append(f"{name}: no row reported this column, so its per-row columns are empty (NaN)")
    elif c.reported < rows:
        values = values * (rows / c.reported)
        notes.append(f"{name}: {rows - c.reported} of {rows} rows did not report this column (budget.strategy "
                     "sample); their cells are 0 and the reported ones are divided by the share that reported, so "
                     "means and sums over rows stay unbiased")
    for j, o in enumerate(c.outputs):
        data[o.name] = values[:, j]
        meanings[o.name] = o.meaning
