"""The keyed shuffle of an extract's rows (policy ``output.row_order: shuffled``, the default).

The extract's row order must not carry the input's order: a table exported sorted by site, by
date or by pay would otherwise give that column away through a row's neighbours.  Every input
row ``r`` gets a 64-bit tag, word 0 of row ``r`` of the keyed stream (key, nonce, "row-order"),
and the extract lists the rows by increasing tag (equal tags, about one pair in 2^64 / n, by
input row).  So the order is a uniformly random permutation, independent of the data,
reproducible from the key and the nonce, and the same for every batch size, engine and part
layout: the tags depend on nothing but the global row index.  A partner who reads the extract
learns nothing about which input row a report came from (only the steward can recompute it).

Memory stays bounded whatever the number of rows (an external sort in two passes):

1. *Runs.*  Privatized batches are gathered into runs of at most ``RUN_ROWS`` rows; each run is
   grouped by tag bucket (a stable radix sort of the tags' top ``BUCKET_BITS`` bits, several
   times cheaper than a full sort and all a window cut needs) and spilled (in a background
   thread) to an Arrow IPC file in a private staging
   folder (mode 0700: with the tags and the run order it would undo the shuffle), its tags in a
   last column, in record batches of ``CHUNK_ROWS`` rows whose first tags are kept in memory.
   A histogram of the tags' top ``BUCKET_BITS`` bits counts the rows of every tag
   bucket.  A release that fits in one run is never spilled.
2. *Windows.*  The histogram cuts the tag range into windows of at most about ``WINDOW_ROWS``
   rows (whole buckets); every window is read from every run (only the chunks that overlap it),
   sorted by the full tag (in a background thread, one window ahead of the writer), and
   written out.  A window's rows are known exactly
   in advance, so a dataset's parts (``fragment_rows`` rows each, by rank) can be written by
   different workers (``write_ranks``), byte for byte as in one pass.

Costs (measured by benchmarks/bench_privatize.py, see docs/scale.md): one extra write and read of the
privatized rows, plus sorting; peak memory holds one run or one window.
"""

from __future__ import annotations

import contextlib
import os
import shutil
from collections.abc import Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ..io import partial_path, remove_stale_partials
from ..random.bits import KeyedStream
from .kernel import rebuild_dictionary

ROW_ORDER_PURPOSE = "row-order"
RUN_ROWS = 1 << 18      # rows gathered, grouped by bucket and spilled together
WINDOW_ROWS = 1 << 17   # rows merged in memory at once (at most about this many)
BUCKET_BITS = 16        # tag buckets counted: windows are whole buckets
_BUCKET_SHIFT = np.uint64(64 - BUCKET_BITS)
TAG_COLUMN = "__ldpt_row_tag"
CHUNK_ROWS = 4096       # rows per record batch of a spilled run (the unit read back)
MAX_OPEN_RUNS = 256     # runs whose files stay open from one window to the next (more: reopened)


def tag_stream(key: object, nonce: str) -> KeyedStream:
    """The release's keyed stream of row tags."""
    return KeyedStream(key, nonce, ROW_ORDER_PURPOSE)  # type: ignore[arg-type]


def row_tags(stream: KeyedStream, row0: int, n: int) -> np.ndarray:
    """The tags of global rows [row0, row0 + n): uint64, one per row."""
    return np.ascontiguousarray(stream.words(row0, n, 2)[:, 0])


def tag_name(schema: pa.Schema) -> str:
    """A column name for the tags that no output column has."""
    name = TAG_COLUMN
    while name in schema.names:
        name += "_"
    return name


def tag_order(tags: np.ndarray) -> np.ndarray:
    """The order of rows by tag, equal tags in their given order (input-row order).  Tags are
    uniform 64-bit words, so equal tags almost never occur (about n^2 / 2^65 pairs): the faster
    unstable sort is used and checked, and the stable one only if two tags are equal."""
    order = np.argsort(tags)
    st = tags[order]
    if len(st) > 1 and not (st[1:] > st[:-1]).all():
        order = np.argsort(tags, kind="stable")
    return order


