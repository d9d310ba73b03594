"""Streaming readers and writers, and atomic replacement of files.

Readers yield Arrow record batches of exactly ``batch_rows`` rows (the last may be
shorter), whatever the file's own blocks or row groups, so that memory stays flat.
Writers write beside the destination under a hidden ``.NAME.ldpt-partial-PID-XXXX``
name and rename on success; an interrupted run leaves nothing at the destination (a
partial file from a killed run is removed by the next run on the same destination).
Parquet output is written in fixed row groups, so its bytes do not depend on the batch
size either.
"""

from __future__ import annotations

import contextlib
import contextvars
import errno
import hashlib
import io
import os
import re
import secrets
import shutil
import signal
import stat
import threading
from collections.abc import Callable, Iterator
from queue import Empty, Full, Queue
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Any, Literal, NamedTuple

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from .errors import DataError, InputFileError, OutputError, OutputExistsError, UsageError

FileFormat = Literal["csv", "parquet"]
FORMATS: dict[str, FileFormat] = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet"}
ROW_GROUP_ROWS = 131072
CSV_BLOCK_BYTES = 1 << 20
_PARTIAL = re.compile(r"^\.(?P<name>.+)\.ldpt-partial-(?P<pid>\d+)-[0-9a-f]{8}$")


def file_format(path: Path, role: str) -> FileFormat:
    fmt = FORMATS.get(Path(path).suffix.lower())
    if fmt is None:
        raise UsageError(f"{role} {path}: the file name must end in .csv or .parquet (the format is chosen by "
                         "extension).")
    return fmt


# an input's text may be compressed: the codec by the name's last extension (data.csv.gz, data.tsv.zst)
COMPRESSIONS = {".gz": "gzip", ".zst": "zstd"}
_CODEC_TOOLS = {"gzip": "gzip", "zstd": "zstd"}
TAB_SUFFIXES = frozenset({".tsv", ".tab"})  # text read as tab-separated without a delimiter being named
DEFAULT_DELIMITER = ","


class InputKind(NamedTuple):
    """What an input file's name says of it: its format, the codec its text is compressed with
    (None: not compressed) and whether it is named as tab-separated text (.tsv, .tab)."""

    format: FileFormat
    compression: str | None
    tab: bool


def input_kind(path: Path | str) -> InputKind:
    """The ``InputKind`` of an input file by its name: .csv, .tsv or .tab text, optionally
    compressed (.gz, .zst), or .parquet/.pq; a user error for any other name."""
    name = Path(path).name.lower()
    compression = None
    for ext, codec in COMPRESSIONS.items():
        if name.endswith(ext):
            compression, name = codec, name[: -len(ext)]
    suffix = Path(name).suffix if name else ""
    if suffix in TAB_SUFFIXES:
        kind = InputKind("csv", compression, True)
    elif FORMATS.get(suffix) == "csv":
        kind = InputKind("csv", compression, False)
    elif FORMATS.get(suffix) == "parquet" and compression is None:
        return InputKind("parquet", None, False)
    elif FORMATS.get(suffix) == "parquet":
        raise UsageError(f"input {path}: a Parquet file is compressed inside already and is read as it is, not "
                         f"from a {Path(path).suffix} file. Decompress it and give the .parquet file.")
    else:
        raise UsageError(f"input {path}: the file name must end in .csv, .tsv or .tab (text, which may also be "
                         "compressed: .csv.gz, .csv.zst, .tsv.gz, .tsv.zst), or in .parquet (the format is chosen "
                         "by extension). Rename the file to say what it holds.")
    if compression is not None and not pa.Codec.is_available(compression):
        raise UsageError(f"input {path}: this installation cannot decompress {compression} (the pyarrow it runs on "
                         f"was built without it). Decompress the file first (`{_CODEC_TOOLS[compression]} -d -k "
                         f"{path}`) and release the plain file.")
    return kind


def delimiter_problem(delimiter: str) -> str | None:
    """What is wrong with a CSV delimiter (None: nothing): it must be one character, and neither
    the quote nor a line break (those mark quoted cells and the ends of rows)."""
    if len(delimiter) != 1:
        return (f"must be exactly one character, not {len(delimiter)} (for a tab: --delimiter tab, or \"\\t\" in "
                "double quotes in a YAML policy)")
    if delimiter in "\"\r\n":
        return "cannot be the double quote or a line break: they mark quoted cells and the ends of rows"
    return None


def delimiter_option(value: str) -> str:
    """A delimiter as a command line or caller names it: the word ``tab`` (or the two characters
    backslash-t) stands for the tab character; anything else is itself."""
    return "\t" if value.lower() in ("tab", "\\t") else value


def resolve_delimiter(path: Path | str, csv_delimiter: str = DEFAULT_DELIMITER,
                      delimiter: str | None = None) -> str:
    """The delimiter a text input is read with: ``delimiter`` (a command line's or caller's
    explicit choice) if given; else the policy's ``csv_delimiter`` when it names one other than the
    default comma; else a tab for a file named .tsv or .tab (also compressed), else the comma."""
    if delimiter is not None:
        return delimiter
    if csv_delimiter != DEFAULT_DELIMITER:
        return csv_delimiter
    try:
        return "\t" if input_kind(path).tab else DEFAULT_DELIMITER
    except UsageError:
        return DEFAULT_DELIMITER


def open_input_bytes(path: Path, compression: str | None = None) -> Any:
    """A text input's bytes as a binary stream (``read(n)``), decompressed when ``compression``
    names a codec; for the error paths that look into the file again."""
    if compression is None:
        return open(path, "rb")  # noqa: SIM115 (the caller closes it)
    return pa.input_stream(str(path), compression=compression)


def _skip_to(f: Any, offset: int, chunk: int = 1 << 22) -> None:
    """Move a freshly opened stream to ``offset`` (seeking where it can, else reading past)."""
    if getattr(f, "seekable", lambda: False)():
        f.seek(offset)
        return
    left = offset
    while left > 0:
        got = f.read(min(chunk, left))
        if not got:
            return
        left -= len(got)


def _decompress_problem(err: BaseException) -> str | None:
    """What a decompressor's error says of the file, in words (None: not such an error)."""
    text = str(err).lower()
    if "truncated" in text:
        return "it ends in the middle of its compressed data: it was cut short"
    if "header check" in text or "unknown frame" in text or "magic" in text or "unknown header" in text:
        return _NOT_COMPRESSED
    if any(w in text for w in ("inflate", "decompress", "zlib", "zstd", "gzip", "data check", "corrupt", "frame")):
        return "its compressed data is damaged"
    return None


