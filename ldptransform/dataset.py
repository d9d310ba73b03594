"""Parquet datasets: a folder (or an object-store prefix) of Parquet files read as one table.

The order of a dataset's rows is fixed here, once, for every engine: its files sorted by their
path relative to the dataset root (names starting with "_" or "." are skipped, as are folders
with such names: ``_metadata``, ``_SUCCESS``, hidden and staging files), and within a file its
row groups in order.  Row counts come from the Parquet footers, so every row's global index is
known without reading any data; that index is what the release's randomness is addressed by,
so any engine that follows this order writes exactly what the local engine writes.

A dataset is split into *fragments*: runs of consecutive row groups of one file holding at
most ``fragment_rows`` rows (a row group larger than that is a fragment of its own).  A
release of a dataset writes one output part per fragment, ``part-00000.parquet``, ... in
fragment order; the local engine writes them one after the other, the distributed engine in
parallel, and the bytes are the same.

Locations: a local folder, a ``file://`` URI, or any URI ``pyarrow.fs.FileSystem.from_uri``
understands (``s3://bucket/prefix``, ``gs://...``, ``hdfs://...``) when pyarrow was built
with that filesystem and its credentials are configured the usual way for it.  Output
datasets are written to a local (or shared, mounted) folder only.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from .errors import DataError, InputFileError

DEFAULT_FRAGMENT_ROWS = 1 << 20
PART_NAME = "part-{:05d}.parquet"
DATASET_FORMAT = "parquet-dataset"
_DIGEST_LABEL = b"ldptransform/parquet-dataset/v1\n"


def is_uri(location: str | Path) -> bool:
    return isinstance(location, str) and "://" in location


def is_dataset(location: str | Path) -> bool:
    """A folder or a URI (read as a dataset of Parquet files), as opposed to one file."""
    if is_uri(location):
        return not str(location).lower().endswith((".parquet", ".pq", ".csv"))
    return Path(location).is_dir()


def resolve(location: str | Path) -> tuple[pafs.FileSystem, str]:
    """(filesystem, path within it) for a local path or a URI."""
    if is_uri(location):
        try:
            return pafs.FileSystem.from_uri(str(location))
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError, OSError) as err:
            raise InputFileError(f"input {location}: this location cannot be opened ({str(err).splitlines()[0]}). "
                                 "Check the URI scheme (file://, s3://, gs://, hdfs://), that pyarrow supports "
                                 "it here, and the credentials.") from None
    return pafs.LocalFileSystem(), str(Path(location).resolve())


@dataclass(frozen=True)
class Fragment:
    """Consecutive row groups of one file: rows [row0, row0 + rows) of the dataset."""

    index: int
    path: str
    row_groups: tuple[int, ...]
    row0: int
    rows: int
    size: int | None = None      # the file's size and modification time (ns) when the dataset was listed:
    mtime_ns: int | None = None  # read_fragment refuses a file that changed since (None: not known)
    local_state: tuple[int, ...] | None = None  # a local file: its io.FileState then (status-change time, inode)

    @property
    def part_name(self) -> str:
        return PART_NAME.format(self.index)


def _skipped(rel: str) -> bool:
    return any(p.startswith(("_", ".")) for p in rel.split("/"))


class ParquetDataset:
    """The files, schema, row counts and fragments of a Parquet dataset (footers only)."""

    def __init__(self, location: str | Path, *, fragment_rows: int = DEFAULT_FRAGMENT_ROWS) -> None:
        self.location = str(location)
        self.fragment_rows = int(fragment_rows)
        self.fs, self.root = resolve(location)
        files = self._list_files()
        self.files: list[str] = [p for _, p, _ in files]
        self.size_bytes = sum(s or 0 for _, _, s in files)
        self.schema: pa.Schema | None = None
        self.fragments: list[Fragment] = []
        row0 = 0
        for rel, path, _ in files:
            md = self._metadata(path)
            self._check_schema(md.schema.to_arrow_schema(), rel, files[0][0])
            first = len(self.fragments)
            row0 = self._add_fragments(md, path, row0, fragment_rows)
            size, mtime = self._states.get(path, (None, None))
            local = self._local_state(path)
            self.fragments[first:] = [replace(f, size=size, mtime_ns=mtime, local_state=local)
                                      for f in self.fragments[first:]]
        assert self.schema is not None
        self.num_rows: int = row0

    def _local_state(self, path: str) -> tuple[int, ...] | None:
        """A local file's full state (io.FileState) as listed; None on other file systems."""
        if not isinstance(self.fs, pafs.LocalFileSystem):
            return None
        from .io import file_state

        state = file_state(Path(path), missing_ok=True)
        size, mtime = self._states.get(path, (None, None))
        return tuple(state) if (state.size, state.mtime_ns) == (size, mtime) else None

    def check_unchanged(self) -> None:
        """Refuse (a DataError) if any file of the dataset changed since it was listed (run after
        every pass is done, before a release is published)."""
        seen: set[str] = set()
        for frag in self.fragments:
            if frag.path not in seen:
                seen.add(frag.path)
                check_fragment_unchanged(self.fs, frag)

    def _list_files(self) -> list[tuple[str, str, int | None]]:
        """(path relative to the root, full path, size) of every Parquet file, in name order."""
        location = self.location
        try:
            info = self.fs.get_file_info(self.root)
            if info.type == pafs.FileType.NotFound:
                raise InputFileError(f"input {location} does not exist. Check the path.")
            if info.type == pafs.FileType.File:
                found = [info]
            else:
                found = [i for i in self.fs.get_file_info(pafs.FileSelector(self.root, recursive=True))
                         if i.type == pafs.FileType.File]
        except OSError as err:
            raise InputFileError(f"input {location} cannot be listed ({str(err).splitlines()[0]}). Check the path "
                                 "and its permissions.") from None
        root = self.root.rstrip("/")
        files = []
        self._states: dict[str, tuple[int | None, int | None]] = {
            i.path: (i.size, i.mtime_ns) for i in found}
        for i in found:
            rel = i.path[len(root):].lstrip("/") if i.path.startswith(root) else i.base_name
            if rel and _skipped(rel):
                continue
            if info.type == pafs.FileType.File or i.base_name.lower().endswith((".parquet", ".pq")):
                files.append((rel, i.path, i.size))
        files.sort()
        if not files:
            raise InputFileError(f"input {location} holds no Parquet files (*.parquet or *.pq; names starting "
                                 "with _ or . are skipped). Point at the dataset's folder.")
        return files

    def _check_schema(self, schema: pa.Schema, rel: str, first: str) -> None:
        if self.schema is None:
            self.schema = schema
        elif not schema.equals(self.schema):
            raise DataError(f"input {self.location}: file {rel} does not have the same columns and types as {first} "
                            f"({_schema_difference(self.schema, schema)}). Every file of a dataset needs the same "
                            "schema: rewrite that file, or move it out of the folder.")

    def _add_fragments(self, md: Any, path: str, row0: int, fragment_rows: int) -> int:
        """Cut one file's row groups into fragments of at most ``fragment_rows`` rows (whole row
        groups; a larger group is a fragment of its own); returns the next fragment's first row."""
        groups: list[int] = []
        rows = 0
        for g in range(md.num_row_groups):
            n = md.row_group(g).num_rows
            if n == 0:  # an empty row group (an empty file's): no part of its own
                continue
            if groups and rows + n > fragment_rows:
                self.fragments.append(Fragment(len(self.fragments), path, tuple(groups), row0, rows))
                row0 += rows
                groups, rows = [], 0
            groups.append(g)
            rows += n
        if groups:
            self.fragments.append(Fragment(len(self.fragments), path, tuple(groups), row0, rows))
            row0 += rows
        return row0

    def _metadata(self, path: str) -> Any:
        try:
            with self.fs.open_input_file(path) as f:
                return pq.ParquetFile(f).metadata
        except (pa.ArrowException, OSError) as err:
            raise InputFileError(f"input {self.location}: file {path} cannot be read as Parquet "
                                 f"({str(err).splitlines()[0][:200]}). Check that it is complete.") from None

    def read(self, frag: Fragment, columns: list[str], batch_rows: int,
             dictionary: list[str] | None = None) -> Iterator[pa.RecordBatch]:
        """The rows of one fragment, in order, in batches of at most ``batch_rows``."""
        return read_fragment(self.fs, frag, columns, batch_rows, dictionary)