def bucket_order(tags: np.ndarray) -> np.ndarray:
    """The order of rows by tag bucket (the top BUCKET_BITS bits), equal buckets in their given
    order: a stable sort of 16-bit keys, which numpy does as a radix sort in linear time.  Enough
    for a run: a window is whole buckets, and read_window sorts its rows by the full tag."""
    return np.argsort((tags >> _BUCKET_SHIFT).astype(np.uint16), kind="stable")


@dataclass
class Run:
    """One run, its rows grouped by tag bucket: spilled (``path``, the first tag of every chunk)
    or kept in memory."""

    rows: int
    path: str | None = None
    firsts: np.ndarray | None = None
    table: pa.Table | None = None
    tags: np.ndarray | None = None
    _file: Any = field(default=None, repr=False, compare=False)
    _reader: Any = field(default=None, repr=False, compare=False)

    def reader(self) -> Any:
        """The spilled run's IPC reader, opened once (a plain file, not a memory map: the pages
        read are not kept in the process's memory)."""
        if self._reader is None:
            assert self.path is not None
            self._file = pa.OSFile(self.path, "rb")
            self._reader = pa.ipc.open_file(self._file)
        return self._reader

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
        self._file = self._reader = None

    def __getstate__(self) -> dict[str, Any]:  # sent to dask workers without open files
        d = dict(self.__dict__)
        d["_file"] = d["_reader"] = None
        return d


@dataclass
class Runs:
    """What the first pass leaves: the runs in input-row order and the tag histogram."""

    runs: list[Run] = field(default_factory=list)
    hist: np.ndarray = field(default_factory=lambda: np.zeros(1 << BUCKET_BITS, dtype=np.int64))

    @property
    def rows(self) -> int:
        return int(self.hist.sum())

    def close(self) -> None:
        for run in self.runs:
            run.close()

    def extend(self, other: Runs) -> None:
        """Append the runs of a later stretch of rows (dask: one fragment's runs after another's)."""
        self.runs.extend(other.runs)
        self.hist += other.hist


def spill_folder(dest: Path) -> Path:
    """A fresh private folder (0700) beside the extract for the spilled runs (same disk as the
    output); one left by a killed run is removed by the next run on the same destination."""
    marker = Path(dest).parent / f"{Path(dest).name}.row-order"
    remove_stale_partials(marker)
    folder = partial_path(marker)
    os.mkdir(folder, 0o700)
    return folder


def remove_spill(folder: Path | None) -> None:
    if folder is not None:
        shutil.rmtree(folder, ignore_errors=True)