_NOT_COMPRESSED = "it does not hold data in that format"


def compressed_message(path: Path, compression: str, what: str) -> str:
    tool = _CODEC_TOOLS.get(compression, compression)
    if what == _NOT_COMPRESSED:
        fix = (f"If the file is not compressed, rename it without its {Path(path).suffix} ending; if it was compressed "
               f"with another program, decompress it and release the plain file (`{tool} -t {path}` checks it).")
    else:
        fix = (f"The file may have been damaged or cut short by an interrupted copy or download: check it with `{tool} "
               f"-t {path}`, copy or compress it again, and run the release again.")
    return f"input file {path} cannot be decompressed as {compression} ({what}). Nothing was written. {fix}"


def check_decompresses(path: Path, compression: str, chunk: int = 1 << 22) -> str | None:
    """Read a compressed input through (streaming, the error path): None if it decompresses to
    its end, else the refusal (``compressed_message``)."""
    try:
        with open_input_bytes(path, compression) as f:
            while f.read(chunk):
                pass
    except (pa.ArrowException, OSError) as err:
        return compressed_message(path, compression, _decompress_problem(err) or "its compressed data is damaged")
    return None


# -- reading ------------------------------------------------------------------------------

class TableSource:
    """A CSV or Parquet file, or a Parquet dataset (a folder or object-store URI of Parquet
    files, see dataset.py), read as a stream of record batches.

    Text input may be tab-separated (named .tsv or .tab, or another delimiter: see
    ``resolve_delimiter``; ``delimiter`` is an explicit choice, which wins over the policy's
    ``csv_delimiter`` and the file's name) and compressed (.gz, .zst: see ``input_kind``); a
    compressed file is decompressed as it streams, and its digest and size are the file's own
    (compressed) bytes."""

    def __init__(self, path: Path | str, *, csv_null_values: list[str] | None = None,
                 csv_delimiter: str = DEFAULT_DELIMITER, string_columns: bool = True,
                 delimiter: str | None = None) -> None:
        from .dataset import ParquetDataset, is_uri

        self.location = str(path)
        self.path = Path(path) if not is_uri(path) else Path(str(path).split("://", 1)[1])
        self._nulls = csv_null_values if csv_null_values is not None else [""]
        self._delim = resolve_delimiter(self.path, csv_delimiter, delimiter)
        self.compression: str | None = None
        self.dataset: ParquetDataset | None = None
        self.num_rows: int | None = None
        self.content_sha256: str | None = None  # CSV: SHA-256 of the bytes its first full pass read
        self.schema: pa.Schema  # every file and dataset has one (a dataset's is its first file's)
        if is_uri(path) or self.path.is_dir():
            self.format = "parquet"
            self.dataset = ParquetDataset(path)
            self.schema = self.dataset.schema
            self.num_rows = self.dataset.num_rows
            self.size_bytes = self.dataset.size_bytes
            self._check_names()
            return
        kind = input_kind(self.path)
        self.format, self.compression = kind.format, kind.compression
        if self.format == "csv":
            problem = delimiter_problem(self._delim)
            if problem is not None:
                named = ("the delimiter given (--delimiter)" if delimiter is not None else
                         "the policy's input.csv_delimiter")
                raise UsageError(f"input {self.path}: {named} {self._delim!r} {problem}. Name another delimiter.")
        if not self.path.exists():
            raise InputFileError(f"input file {self.path} does not exist. Check the path.")
        if not self.path.is_file():
            raise InputFileError(f"input {self.path} is not a file or a folder of Parquet files. Check the path.")
        if not os.access(self.path, os.R_OK):
            raise InputFileError(f"input file {self.path} is not readable by this user. Check its permissions.")
        self._stat0 = file_state(self.path)
        self.size_bytes = self._stat0[0]
        try:
            if self.format == "parquet":
                self._pf = pq.ParquetFile(self.path)
                self.schema = self._pf.schema_arrow
                self.num_rows = self._pf.metadata.num_rows
            else:
                sniff_csv_encoding(self.path, compression=self.compression)
                with self._open_csv(None, {}, self._plain_stream()) as reader:
                    self.schema = reader.schema
                    self.schema.names  # noqa: B018  (names are decoded here: a header that is not UTF-8 fails now)
        except UnicodeDecodeError:
            raise DataError(encoding_message(self.path, 1, None, None)) from None
        except (pa.ArrowException, OSError) as err:
            if self.format == "csv":
                raise DataError(self._csv_error(err, 0, None)) from None
            raise InputFileError(f"input file {self.path} cannot be read as {self.format.upper()}: "
                                 f"{_clean_arrow_message(err)}. Check that the file is complete and really "
                                 f"is {self.format.upper()}.") from None
        self._check_names()

    def _check_names(self) -> None:
        names = self.schema.names
        dups = sorted({n for n in names if names.count(n) > 1})
        if dups:
            raise DataError(f"input {self.location} has duplicate column names: {', '.join(map(repr, dups))}. "
                            "Rename them so each column has one name.")

    def parquet_dataset(self, fragment_rows: int) -> Any:
        """This Parquet input (a file or a dataset) as a dataset.ParquetDataset cut into fragments
        of at most ``fragment_rows`` rows; None for CSV."""
        from .dataset import ParquetDataset

        if self.format != "parquet":
            return None
        if self.dataset is not None and self.dataset.fragment_rows == fragment_rows:
            return self.dataset
        cached = getattr(self, "_file_ds", None)
        if cached is None or cached.fragment_rows != fragment_rows:
            cached = self._file_ds = ParquetDataset(self.location, fragment_rows=fragment_rows)
        return cached

    @property
    def column_names(self) -> list[str]:
        return list(self.schema.names)

    @property
    def delimiter(self) -> str:
        """The delimiter a text input is read with (``resolve_delimiter``)."""
        return self._delim

    def _plain_stream(self) -> Any:
        """A compressed text input's decompressed bytes (None for a plain file: the reader opens it)."""
        return None if self.compression is None else open_input_bytes(self.path, self.compression)

    def _open_csv(self, columns: list[str] | None, types: dict[str, pa.DataType],
                  file: Any = None) -> Any:
        read = pacsv.ReadOptions(block_size=CSV_BLOCK_BYTES, use_threads=True)
        parse = pacsv.ParseOptions(delimiter=self._delim, newlines_in_values=True)
        conv = pacsv.ConvertOptions(include_columns=columns, column_types=types, null_values=self._nulls,
                                    strings_can_be_null=True, quoted_strings_can_be_null=True)
        return contextlib.closing(pacsv.open_csv(self.path if file is None else file, read_options=read,
                                                 parse_options=parse, convert_options=conv))

    def _csv_error(self, err: Exception, rows_done: int, columns: list[str] | None) -> str:
        """The message for a CSV the reader refused: an encoding problem and a cell too large for
        the reader are located in the file (line, data row, column); anything else keeps the
        reader's diagnosis (without the data it quotes)."""
        if self.compression is not None:  # a damaged file first: the paths below read it through again
            problem = _decompress_problem(err)
            refusal = check_decompresses(self.path, self.compression) if problem is None else \
                compressed_message(self.path, self.compression, problem)
            if refusal is not None:
                return refusal
        text = str(err).lower()
        if "utf8" in text or "utf-8" in text:
            return encoding_message(self.path, *find_invalid_utf8(self.path, self._delim, columns, self.compression))
        if "straddl" in text or "block size" in text:
            return large_cell_message(self.path, self._delim, rows_done, compression=self.compression)
        m = re.search(r"Expected (\d+) columns?, got (\d+)", str(err))
        bad = self._bad_row() if m else None
        if m and bad is not None:
            return (f"input file {self.path}: data row {bad} (record {bad + 1} of the file, the header being record "
                    f"1) has {m.group(2)} field(s) where the header has {m.group(1)}. Fix that row (every row needs "
                    "the same number of fields as the header; a quote that is opened and never closed, or a "
                    "delimiter inside an unquoted cell, are the usual causes), and run the release again.")
        return (f"input file {self.path} could not be read after data row {rows_done}: "
                f"{_clean_arrow_message(err)}. Fix that part of the file (for CSV: every row needs the same number "
                "of fields, quotes must be closed).")

    def _bad_row(self) -> int | None:
        """The data row (1-based) of the first CSV record whose number of fields is not the
        header's, found by reading the file again in one thread, where the reader counts records
        (the error path only; the record's text is never kept)."""
        found: list[int] = []

        def handler(row: Any) -> str:
            if row.number is not None:
                found.append(int(row.number))
            return "error"

        read = pacsv.ReadOptions(block_size=CSV_BLOCK_BYTES, use_threads=False)
        parse = pacsv.ParseOptions(delimiter=self._delim, newlines_in_values=True, invalid_row_handler=handler)
        conv = pacsv.ConvertOptions(include_columns=[], null_values=self._nulls)
        try:
            plain = self._plain_stream()
            with contextlib.closing(pacsv.open_csv(self.path if plain is None else plain, read_options=read,
                                                   parse_options=parse, convert_options=conv)) as reader:
                for _ in reader:
                    pass
        except (pa.ArrowException, OSError):
            pass
        return found[0] - 1 if found and found[0] > 1 else None

    def check_unchanged(self, bytes_read: int | None = None) -> None:
        """Refuse (a DataError) if the input file changed since it was opened: its size or
        modification time differs, or (``bytes_read``) the reader did not stop where the file ended
        when it was opened.  Called after every full pass over the input, so that a release (and
        the ledger's pre-pass before it) is of the rows of one file, all of them."""
        if self.dataset is not None:
            self.dataset.check_unchanged()
            return
        if not hasattr(self, "_stat0"):
            return
        now = file_state(self.path, missing_ok=True)
        if now != self._stat0 or (bytes_read is not None and bytes_read != self._stat0.size):
            raise DataError(changed_message(self.location, self._stat0, now, bytes_read))

    @property
    def digests_while_reading(self) -> bool:
        """A CSV file: every full pass digests the bytes it parses (``content_sha256``)."""
        return self.format == "csv" and self.dataset is None

    def _passed(self, digest: str) -> None:
        """A full CSV pass read bytes with this SHA-256: the first one is the input's digest, every
        later pass must have read the very same bytes."""
        if self.content_sha256 is None:
            self.content_sha256 = digest
        elif digest != self.content_sha256:
            raise DataError(changed_message(self.location, self._stat0, file_state(self.path, missing_ok=True),
                                            contents=True))

    def batches(self, columns: list[str], batch_rows: int,
                csv_types: dict[str, pa.DataType] | None = None,
                dictionary: list[str] | None = None) -> Iterator[pa.RecordBatch]:
        """Batches of exactly ``batch_rows`` rows (last may be shorter), only ``columns``.

        CSV columns are read as text unless ``csv_types`` names another type for them.
        Parquet text columns named in ``dictionary`` are read dictionary-encoded (each distinct
        value once per row group: cheap to map to codes); see ``dictionary_columns``.
        """
        if batch_rows < 1:
            raise UsageError("--batch-rows must be a positive number of rows")
        batches = _rebatch(self._raw_batches(columns, batch_rows, csv_types or {}, dictionary or []), batch_rows)
        # Parquet is read one batch ahead in a thread (decoding overlaps the caller's work).  Not
        # CSV: its streaming reader already parses blocks ahead in its own threads, and reading
        # ahead on top of it raised the peak memory of a CSV release with the rows (measured:
        # 1.13x -> 1.29x from 200,000 to 2,000,000 rows)
        return prefetched(batches) if self.format == "parquet" else batches

    def dictionary_columns(self, names: list[str]) -> list[str]:
        """Those of ``names`` that a Parquet input stores as text (the ones read_dictionary applies to)."""
        if self.format != "parquet":
            return []
        return [n for n in names if n in self.schema.names and
                (pa.types.is_string(self.schema.field(n).type) or pa.types.is_large_string(self.schema.field(n).type))]

    def _raw_batches(self, columns: list[str], batch_rows: int,
                     csv_types: dict[str, pa.DataType], dictionary: list[str]) -> Iterator[pa.RecordBatch]:
        rows_done = 0
        if self.dataset is not None:  # its reader names the file and the row in its own errors
            for frag in self.dataset.fragments:
                yield from self.dataset.read(frag, columns, batch_rows, dictionary)
            return
        if self.format == "parquet":
            # one reader per run of row groups (at most DEFAULT_FRAGMENT_ROWS rows), not one for the
            # whole file: a single long-lived reader's memory grew with the file (measured: peak RSS
            # 1.39x from 1M to 10M rows, 1.07x this way, and faster)
            from .dataset import DEFAULT_FRAGMENT_ROWS

            ds = self.parquet_dataset(DEFAULT_FRAGMENT_ROWS)
            for frag in ds.fragments:
                yield from ds.read(frag, columns, batch_rows, dictionary)
            self.check_unchanged()
            return
        try:
            types = {c: csv_types.get(c, pa.string()) for c in columns}
            with DigestingFile(self.path) as raw, pa.PythonFile(raw, mode="r") as f, \
                    self._open_csv(columns, types, f if self.compression is None else
                                   pa.CompressedInputStream(f, self.compression)) as reader:
                for b in reader:
                    rows_done += b.num_rows
                    yield b
                bytes_read = raw.tell()
                digest = raw.hexdigest()
        except (pa.ArrowInvalid, pa.ArrowIOError, OSError) as err:
            self.check_unchanged()  # a file changed meanwhile is said to have changed
            raise DataError(self._csv_error(err, rows_done, columns)) from None
        self.check_unchanged(bytes_read)
        self._passed(digest)