def read_fragment(fs: pafs.FileSystem, frag: Fragment, columns: list[str], batch_rows: int,
                  dictionary: list[str] | None = None) -> Iterator[pa.RecordBatch]:
    """Module-level (picklable with its arguments) so that workers can call it.  Text columns
    named in ``dictionary`` are read dictionary-encoded."""
    done = 0
    try:
        with fs.open_input_file(frag.path) as f:
            pf = pq.ParquetFile(f, read_dictionary=dictionary or None)
            for b in pf.iter_batches(batch_size=batch_rows, row_groups=list(frag.row_groups), columns=columns,
                                     use_threads=True):
                done += b.num_rows
                yield b
    except (pa.ArrowException, OSError) as err:
        check_fragment_unchanged(fs, frag)  # a file changed meanwhile is said to have changed
        raise DataError(f"input file {frag.path} could not be read after row {frag.row0 + done} of the dataset "
                        f"({str(err).splitlines()[0][:200]}). Check that the file is complete and unchanged.") from None
    if done != frag.rows:
        raise DataError(f"input file {frag.path} changed while it was read ({done} rows where its footer said "
                        f"{frag.rows}). Run the release again on files that do not change meanwhile.")
    check_fragment_unchanged(fs, frag)


def check_fragment_unchanged(fs: pafs.FileSystem, frag: Fragment) -> None:
    """Refuse a fragment whose file's size or modification time (for a local file: also its
    status-change time and inode, io.FileState) differs from when the dataset was listed (a file
    rewritten or replaced while the release read the dataset)."""
    from .io import changed_message, file_state

    if frag.local_state is not None:
        state = file_state(Path(frag.path), missing_ok=True)
        if tuple(state) != frag.local_state:
            raise DataError(changed_message(f"file {frag.path}", frag.local_state, state))
        return
    if frag.size is None and frag.mtime_ns is None:
        return

    try:
        info = fs.get_file_info(frag.path)
        now = (-1, -1) if info.type == pafs.FileType.NotFound else (info.size, info.mtime_ns)
    except OSError:
        now = (-1, -1)
    before = (frag.size if frag.size is not None else now[0], frag.mtime_ns if frag.mtime_ns is not None else now[1])
    if now != before:
        raise DataError(changed_message(f"file {frag.path}", before, now))


