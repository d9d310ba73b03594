"""Tables in memory: a pandas DataFrame, a pyarrow Table or a pyarrow RecordBatchReader as the
input of a release (``MemorySource``), and a release returned in memory (``privatize_to_memory``).

``MemorySource`` presents an in-memory input as ``io.TableSource`` presents a Parquet file:
typed columns (``format`` "parquet"), a ``schema``, ``batches`` of exactly ``batch_rows`` rows.
Every input is read in chunks of ``CHUNK_ROWS`` rows converted to Arrow one at a time, so a
DataFrame is never copied whole.  Column types are normalized once, for the whole input:

* text is Arrow ``string`` and bytes ``binary`` (pandas' ``str``/``string[pyarrow]`` columns,
  Arrow's large types), dictionary (categorical) columns are read as their values: a pandas
  category order, or a category no row has, never reaches the extract or the manifest, and the
  policy's categories stay the declared domain;
* pandas' missing values (``None``, ``NaN``, ``pd.NA``, ``NaT``; nullable ``Int64``, ``Float64``,
  ``boolean`` and ``string`` columns) are missing values;
* a pandas object column must hold one type (text, bytes, whole numbers, numbers or booleans):
  a column that mixes types, a column name that is not text, and a name used twice are user
  errors naming the column;
* the DataFrame index is never read unless the policy names one of its levels (a column or
  ``subject_key``): that level then becomes a column, ahead of the others.  An index without a
  name (the default RangeIndex) is never a column.

The input's digest for the steward's nonce record (release/nonces.py) is the SHA-256 of the
Arrow IPC stream of the normalized chunks (schema without metadata, then the chunks of
``CHUNK_ROWS`` rows, each column copied afresh so that only its values count, not its buffers'
layout), computed during the first full pass a release makes, so it costs no pass of its own:
the same rows with the same column types have one digest whether they come as a DataFrame, a
Table or a reader, in any chunks.  A RecordBatchReader can be read only once: when a release needs more than one pass (a
ledger's pre-pass, the one-row-per-person check), it is first spooled, in that same single pass,
to a private Arrow IPC file in the steward's private folder (mode 0600, removed when the release
ends, on error or stop signal too), and every pass reads that file.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import os
import shutil
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any, Literal, NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import DataError, OptionError, UsageError
from .io import _rebatch, partial_path, private_dir, remove_stale_partials
from .keys import SecretKey
from .manifest import Manifest
from .policy import LoadedPolicy

CHUNK_ROWS = 65536
SPOOL_NAME = "input-spool.arrow"
KINDS = {"pandas-dataframe": "the pandas DataFrame given", "arrow-table": "the pyarrow Table given",
         "arrow-stream": "the pyarrow RecordBatchReader given"}

# pandas' inferred kinds of an object column, and the Arrow type each is read as
_OBJECT_TYPES: dict[str, pa.DataType] = {
    "string": pa.string(), "empty": pa.string(), "bytes": pa.binary(), "integer": pa.int64(),
    "floating": pa.float64(), "mixed-integer-float": pa.float64(), "integer-na": pa.float64(),
    "boolean": pa.bool_()}
_MIXED = ("mixed", "mixed-integer")


def input_kind(obj: Any) -> str | None:
    """The kind of an in-memory input (a key of ``KINDS``), None for anything else."""
    if isinstance(obj, pd.DataFrame):
        return "pandas-dataframe"
    if isinstance(obj, pa.Table):
        return "arrow-table"
    if isinstance(obj, pa.RecordBatchReader):
        return "arrow-stream"
    return None


def _plain(t: pa.DataType) -> pa.DataType:
    """The type a column is read as: dictionaries as their values, large text and bytes as the plain types."""
    if pa.types.is_dictionary(t):
        return _plain(t.value_type)
    if pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return pa.string()
    if pa.types.is_large_binary(t) or pa.types.is_binary_view(t):
        return pa.binary()
    return t


def _to_type(arr: pa.Array | pa.ChunkedArray, t: pa.DataType) -> Any:
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode() if isinstance(arr, pa.Array) else pa.chunked_array(
            [c.dictionary_decode() for c in arr.chunks], type=arr.type.value_type)
    return arr if arr.type == t else arr.cast(t)


class _Hasher(io.RawIOBase):
    """A write-only file that only digests what is written (the sink of an IPC stream writer)."""

    def __init__(self) -> None:
        self.h = hashlib.sha256()

    def writable(self) -> bool:
        return True

    def write(self, b: Any) -> int:
        self.h.update(b)
        return len(memoryview(b))


class _StreamDigest:
    """SHA-256 of the Arrow IPC stream of ``schema`` and the chunks added (``add``), in order."""

    def __init__(self, schema: pa.Schema) -> None:
        self._sink = _Hasher()
        self._file = pa.PythonFile(self._sink, mode="w")
        self._writer = pa.ipc.new_stream(self._file, schema)

    def add(self, batch: pa.RecordBatch) -> None:
        # each column copied afresh first: its IPC bytes then depend only on its values, not on how
        # its buffers were laid out (a slice of a longer array, a validity bitmap without nulls)
        self._writer.write_batch(pa.RecordBatch.from_arrays([pa.concat_arrays([c]) for c in batch.columns],
                                                            schema=batch.schema))

    def hexdigest(self) -> str:
        self._writer.close()
        self._file.close()
        return self._sink.h.hexdigest()


class MemorySource:
    """A pandas DataFrame, pyarrow Table or RecordBatchReader read like ``io.TableSource``
    (module docstring).  ``index_columns``: the names a DataFrame's index levels may take as
    columns (the policy's columns and subject_key)."""

    format = "parquet"  # typed columns, as from Parquet (no CSV text rules)
    dataset = None
    size_bytes = 0
    digests_while_reading = True  # the first full pass gives content_sha256

    def __init__(self, obj: Any, index_columns: frozenset[str] = frozenset(),
                 read_columns: frozenset[str] | None = None) -> None:
        kind = input_kind(obj)
        if kind is None:
            raise UsageError("the input must be a path, a URI, a pandas DataFrame, a pyarrow Table, a pyarrow "
                             "RecordBatchReader or a dask DataFrame.")
        self.kind = kind
        self.location = KINDS[kind]
        self.content_sha256: str | None = None
        self.num_rows: int | None = None
        self._obj = obj
        self._read = False  # a RecordBatchReader not spooled was read (it can be read once)
        self._spool: Path | None = None
        self._spool_tmp: Path | None = None
        self._index: list[tuple[str, int]] = []  # DataFrame index levels read as columns (name, level)
        # the columns a release may read (the policy's columns that are not dropped, and the
        # subject); None: all.  Only these must have one type, and only they are digested: a
        # column the policy drops is never read, whatever it holds
        self._wanted = read_columns
        if kind == "pandas-dataframe":
            self.schema = self._frame_schema(obj, index_columns)
            self.num_rows = len(obj)
        else:
            self.schema = self._arrow_schema(obj.schema)
            if kind == "arrow-table":
                self.num_rows = obj.num_rows
        self._read_names = [n for n in self.schema.names if read_columns is None or n in read_columns]

    # -- the layout ------------------------------------------------------------------------

    def _check_names(self, names: list[Any]) -> None:
        for n in names:
            if not isinstance(n, str):
                raise DataError(f"{self.location} has a column named {n!r} ({_kind_of(n)}), but column names "
                                "must be text (the policy names columns by text). Rename it, for example with "
                                "df.columns = df.columns.map(str), or drop it.")
        dups = sorted({n for n in names if names.count(n) > 1})
        if dups:
            raise DataError(f"{self.location} has duplicate column names: {', '.join(map(repr, dups))}. Rename "
                            "them so each column has one name.")

    def _arrow_schema(self, schema: pa.Schema) -> pa.Schema:
        self._check_names(list(schema.names))
        return pa.schema([pa.field(f.name, _plain(f.type)) for f in schema])

    def _frame_schema(self, df: pd.DataFrame, index_columns: frozenset[str]) -> pa.Schema:
        names = list(df.columns)
        self._check_names(names)
        levels = list(df.index.names)
        self._index = [(n, i) for i, n in enumerate(levels) if isinstance(n, str) and n in index_columns]
        clash = [n for n, _ in self._index if n in names]
        if clash:
            raise DataError(f"{self.location} has {clash[0]!r} both as a column and as a level of its index, and "
                            "the policy names it: it is not clear which one to release. Rename one of them (for "
                            "example df.rename_axis(index=...)), or drop the column.")
        fields = [pa.field(n, self._series_type(n, df.index.get_level_values(i).to_series(index=None)))
                  for n, i in self._index]
        fields += [pa.field(n, (self._series_type if self._reads(n) else self._any_type)(n, df.iloc[:, j]))
                   for j, n in enumerate(names)]
        return pa.schema(fields)

    def _reads(self, name: str) -> bool:
        return self._wanted is None or name in self._wanted

    def _any_type(self, name: str, s: pd.Series) -> pa.DataType:
        """The type of a column no release reads (the policy drops it): its own where it has one,
        else null (it is never converted)."""
        try:
            return self._series_type(name, s)
        except DataError:
            return pa.null()

    def _series_type(self, name: str, s: pd.Series) -> pa.DataType:
        inferred = pd.api.types.infer_dtype(s, skipna=True) if s.dtype == np.dtype(object) else None
        t = _OBJECT_TYPES.get(inferred) if inferred is not None else None
        if t is not None:
            return t
        try:
            if inferred is not None:
                # dates, decimals, lists, dicts...: as pyarrow reads them (pandas calls a column of
                # lists or dicts "mixed" too, but it has one type)
                t = pa.array(s, from_pandas=True).type
            else:
                t = pa.array(s.iloc[:0], from_pandas=True).type
            if inferred in _MIXED and not pa.types.is_nested(t):
                raise TypeError  # scalars of several kinds (text and bytes, say), whatever pyarrow makes of them
        except (pa.ArrowException, TypeError, ValueError):
            if inferred in _MIXED:
                raise DataError(f"column {name!r} of {self.location} holds values of several types (for example "
                                "text and numbers) in one object column, so it has no single type to release. "
                                "Convert it to one type first (for example df[col].astype(str) for text, or "
                                "pd.to_numeric(df[col], errors='coerce') for numbers).") from None
            raise DataError(self._type_message(name)) from None
        return _plain(t)

    def _type_message(self, name: str) -> str:
        return (f"column {name!r} of {self.location} holds values that cannot be read as one column type (text, "
                "numbers, booleans, dates). Convert the column to one type first (for example df[col].astype(str) "
                "for text, or pd.to_numeric(df[col], errors='coerce') for numbers), or drop it.")

    @property
    def column_names(self) -> list[str]:
        return list(self.schema.names)

    def parquet_dataset(self, fragment_rows: int) -> None:
        """Not a Parquet input: dataset parts are cut from the rows as they are read."""
        return None

    def dictionary_columns(self, names: list[str]) -> list[str]:
        return []  # dictionary columns are read as their values (module docstring)

    def check_unchanged(self, bytes_read: int | None = None) -> None:
        """Nothing to check: the input is an object in memory (do not change it while a release reads it)."""

    # -- reading ---------------------------------------------------------------------------

    def _frame_chunks(self, columns: list[str]) -> Iterator[pa.RecordBatch]:
        df = self._obj
        pos = {n: j for j, n in enumerate(df.columns)}
        level = dict(self._index)
        sub = pa.schema([self.schema.field(c) for c in columns])
        for a in range(0, len(df), CHUNK_ROWS):
            b = min(len(df), a + CHUNK_ROWS)
            arrays = []
            for c in columns:
                t = sub.field(c).type
                s = df.index[a:b].get_level_values(level[c]) if c in level else df.iloc[a:b, pos[c]]
                try:
                    arr = pa.array(s, type=t if s.dtype == np.dtype(object) else None, from_pandas=True)
                    arrays.append(_to_type(arr, t))
                except (pa.ArrowException, TypeError, ValueError):
                    raise DataError(self._type_message(c)) from None
            yield pa.RecordBatch.from_arrays(arrays, schema=sub)

    def _arrow_chunks(self, source: Iterator[pa.RecordBatch], columns: list[str]) -> Iterator[pa.RecordBatch]:
        sub = pa.schema([self.schema.field(c) for c in columns])
        for b in source:
            try:
                arrays = [_to_type(b.column(c), sub.field(c).type) for c in columns]
            except (pa.ArrowException, KeyError):
                raise DataError(f"{self.location} gave a batch whose columns or types differ from its schema. "
                                "Give a reader whose batches all have the schema it declares.") from None
            yield pa.RecordBatch.from_arrays(arrays, schema=sub)

    def _chunks(self, columns: list[str]) -> Iterator[pa.RecordBatch]:
        """The input's rows as chunks of ``CHUNK_ROWS`` rows (the last may be shorter), only ``columns``."""
        if self._spool is not None:
            with pa.memory_map(str(self._spool)) as mm:
                f = pa.ipc.open_file(mm)
                for i in range(f.num_record_batches):
                    yield f.get_batch(i).select(columns)
            return
        if self.kind == "pandas-dataframe":
            yield from self._frame_chunks(columns)
        elif self.kind == "arrow-table":
            yield from _rebatch(self._arrow_chunks(iter(self._obj.select(columns).to_batches()), columns),
                                CHUNK_ROWS)
        else:
            if self._read:
                raise RuntimeError("a RecordBatchReader input was read twice without a spooled copy")
            self._read = True
            yield from _rebatch(self._arrow_chunks(iter(self._obj), columns), CHUNK_ROWS)

    def _digesting(self, columns: list[str], stop: Callable[[], None] | None = None) -> Iterator[pa.RecordBatch]:
        """A full pass that also digests every column (the first one a release makes)."""
        digest = _StreamDigest(pa.schema([self.schema.field(n) for n in self._read_names]))
        rows = 0
        for chunk in self._chunks(self._read_names):
            digest.add(chunk)
            rows += chunk.num_rows
            yield chunk.select(columns)
            if stop is not None:
                stop()
        self.num_rows = rows
        self.content_sha256 = digest.hexdigest()

    def batches(self, columns: list[str], batch_rows: int, csv_types: dict[str, pa.DataType] | None = None,
                dictionary: list[str] | None = None) -> Iterator[pa.RecordBatch]:
        """Batches of exactly ``batch_rows`` rows (the last may be shorter), only ``columns``."""
        if batch_rows < 1:
            raise UsageError("--batch-rows must be a positive number of rows")
        chunks = self._digesting(columns) if self.content_sha256 is None else self._chunks(columns)
        return _rebatch(chunks, batch_rows)

    def digest(self, stop: Callable[[], None] | None = None) -> str:
        """The input's digest (module docstring), read in a pass of its own if no pass gave it yet."""
        if self.content_sha256 is None:
            for _ in self._digesting([], stop):
                pass
        assert self.content_sha256 is not None
        return self.content_sha256

    def prepare(self, passes: int, stop: Callable[[], None] | None = None) -> None:
        """A release will read the input ``passes`` times: spool a RecordBatchReader first when
        that is more than once (module docstring)."""
        if self.kind != "arrow-stream" or passes < 2 or self._spool is not None:
            return
        folder = private_dir()
        dest = folder / SPOOL_NAME
        remove_stale_partials(dest)  # a spooled copy left by a run that was killed
        path = partial_path(dest)
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        self._spool_tmp = path
        try:
            spooled = pa.schema([self.schema.field(n) for n in self._read_names])
            with os.fdopen(fd, "wb") as f, pa.ipc.new_file(f, spooled) as writer:
                for chunk in self._digesting(self._read_names, stop):
                    writer.write_batch(chunk)
        except BaseException:
            self.close()
            raise
        self._spool = path

    def close(self) -> None:
        """Remove the spooled copy, if any."""
        path = self._spool_tmp
        if path is not None:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(path)
            self._spool_tmp = None
        self._spool = None


def _kind_of(name: Any) -> str:
    if isinstance(name, bool):
        return "a boolean"
    if isinstance(name, (int, float, np.number)):
        return "a number"
    if isinstance(name, tuple):
        return "a name of several parts: the frame has several levels of column names"
    return "not text"


# -- a release returned in memory --------------------------------------------------------------

class InMemoryRelease(NamedTuple):
    """The privatized table (``data``: a pandas DataFrame or a pyarrow Table) and its manifest."""

    data: Any
    manifest: Manifest


def privatize_to_memory(input: Any, policy: LoadedPolicy, key: SecretKey, *,
                        as_: Literal["pandas", "arrow"] = "pandas", nonce: str | None = None,
                        file_name: str = "extract.parquet", ledger_path: Path | str | None = None,
                        allow_partial: bool = False, batch_rows: int | None = None,
                        on_progress: Callable[[int], None] | None = None) -> InMemoryRelease:
    """Privatize ``input`` (a path, a URI, a pandas DataFrame, a pyarrow Table or RecordBatchReader)
    under ``policy`` and return the privatized table in memory with its manifest.

    The release is a release like ``privatize``'s into a Parquet file named ``file_name`` (the
    name its manifest gives the extract): the same key, nonce, policy and input give the table
    ``pq.read_table`` reads from that file, value for value and type for type.  Its nonce is
    recorded in the steward's nonce record, and with a ledger (``ledger_path``, or the default
    one when the policy sets budget.lifetime_epsilon) everyone in it is charged, as by a file
    release.  It is made in a private temporary folder in the steward's private folder, removed
    before this returns (on error and stop signal too): nothing is left behind, steward-only
    diagnostics included.  ``as_``: "arrow" (a pyarrow Table) or "pandas" (its ``to_pandas()``)."""
    from dataclasses import replace

    from .release.options import DEFAULT_BATCH_ROWS, ReleaseOptions
    from .release.run import run_release

    if as_ not in ("pandas", "arrow"):
        raise OptionError(f"privatize_to_memory(as_={as_!r})", "{as_} must be 'pandas' or 'arrow'.")
    name = Path(file_name).name
    if name != file_name or Path(name).suffix.lower() not in (".parquet", ".pq"):
        raise OptionError(f"privatize_to_memory(file_name={file_name!r})",
                          "{file_name} is the extract's file name the manifest gives (no folder), ending in "
                          ".parquet: for example extract.parquet.")
    folder = Path(tempfile.mkdtemp(prefix=".in-memory-release-", dir=private_dir()))
    try:
        os.mkdir(folder / "out", 0o700)
        opts = ReleaseOptions.of(input, policy, folder / "out" / name, manifest_path=folder / "out" / "manifest.json",
                                 diagnostics_path=folder / "diagnostics.json",
                                 batch_rows=DEFAULT_BATCH_ROWS if batch_rows is None else batch_rows,
                                 overwrite=False, nonce=nonce, ledger_path=ledger_path, allow_partial=allow_partial,
                                 engine="local", scheduler=None, fragment_rows=None)
        res = run_release(replace(opts, extract_text="in memory"), policy, key, on_progress)
        table = pq.read_table(res.extract_path, memory_map=False)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return InMemoryRelease(table.to_pandas() if as_ == "pandas" else table, res.manifest)


__all__ = ["CHUNK_ROWS", "KINDS", "InMemoryRelease", "MemorySource", "input_kind", "privatize_to_memory"]