# Told the bytes read so far by each pass over a CSV input (the command line's progress); called
# from the CSV reader's threads, once per block
csv_bytes_read: contextvars.ContextVar[Callable[[int], None] | None] = contextvars.ContextVar(
    "ldpt_csv_bytes_read", default=None)


class DigestingFile(io.RawIOBase):
    """A file read front to back whose bytes are hashed (SHA-256) as they are read: the CSV
    reader's only way into a CSV input, so that a pass knows the exact bytes it parsed."""

    def __init__(self, path: Path) -> None:
        self._f = open(path, "rb")  # noqa: SIM115 (closed by close())
        self._h = hashlib.sha256()
        self._pos = 0
        self._told = csv_bytes_read.get()  # the command line's progress, told the bytes read so far

    def readable(self) -> bool:
        return True

    def readinto(self, buf: Any) -> int:
        n = self._f.readinto(buf) or 0
        if n:
            self._h.update(memoryview(buf)[:n])
            self._pos += n
            if self._told is not None:
                self._told(self._pos)
        return n

    def read(self, size: int | None = -1) -> bytes:
        data = self._f.read(-1 if size is None else size)
        self._h.update(data)
        self._pos += len(data)
        if data and self._told is not None:
            self._told(self._pos)
        return data

    def tell(self) -> int:
        return self._pos

    def hexdigest(self) -> str:
        return self._h.hexdigest()

    def close(self) -> None:
        self._f.close()
        super().close()