def _schema_difference(a: pa.Schema, b: pa.Schema) -> str:
    if a.names != b.names:
        extra = [n for n in b.names if n not in a.names]
        missing = [n for n in a.names if n not in b.names]
        if extra or missing:
            return ", ".join(filter(None, [f"extra column(s) {extra}" if extra else "",
                                            f"missing column(s) {missing}" if missing else ""]))
        return "the columns are in another order"
    for f1, f2 in zip(a, b):
        if not f1.type.equals(f2.type):
            return f"column {f1.name!r} is {f2.type} there and {f1.type} here"
    return "the schema metadata differ"


# -- the digest of an output dataset ---------------------------------------------------------

def dataset_digest(parts: list[dict[str, Any]]) -> str:
    """SHA-256 over the parts in order: a label, then one line "NAME SHA256 BYTES" per part.
    A part's own SHA-256 is of its bytes, so the dataset's digest can be checked part by part
    (and in parallel) without concatenating the files."""
    h = hashlib.sha256(_DIGEST_LABEL)
    for p in parts:
        h.update(f"{p['file']} {p['sha256']} {p['bytes']}\n".encode())
    return h.hexdigest()


__all__ = [
    "DATASET_FORMAT",
    "DEFAULT_FRAGMENT_ROWS",
    "PART_NAME",
    "Fragment",
    "ParquetDataset",
    "dataset_digest",
    "is_dataset",
    "is_uri",
    "read_fragment",
    "resolve",
]