class RunWriter:
    """Gathers privatized batches with their tags, and groups by bucket and spills every full run in a
    background thread (at most one run in flight, so memory holds at most two runs) while the
    caller privatizes the next batches (pyarrow and numpy release the GIL while they work)."""

    def __init__(self, schema: pa.Schema, folder: Path | None, prefix: str) -> None:
        self.schema = schema
        self.tag = tag_name(schema)
        self.folder, self.prefix = folder, prefix
        self.out = Runs()
        self._batches: list[pa.RecordBatch] = []
        self._tags: list[np.ndarray] = []
        self._rows = 0
        self._pool: ThreadPoolExecutor | None = None
        self._pending: Future | None = None

    def add(self, batch: pa.RecordBatch, tags: np.ndarray) -> None:
        if batch.num_rows == 0:
            return
        self._batches.append(batch)
        self._tags.append(tags)
        self._rows += batch.num_rows
        if self._rows >= RUN_ROWS:
            self._spill()

    def _take(self) -> tuple[list[pa.RecordBatch], np.ndarray]:
        batches, tags = self._batches, np.concatenate(self._tags)
        self._batches, self._tags, self._rows = [], [], 0
        self.out.hist += np.bincount((tags >> _BUCKET_SHIFT).astype(np.int64), minlength=1 << BUCKET_BITS)
        return batches, tags

    def _sorted(self, batches: list[pa.RecordBatch], tags: np.ndarray) -> tuple[pa.Table, np.ndarray]:
        order = bucket_order(tags)
        table = pa.Table.from_batches(batches, schema=self.schema).take(pa.array(order))
        return table, tags[order]

    def _write(self, batches: list[pa.RecordBatch], tags: np.ndarray, run: Run) -> None:
        table, sorted_tags = self._sorted(batches, tags)
        table = table.append_column(self.tag, pa.array(sorted_tags, pa.uint64()))
        assert run.path is not None
        with pa.OSFile(run.path, "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
            w.write_table(table, max_chunksize=CHUNK_ROWS)
        run.firsts = np.ascontiguousarray(sorted_tags[::CHUNK_ROWS])

    def _wait(self) -> None:
        if self._pending is not None:
            pending, self._pending = self._pending, None
            pending.result()

    def _spill(self) -> None:
        if self.folder is None:
            raise AssertionError("a run to spill without a spill folder")
        batches, tags = self._take()
        run = Run(rows=len(tags), path=str(self.folder / f"{self.prefix}-{len(self.out.runs):06d}.arrow"))
        self.out.runs.append(run)
        self._wait()
        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ldpt-spill")
        self._pending = self._pool.submit(self._write, batches, tags, run)

    def finish(self, *, in_memory: bool) -> Runs:
        """The runs; the last one stays in memory when ``in_memory`` (and nothing was spilled
        before it, so that a small release never touches the disk) or else is spilled too."""
        try:
            if self._rows:
                if in_memory and not self.out.runs:
                    batches, tags = self._take()
                    table, sorted_tags = self._sorted(batches, tags)
                    self.out.runs.append(Run(rows=len(tags), table=table, tags=sorted_tags))
                else:
                    self._spill()
            self._wait()
        finally:
            self.close()
        return self.out

    def close(self) -> None:
        """Stop the background thread (after its run is written, or failed)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True)
            self._pool = None


@dataclass(frozen=True)
class Window:
    """Tag buckets [b0, b1) and the rows they hold; ``rank0``: rows in earlier windows."""

    b0: int
    b1: int
    rows: int
    rank0: int


def windows(runs: Runs, target: int = WINDOW_ROWS) -> list[Window]:
    """Whole-bucket windows of at most ``target`` rows each (one bucket may hold more)."""
    out: list[Window] = []
    cum = np.concatenate([[0], np.cumsum(runs.hist)])
    b0, total = 0, int(cum[-1])
    nb = len(runs.hist)
    while b0 < nb and int(cum[b0]) < total:
        # the furthest b1 with cum[b1] - cum[b0] <= target, at least one bucket further
        b1 = int(np.searchsorted(cum, cum[b0] + target, side="right")) - 1
        b1 = min(nb, max(b1, b0 + 1))
        out.append(Window(b0, b1, int(cum[b1] - cum[b0]), int(cum[b0])))
        b0 = b1
    return out


def _bounds(w: Window) -> tuple[np.uint64, np.uint64 | None]:
    lo = np.uint64(w.b0) << _BUCKET_SHIFT
    hi = None if w.b1 >= (1 << BUCKET_BITS) else np.uint64(w.b1) << _BUCKET_SHIFT
    return lo, hi


def _cut(tags: np.ndarray, lo: np.uint64, hi: np.uint64 | None) -> tuple[int, int]:
    # tags grouped by bucket and lo, hi bucket starts: "tag < lo" is "bucket < b0", which never
    # goes from false back to true along the array, so a binary search finds the cut exactly
    s = int(np.searchsorted(tags, lo, side="left"))
    e = len(tags) if hi is None else int(np.searchsorted(tags, hi, side="left"))
    return s, e


def read_window(runs: Runs, w: Window, schema: pa.Schema, rebuild: frozenset[str] = frozenset()) -> pa.Table:
    """The rows of window ``w`` in extract order (by tag; equal tags by input row), with the
    dictionaries of the dictionary-encoded columns named in ``rebuild`` (public columns) rebuilt
    from the window's own values.  A spilled run is read only in its chunks that overlap the
    window (plain reads into memory: no memory map, whose pages would count in the process's
    memory in large blocks), its file opened once for all windows."""
    lo, hi = _bounds(w)
    tag = tag_name(schema)
    pieces: list[pa.Table] = []
    tag_parts: list[np.ndarray] = []
    for run in runs.runs:
        if run.table is not None:
            assert run.tags is not None
            s, e = _cut(run.tags, lo, hi)
            if e > s:
                pieces.append(run.table.slice(s, e - s))
                tag_parts.append(run.tags[s:e])
            continue
        assert run.path is not None and run.firsts is not None
        # chunks are in bucket order (not tag order within a bucket): cut by the first rows' buckets.
        # Rows of bucket b0 start in the chunk before the first chunk that starts at b0 or later
        # (or at that chunk's start); none is left from the first chunk that starts at b1 or later.
        first_buckets = run.firsts >> _BUCKET_SHIFT
        i0 = max(0, int(np.searchsorted(first_buckets, np.uint64(w.b0), side="left")) - 1)
        i1 = len(run.firsts) if hi is None else int(np.searchsorted(first_buckets, np.uint64(w.b1), side="left"))
        if i1 <= i0:
            continue
        reader = run.reader()
        batches = []
        for i in range(i0, i1):
            b = reader.get_batch(i)
            t = b.column(tag).to_numpy()
            s, e = _cut(t, lo, hi)
            if e > s:
                batches.append(b.slice(s, e - s))
                tag_parts.append(t[s:e])
        if batches:
            pieces.append(pa.Table.from_batches(batches).drop_columns([tag]))
        if len(runs.runs) > MAX_OPEN_RUNS:
            run.close()
    if not pieces:
        return schema.empty_table()
    tags = np.concatenate(tag_parts)
    # the pieces are in input-row order (runs in order, each grouped by bucket with equal buckets
    # in input order): sorting by the full tag puts equal tags in input-row order
    order = tag_order(tags)
    table = pa.concat_tables(pieces).take(pa.array(order))
    del pieces
    if table.num_rows != w.rows:
        raise AssertionError(f"window of tag buckets [{w.b0}, {w.b1}) read {table.num_rows} rows, not {w.rows}")
    cols = [rebuild_dictionary(table.column(i)) if f.name in rebuild and pa.types.is_dictionary(f.type)
            else table.column(i) for i, f in enumerate(schema)]
    return pa.Table.from_arrays(cols, schema=schema)


def write_ranks(runs: Runs, wins: list[Window], schema: pa.Schema, start: int, stop: int,
                rebuild: frozenset[str] = frozenset()) -> Iterator[pa.RecordBatch]:
    """The extract's rows of ranks [start, stop), in order, window by window.  The next window is
    read and merged in a background thread while the caller writes the current one."""
    todo = [w for w in wins if w.rank0 + w.rows > start and w.rank0 < stop and w.rows > 0]
    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="ldpt-merge")
    try:
        nxt: Future | None = pool.submit(read_window, runs, todo[0], schema, rebuild) if todo else None
        for i, w in enumerate(todo):
            assert nxt is not None
            table = nxt.result()
            nxt = pool.submit(read_window, runs, todo[i + 1], schema, rebuild) if i + 1 < len(todo) else None
            s, e = max(start, w.rank0) - w.rank0, min(stop, w.rank0 + w.rows) - w.rank0
            yield from table.slice(s, e - s).to_batches()
            del table
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
        runs.close()


@contextlib.contextmanager
def spilling(dest: Path, needed: bool) -> Iterator[Path | None]:
    """A private spill folder beside ``dest`` for the duration of a release (None if not needed)."""
    folder = spill_folder(dest) if needed else None
    try:
        yield folder
    finally:
        remove_spill(folder)