class FileState(NamedTuple):
    """What a release records of an input file when it opens it; ``GONE`` for a file removed or
    renamed.

    The status-change time (ctime) moves with every write, truncation or change of attributes and
    cannot be set back by a user (unlike the modification time, which ``touch -r`` restores), so a
    rewrite that keeps the size and the modification time still shows; device and inode show a
    file replaced by another one under the same name."""

    size: int
    mtime_ns: int
    ctime_ns: int = -1
    dev: int = -1
    ino: int = -1


GONE = FileState(-1, -1)


def file_state(path: Path, missing_ok: bool = False) -> FileState:
    """The ``FileState`` of a file; ``GONE`` for a file that is not there (``missing_ok``)."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        if not missing_ok:
            raise
        return GONE
    return FileState(st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_dev, st.st_ino)


def changed_message(location: str, before: tuple[int, ...], after: tuple[int, ...] | None,
                    bytes_read: int | None = None, *, contents: bool = False) -> str:
    """The refusal of an input that changed while a release read it (nothing is written).
    ``before``/``after``: ``FileState`` (or the (size, mtime) of a dataset's file); ``contents``:
    two passes over the file read different bytes."""
    if after is not None and after[0] < 0:
        what = "it was removed or renamed"
    elif after is not None and len(after) > 4 and len(before) > 4 and after[3:5] != before[3:5]:
        what = "it was replaced by another file of the same name"
    elif after is not None and after[0] != before[0]:
        what = f"its size went from {before[0]} to {after[0]} bytes"
    elif after is not None and after[1] != before[1]:
        what = "its modification time changed"
    elif after is not None and len(after) > 2 and len(before) > 2 and after[2] != before[2]:
        what = ("it was written to or its attributes were changed (its status-change time moved, although its size "
                "and modification time are as before)")
    elif contents:
        what = "two passes over it read different bytes"
    else:
        what = f"the reader stopped after {bytes_read} of its {before[0]} bytes"
    return (f"input {location} changed while the release was reading it ({what}), so the rows read are not one "
            "consistent table (some could be missing or be read twice). Nothing was written. Let whatever writes the "
            "file finish (or release a copy that nothing writes to) and run the release again.")


_UTF16_HINT = ("CSV input must be UTF-8: convert it (for example save it as \"CSV UTF-8\" from a spreadsheet program, "
               "or run `iconv -f {enc} -t UTF-8 {path} > converted.csv`) and release the converted file.")


def sniff_csv_encoding(path: Path, size: int = 4096, compression: str | None = None) -> None:
    """Refuse a CSV file that is not UTF-8 text by its first ``size`` bytes (decompressed): a
    UTF-16 or UTF-32 byte-order mark, or the zero bytes between characters of UTF-16 text
    without a mark."""
    with open_input_bytes(path, compression) as f:
        head = f.read(size)
    boms = ((b"\xff\xfe\x00\x00", "UTF-32"), (b"\x00\x00\xfe\xff", "UTF-32"), (b"\xff\xfe", "UTF-16"),
            (b"\xfe\xff", "UTF-16"))
    enc = next((e for bom, e in boms if head.startswith(bom)), None)
    how = "it starts with a {enc} byte-order mark"
    if enc is None and b"\x00" in head:
        even, odd = head[0::2], head[1::2]
        zeros_even, zeros_odd = even.count(0) / max(len(even), 1), odd.count(0) / max(len(odd), 1)
        if max(zeros_even, zeros_odd) > 0.3 and min(zeros_even, zeros_odd) < 0.05:
            enc, how = "UTF-16", "every other byte of its text is zero"
        else:
            raise DataError(f"input file {path} holds zero bytes near its start: it is not a text CSV file (perhaps "
                            "another format saved under a .csv name, or text in an encoding other than UTF-8). Export "
                            "the table as CSV in UTF-8 and release that file.")
    if enc is not None:
        raise DataError(f"input file {path} looks {enc} encoded ({how.format(enc=enc)}), not UTF-8. "
                        + _UTF16_HINT.format(enc=enc, path=path))


def find_invalid_utf8(path: Path, delimiter: str, columns: list[str] | None, compression: str | None = None,
                      chunk: int = 1 << 22) -> tuple[int, int | None, str | None]:
    """Where a CSV file first holds bytes that are not UTF-8 in a column the reader reads
    (``columns``; None: any): (line number, data row or None when a quoted cell above may hold a
    line break, column name or None); line 0 when none is found.  Streams the file in chunks
    (the error path only); each chunk is decoded by the codec, in C."""
    header = _header(path, delimiter, compression)
    line, quotes, carry = 1, 0, b""
    with open_input_bytes(path, compression) as f:
        while True:
            block = f.read(chunk)
            data = carry + block  # starts at the beginning of a line
            start = 0
            while True:
                try:
                    data[start:].decode("utf-8")
                    break
                except UnicodeDecodeError as err:
                    pos = start + err.start
                    if block and err.reason == "unexpected end of data":
                        break  # a character cut by the chunk's end: read on
                    line_no = line + data.count(b"\n", 0, pos)
                    if line_no == 1:
                        return 1, None, None
                    line_start = data.rfind(b"\n", 0, pos) + 1
                    field = _field_index(data[line_start:pos].decode("utf-8", errors="replace"), delimiter)
                    name = header[field] if header is not None and field < len(header) else None
                    if columns is None or name is None or name in columns:
                        exact = quotes + data.count(b'"', 0, pos) == 0  # no quoted cell above: lines are rows
                        return line_no, (line_no - 1 if exact else None), name
                    start = pos + 1  # in a column the release does not read: look further
            if not block:
                return 0, None, None
            cut = data.rfind(b"\n") + 1
            line += data.count(b"\n", 0, cut)
            quotes += data.count(b'"', 0, cut)
            carry = data[cut:]


def _header(path: Path, delimiter: str, compression: str | None = None) -> list[str] | None:
    import csv

    with open_input_bytes(path, compression) as f:
        head = f.read(CSV_BLOCK_BYTES)
    end = head.find(b"\n")
    first = head if end < 0 else head[: end + 1]
    try:
        return next(csv.reader([first.decode("utf-8-sig").rstrip("\r\n")], delimiter=delimiter))
    except (UnicodeDecodeError, StopIteration, csv.Error):
        return None


def _field_index(prefix: str, delimiter: str) -> int:
    """The 0-based field a position is in, given the text of its line before it."""
    import csv

    try:
        return len(next(csv.reader([prefix + "x"], delimiter=delimiter))) - 1
    except (StopIteration, csv.Error):
        return prefix.count(delimiter)


def encoding_message(path: Path, line: int, row: int | None, column: str | None) -> str:
    where = "it" if line == 0 else "its header (line 1)" if line == 1 else (
        f"line {line}" + (f" (data row {row})" if row is not None else "")
        + (f", column {column!r}" if column is not None else ""))
    return (f"input file {path} is not valid UTF-8 text: {where} holds bytes that are not UTF-8 (an encoding problem: "
            "the file, or that cell, was saved in another encoding such as Latin-1 or Windows-1252). CSV input must "
            "be UTF-8: convert the file (for example `iconv -f WINDOWS-1252 -t UTF-8 FILE > converted.csv`, or save it "
            "as \"CSV UTF-8\" from a spreadsheet program) and release the converted file.")


def _long_line(f: Any, limit: int, chunk: int) -> tuple[int, int] | None:
    """(line number, offset of its first byte) of the first line longer than ``limit`` bytes."""
    import numpy as np

    pos, line, last_nl = 0, 1, -1
    while block := f.read(chunk):
        nls = np.flatnonzero(np.frombuffer(block, dtype=np.uint8) == 10) + pos
        ends = np.concatenate([[last_nl], nls])
        over = np.flatnonzero(np.diff(ends) - 1 > limit)
        if over.size:
            k = int(over[0])
            return line + k, int(ends[k]) + 1
        if nls.size:
            line += int(nls.size)
            last_nl = int(nls[-1])
        pos += len(block)
        if pos - last_nl - 1 > limit:  # the line being read is already too long
            return line, last_nl + 1
    return None


def _longest_field(f: Any, begin: int, delimiter: str, chunk: int) -> int:
    """The 0-based index of the longest field of the line starting at ``begin`` (quotes ignored),
    ``f`` being a stream there."""
    import numpy as np

    pos, prev, field, best, best_field = begin, begin - 1, 0, -1, 0
    while block := f.read(chunk):
        a = np.frombuffer(block, dtype=np.uint8)
        nl = np.flatnonzero(a == 10)
        if nl.size:
            a = a[: int(nl[0])]
        seps = np.flatnonzero(a == ord(delimiter)) + pos
        if seps.size:
            lengths = np.diff(np.concatenate([[prev], seps])) - 1
            j = int(np.argmax(lengths))
            if lengths[j] > best:
                best, best_field = int(lengths[j]), field + j
            prev, field = int(seps[-1]), field + int(seps.size)
        pos += len(a)
        if nl.size:
            break
    if pos - prev - 1 > best:
        best_field = field
    return best_field


def large_cell_message(path: Path, delimiter: str, rows_done: int, chunk: int = 1 << 22,
                       compression: str | None = None) -> str:
    """A CSV row larger than the reader's block (CSV_BLOCK_BYTES): names the first line that long
    and its longest field, found by streaming the file (numpy over each chunk; the error path)."""
    limit = CSV_BLOCK_BYTES
    mib = f"{limit / (1 << 20):g} MiB"
    with open_input_bytes(path, compression) as f:
        found = _long_line(f, limit, chunk)
        if found is None:
            return (f"input file {path}: after data row {rows_done} a quoted value runs on for more than {mib} (the "
                    "largest row the CSV reader takes). A quote that is opened and never closed makes the rest of the "
                    "file one cell: check the quotes after that row, and run the release again.")
        line, begin = found
    with open_input_bytes(path, compression) as f:
        _skip_to(f, begin, chunk)
        field = _longest_field(f, begin, delimiter, chunk)
    header = _header(path, delimiter, compression)
    column = f"column {header[field]!r}" if header is not None and field < len(header) else f"field {field + 1}"
    return (f"input file {path}: line {line}, {column}, holds a cell too large for a release (its row is larger than "
            f"{mib}, the largest row the CSV reader takes). Cells of a release are categories, numbers or short "
            "text: shorten or empty that cell (or remove that column from the file), or look for a quote that is "
            "opened and never closed, and run the release again.")


def _clean_arrow_message(err: Exception) -> str:
    """Arrow's messages can quote a whole CSV row; keep the diagnosis, drop the data."""
    msg = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
    m = re.search(r"Expected (\d+) columns?, got (\d+)", msg)
    if m:
        return f"a row has {m.group(2)} fields where the header has {m.group(1)}"
    if "conversion error" in msg.lower() or "invalid value" in msg.lower():
        return "a value could not be converted to the column's type"
    msg = re.sub(r":\s*'[^']*'.*$", "", msg)
    msg = re.sub(r"\"[^\"]{20,}\"", "<...>", msg)
    return msg[:200]


class _Failed:
    def __init__(self, err: BaseException) -> None:
        self.err = err


_DONE = object()


class _ReadAhead:
    """The background half of ``prefetched``: reads the source into a bounded queue."""

    def __init__(self, source: Iterator[Any], depth: int) -> None:
        self.source = source
        self.queue: Queue[Any] = Queue(maxsize=depth)
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._read, name="ldpt-reader", daemon=True)
        self.thread.start()

    def _put(self, item: Any) -> bool:
        while not self.stop.is_set():
            try:
                self.queue.put(item, timeout=0.05)
                return True
            except Full:
                continue
        return False

    def _read(self) -> None:
        try:
            for item in self.source:
                if not self._put(item):
                    return
            self._put(_DONE)
        except BaseException as err:  # handed to the caller, which raises it
            self._put(_Failed(err))
        finally:
            close = getattr(self.source, "close", None)
            if close is not None:
                close()

    def get(self) -> Any:
        while True:
            try:
                return self.queue.get(timeout=0.5)
            except Empty:
                if not self.thread.is_alive() and self.queue.empty():
                    raise AssertionError("the input reader stopped without a word (a bug)") from None

    def close(self) -> None:
        self.stop.set()
        self.thread.join()


def prefetched(source: Iterator[Any], depth: int = 1) -> Iterator[Any]:
    """``source``'s items, read ahead in a background thread (at most ``depth`` items waiting),
    so that reading and decoding the next batch overlaps the caller's work on this one (pyarrow
    releases the GIL while it reads).  An error of the source is raised here, to the caller, as
    it was raised; a caller that stops early (or is closed) stops the reader, which closes the
    source, before this generator returns."""
    ahead = _ReadAhead(source, depth)
    try:
        while (item := ahead.get()) is not _DONE:
            if isinstance(item, _Failed):
                raise item.err
            yield item
    finally:
        ahead.close()


def _concat(parts: list[pa.RecordBatch]) -> pa.RecordBatch:
    if len(parts) == 1:
        return parts[0]
    return pa.Table.from_batches(parts).combine_chunks().to_batches()[0]


def _rebatch(source: Iterator[pa.RecordBatch], rows: int) -> Iterator[pa.RecordBatch]:
    """Cut the source's batches into batches of exactly ``rows`` rows (the last may be shorter).

    Batches that already have the right size (the Parquet reader's) pass through as they
    are, larger ones are sliced without copying, and only a batch made of pieces of
    several source batches is copied together.
    """
    pending: list[pa.RecordBatch] = []
    have = 0
    for b in source:
        n = b.num_rows
        if n == 0:
            continue
        start = 0
        if have:
            need = rows - have
            if n < need:
                pending.append(b)
                have += n
                continue
            pending.append(b.slice(0, need))
            yield _concat(pending)
            pending, have, start = [], 0, need
        while n - start >= rows:
            yield b if (start == 0 and n == rows) else b.slice(start, rows)
            start += rows
        if start < n:
            pending, have = [b.slice(start)], n - start
    if have:
        yield _concat(pending)


# -- writing ------------------------------------------------------------------------------

def private_dir() -> Path:
    """The steward's private folder (mode 0700) for diagnostics, the ledger and the record of
    release nonces (release/nonces.py).

    $LDPT_PRIVATE_DIR if set, else $XDG_STATE_HOME/ldptransform, else ~/.local/state/ldptransform.
    Created with mode 0700; refused (``private_folder``) when group or others may use it.
    """
    return private_folder(private_dir_location(), "private folder", "$LDPT_PRIVATE_DIR")


def private_dir_location() -> Path:
    """Where the steward's private folder is (``private_dir``), without creating or checking it."""
    env = os.environ.get("LDPT_PRIVATE_DIR")
    if env:
        return Path(env)
    base = os.environ.get("XDG_STATE_HOME") or str(Path.home() / ".local" / "state")
    return Path(base) / "ldptransform"


def private_folder(folder: Path, role: str = "private folder", named_by: str | None = None) -> Path:
    """``folder`` for steward-only files: created with mode 0700 if missing; refused (a user
    error, exit 2) when it is not a folder or when group or others can read, write or enter it."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True, mode=0o700)
        st = folder.stat()
    except FileExistsError:
        st = None
    except OSError as err:
        hint = f", or point {named_by} elsewhere." if named_by else "."
        raise UsageError(f"the {role} {folder} cannot be created ({err.strerror or err}). Create it yourself with "
                         f"`mkdir -m 700 {folder}`{hint}") from None
    if st is None or not stat.S_ISDIR(st.st_mode):
        raise UsageError(f"the {role} {folder} is not a folder. Point " + (named_by or "it") + " at a folder.")
    if st.st_mode & 0o077:
        raise UsageError(
            f"the {role} {folder} can be used by other users (mode {stat.S_IMODE(st.st_mode):04o}): it holds "
            f"steward-only files (diagnostics, ledger, nonce record), which must be private to the steward. Run "
            f"`chmod 700 {folder}`" + (f", or point {named_by} at a private folder." if named_by else "."))
    return folder


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_stale_partials(dest: Path) -> int:
    """Remove partial files left beside ``dest`` by runs that were killed."""
    dest = Path(dest)
    return _remove_stale(dest.parent, lambda name: name == dest.name)


def remove_stale_partials_in(folder: Path, suffix: str) -> int:
    """Remove the partial files that killed runs left in ``folder`` for any destination whose
    name ends in ``suffix`` (destinations with a fresh name each run, such as the default
    diagnostics file in the private folder, which ``remove_stale_partials`` never meets again)."""
    return _remove_stale(Path(folder), lambda name: name.endswith(suffix))


def _remove_stale(folder: Path, wanted: Callable[[str], bool]) -> int:
    """Remove the partial files in ``folder`` of destinations ``wanted`` names whose process is gone."""
    removed = 0
    with contextlib.suppress(OSError):
        for p in folder.iterdir():
            m = _PARTIAL.match(p.name)
            if m and wanted(m.group("name")) and not _pid_alive(int(m.group("pid"))):
                with contextlib.suppress(OSError):
                    if p.is_dir() and not p.is_symlink():
                        shutil.rmtree(p)
                    else:
                        p.unlink()
                    removed += 1
    return removed


def partial_path(dest: Path) -> Path:
    dest = Path(dest)
    return dest.parent / f".{dest.name}.ldpt-partial-{os.getpid()}-{secrets.token_hex(4)}"


def is_dataset_output(out: Path | str) -> bool:
    """An output path names a Parquet dataset (a folder of parts) when it ends in "/", is an
    existing folder, or has no file extension."""
    text = str(out)
    p = Path(out)
    return text.endswith(("/", os.sep)) or p.is_dir() or p.suffix == ""


def check_dataset_destination(dest: Path, overwrite: bool) -> None:
    dest = Path(dest)
    if not dest.parent.exists():
        raise UsageError(f"output folder {dest}: its parent folder {dest.parent} does not exist. Create it first.")
    if dest.exists() and not dest.is_dir():
        raise UsageError(f"output {dest} is a file, but an output without a file extension names a dataset folder. "
                         "Give a new folder path, or a file path ending in .parquet or .csv.")
    if dest.exists() and not overwrite:
        raise OutputExistsError(f"output folder {dest} already exists. Give --overwrite to replace it, or choose "
                                "another path.")
    if dest.exists():
        strangers = [p.name for p in dest.iterdir() if not re.fullmatch(r"part-\d{5,}\.parquet", p.name)]
        if strangers:
            raise UsageError(f"output folder {dest} holds files that are not parts of a release "
                             f"({', '.join(sorted(strangers)[:3])}{', ...' if len(strangers) > 3 else ''}); "
                             "--overwrite replaces only a folder of release parts. Choose another path.")


def check_destination(dest: Path, role: str, overwrite: bool) -> None:
    dest = Path(dest)
    if not dest.parent.exists():
        raise UsageError(f"{role} {dest}: folder {dest.parent} does not exist. Create it first.")
    if dest.exists() and not overwrite:
        raise OutputExistsError(f"{role} {dest} already exists. Give --overwrite to replace it, or choose "
                                "another path.")
    if dest.exists() and dest.is_dir():
        raise UsageError(f"{role} {dest} is a folder; give a file path.")


class StagedFiles:
    """Temporary files beside their destinations, renamed into place by ``commit()``.

    Used as a context manager: on any exception every temporary file is removed and
    nothing is renamed.  SIGTERM/SIGINT/SIGHUP, while it is active, only set a flag (an
    exception raised from a signal handler can land anywhere, for instance inside a lazy
    import or code that swallows it); ``check()`` between batches and ``commit()`` turn
    the flag into KeyboardInterrupt.  A second signal raises at once.  ``commit`` renames
    in the order the files were added; the caller adds the manifest last.
    """

    def __init__(self) -> None:
        self._items: list[tuple[Path, Path]] = []
        self._committed = False
        self._old_handlers: dict[int, Any] = {}
        self._on_exit: list[Callable[[], None]] = []
        self.stop_signal: int | None = None

    @property
    def committed(self) -> bool:
        """Every staged file was renamed into place (``commit``)."""
        return self._committed

    def on_exit(self, fn: Callable[[], None]) -> None:
        """Call ``fn`` when the block ends, after the files are renamed or removed (last
        registered, first called): for instance to release the destinations' locks."""
        self._on_exit.append(fn)

    def add(self, dest: Path) -> Path:
        dest = Path(dest)
        remove_stale_partials(dest)
        tmp = partial_path(dest)
        self._items.append((tmp, dest))
        return tmp

    def __enter__(self) -> StagedFiles:
        def _raise(signum: int, frame: Any) -> None:
            again = self.stop_signal is not None
            self.stop_signal = signum
            if again:
                raise KeyboardInterrupt(f"stopped by signal {signum}")

        for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
            with contextlib.suppress(ValueError, OSError):  # not in the main thread
                self._old_handlers[sig] = signal.signal(sig, _raise)
        return self

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> Literal[False]:
        try:
            if not self._committed:
                self.discard()
        finally:
            while self._on_exit:
                self._on_exit.pop()()
            for sig, h in self._old_handlers.items():
                with contextlib.suppress(ValueError, OSError):
                    signal.signal(sig, h)
        return False

    def destination_of(self, path: Path | str) -> Path | None:
        """The destination whose staged file (or folder) ``path`` is or lies in; None if none."""
        path = Path(path)
        for tmp, dest in self._items:
            if path == tmp or tmp in path.parents:
                return dest
        return None

    def discard(self) -> None:
        for tmp, _ in self._items:
            with contextlib.suppress(OSError):
                if tmp.is_dir() and not tmp.is_symlink():
                    shutil.rmtree(tmp)
                else:
                    tmp.unlink()

    def check(self) -> None:
        """Raise KeyboardInterrupt if a signal asked the run to stop."""
        if self.stop_signal is not None:
            raise KeyboardInterrupt(f"stopped by signal {self.stop_signal}")

    def commit(self, *, check: bool = True) -> None:
        """Rename every staged file into place.  ``check=False``: do not stop for a signal that
        arrived meanwhile (after a ledger commit the release must be completed)."""
        if check:
            self.check()
        for tmp, dest in self._items:
            if tmp.is_dir() and dest.is_dir():  # --overwrite of a dataset folder: move the old one aside first
                old = partial_path(dest)
                os.replace(dest, old)
                os.replace(tmp, dest)
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.replace(tmp, dest)
        self._committed = True


class BatchWriter:
    """Writes record batches to CSV or Parquet with a fixed schema.

    Encoding and compressing a chunk run in one background thread while the caller
    randomizes the next batch (pyarrow releases the GIL while it writes).  At most one
    chunk is in flight, so memory holds at most one extra row group, and chunks are
    written one after another in order: the bytes are those of a plain sequential write.
    After every ROW_GROUP_ROWS rows written, the thread hands the encoder's freed buffers
    back to the system, which keeps peak memory flat however many rows are written.
    An error of the writer is raised by the next ``write`` or by ``close``.
    """

    def __init__(self, path: Path, fmt: str, schema: pa.Schema) -> None:
        self.path, self.format, self.schema = Path(path), fmt, schema
        self.rows = 0
        self._buffer: list[pa.RecordBatch] = []
        self._buffered = 0
        if fmt == "parquet":
            self._writer: Any = pq.ParquetWriter(self.path, schema, compression="zstd", use_dictionary=True,
                                                 write_statistics=False)
        else:
            self._csv_schema = pa.schema([pa.field(f.name, f.type.value_type if pa.types.is_dictionary(f.type)
                                                   else f.type) for f in schema])
            self._writer = pacsv.CSVWriter(self.path, self._csv_schema)
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ldpt-writer")
        self._pending: Future | None = None
        self._unreleased = 0  # rows written since the last release_unused (writer thread only)

    def _submit(self, rows: int, fn: Any, *args: Any, **kwargs: Any) -> None:
        self._wait()
        self._pending = self._pool.submit(self._run, rows, fn, args, kwargs)

    def _run(self, rows: int, fn: Any, args: tuple, kwargs: dict) -> None:
        fn(*args, **kwargs)
        self._unreleased += rows
        if self._unreleased >= ROW_GROUP_ROWS:
            pa.default_memory_pool().release_unused()
            self._unreleased = 0

    def _wait(self) -> None:
        if self._pending is not None:
            pending, self._pending = self._pending, None
            try:
                pending.result()
            except Exception as err:
                raise _named_os_error(err, self.path) from None

    def write(self, batch: pa.RecordBatch) -> None:
        self.rows += batch.num_rows
        if self.format == "csv":
            cols = [c.dictionary_decode() if pa.types.is_dictionary(c.type) else c for c in batch.columns]
            self._submit(batch.num_rows, self._writer.write_batch, pa.record_batch(cols, schema=self._csv_schema))
            return
        self._buffer.append(batch)
        self._buffered += batch.num_rows
        while self._buffered >= ROW_GROUP_ROWS:
            self._flush(ROW_GROUP_ROWS)

    def _flush(self, rows: int) -> None:
        table = pa.Table.from_batches(self._buffer, schema=self.schema)
        self._submit(rows, self._writer.write_table, table.slice(0, rows), row_group_size=rows)
        rest = table.slice(rows)
        self._buffer = rest.to_batches() if rest.num_rows else []
        self._buffered = rest.num_rows

    def close(self) -> None:
        """Write what is buffered and close the file.  The first error is the one raised (a failed
        write leaves the writer unable to close, and that second error would hide the real one,
        such as a full disk), as an OSError naming the file when it came from the system."""
        try:
            if self.format == "parquet" and self._buffered:
                self._flush(self._buffered)
            self._wait()
        except BaseException as err:
            self._pool.shutdown(wait=True)
            with contextlib.suppress(Exception):
                self._writer.close()
            raise _named_os_error(err, self.path) from None
        self._pool.shutdown(wait=True)
        try:
            self._writer.close()
        except Exception as err:
            raise _named_os_error(err, self.path) from None


DISK_FULL = frozenset({errno.ENOSPC, errno.EDQUOT, errno.EFBIG})


def os_errno(err: BaseException) -> int | None:
    """The system error number of an error, also when Arrow reports it only in its text
    ("... Detail: [errno 28] No space left on device")."""
    if isinstance(err, OSError) and err.errno:
        return err.errno
    text = str(err)
    m = re.search(r"errno[ =:]*(\d+)", text, re.IGNORECASE)
    if m:
        return int(m.group(1))
    if "no space left on device" in text.lower():
        return errno.ENOSPC
    return None


def _named_os_error(err: BaseException, path: Path) -> BaseException:
    """An error of a writer on ``path``: an OSError with its number and the file's name when it
    came from the system (Arrow's own errors keep both only in their text); others as they are."""
    code = os_errno(err)
    if code is None or not isinstance(err, (OSError, pa.ArrowException)):
        return err
    if isinstance(err, OSError) and err.errno == code and err.filename:
        return err
    return OSError(code, os.strerror(code), str(path))


def disk_full_error(err: BaseException, dest: Path, role: str) -> OutputError | None:
    """The user error for a full disk (or quota) met while writing the ``role`` at ``dest``
    (None when ``err`` is not that)."""
    if os_errno(err) not in DISK_FULL:
        return None
    dest = Path(dest)
    return OutputError(f"the disk is full: there was no space left on the device while writing the {role} {dest} "
                       f"(in folder {dest.parent}). Nothing was written there (the partial files were removed). Free "
                       "space on that disk, or choose a destination in another folder, and run the release again.")


def sha256_stream(f: Any, chunk: int = 1 << 22, stop: Callable[[], None] | None = None) -> tuple[str, int]:
    """(SHA-256 hex digest, bytes) of what a readable binary stream holds, read in chunks
    (``stop`` is called after each one: a stop signal ends a long digest there)."""
    h = hashlib.sha256()
    size = 0
    while True:
        b = f.read(chunk)
        if not b:
            break
        h.update(b)
        size += len(b)
        if stop is not None:
            stop()
    return h.hexdigest(), size


def sha256_file(path: Path, chunk: int = 1 << 22) -> tuple[str, int]:
    with open(path, "rb") as f:
        return sha256_stream(f, chunk)


def write_text_atomic(path: Path, text: str, mode: int = 0o644) -> None:
    """Write a small text file beside its destination and rename it into place."""
    path = Path(path)
    tmp = partial_path(path)
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(OSError):
            tmp.unlink()
