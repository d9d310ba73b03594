"""Writing the extract: one file batch by batch, or a Parquet dataset of parts (one per input
fragment, or per ``fragment_rows`` rows of a CSV or frame), by the local engine here or by dask
workers (engine_dask.py).  A part is a pure function of its rows and their first global row
index, so either engine writes the same bytes in any order of parts.

With the keyed row shuffle (``output.row_order: shuffled``, the default; shuffle.py) writing
takes two passes: the rows are privatized into sorted runs (``spill_rows``: per input fragment on
dask workers), then the extract is written in tag order (``write_sorted_file``, or per part of
``fragment_rows`` rows by rank, ``write_sorted_part``), so a dataset is shuffled across all its
parts and every engine writes the same bytes."""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import pyarrow as pa

from ..dataset import PART_NAME, dataset_digest, read_fragment
from ..io import BatchWriter, StagedFiles, _rebatch, sha256_file
from ..manifest import ExtractInfo, PartInfo
from ..random.bits import KeyedStream
from .columns import ColumnDiagnostics, ColumnPlan
from .kernel import ColumnSampler, Held, Observer, privatize_batch, privatize_sequential, sequential_names
from .options import ReleaseOptions
from .shuffle import Runs, RunWriter, Window, row_tags, spilling, windows, write_ranks

Progress = Callable[[int], None] | None


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
    order: KeyedStream | None = None  # the keyed row-order stream (None: rows keep the input's order)
    public: frozenset[str] = frozenset()  # public columns (their dictionaries are rebuilt from released rows)
    # the ledger's tap (local engine only: never sent to a worker): given every batch's subjects and
    # memoized value codes by the kernel (privatize_batch's ``observe``)
    observe: Observer | None = None
    on_pass_done: Callable[[], None] | None = None  # the tap's: every row has been privatized (local engine)
    # sequential columns (``Mechanism.sequential``): their runs, set by ``write_extract`` (local engine: one
    # run filled as the rows pass in order; dask: the settings of every phase worked out by ``sequential_prepass``)
    runs: dict[str, Any] | None = None


@dataclass
class PartResult:
    file: str
    sha256: str
    bytes: int
    rows: int                     # rows written
    input_rows: int               # rows privatized into this part (0 for a part of a shuffled release)
    diag: dict[str, dict[str, int]]  # steward-only diagnostics of this part
    reported: dict[str, int]


def write_part(job: PartJob, batches: Any, row0: int, held: Held | None, path: Path, *,
               on_batch: Callable[[int], None] | None = None) -> PartResult:
    """Privatize rows [row0, row0 + n) given as ``batches`` into the Parquet file ``path``, in
    input order (``output.row_order: as-input``).  Pure apart from writing ``path``: the same
    rows, row0, plans and nonce give the same bytes on any machine, in any order of parts."""
    plans = [replace(p, diag=ColumnDiagnostics(), reported=0) for p in job.plans]
    writer = BatchWriter(Path(path), "parquet", job.schema)
    rows = released = 0
    try:
        for batch in batches:
            n = batch.num_rows
            out_batch = privatize_batch(batch, row0 + rows, plans, job.schema, job.sampler, job.subject_key,
                                        _mask_slice(held, rows, n), job.observe, job.runs)
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


def fragment_part(job: PartJob, fs: Any, frag: Any, held: Held | None, folder: str) -> PartResult:
    """One Parquet fragment of the input -> its output part (what a dask worker runs)."""
    batches = _rebatch(read_fragment(fs, frag, job.read_cols, job.batch_rows, job.dictionary), job.batch_rows)
    return write_part(job, batches, frag.row0, held, Path(folder) / frag.part_name)


@dataclass
class Spilled:
    """The first pass of a shuffled release over a stretch of input rows: its sorted runs and
    the steward-only counts of the rows privatized."""

    runs: Runs
    input_rows: int
    diag: dict[str, dict[str, int]]
    reported: dict[str, int]


def spill_rows(job: PartJob, batches: Any, row0: int, held: Held | None, folder: Path | str, prefix: str, *,
               in_memory: bool, on_batch: Callable[[int], None] | None = None) -> Spilled:
    """Privatize rows [row0, row0 + n) given as ``batches`` into sorted runs in ``folder`` (the
    last one kept in memory when ``in_memory`` and it is the only one)."""
    assert job.order is not None
    plans = [replace(p, diag=ColumnDiagnostics(), reported=0) for p in job.plans]
    runs = RunWriter(job.schema, Path(folder), prefix)
    rows = 0
    try:
        for batch in batches:
            n = batch.num_rows
            out_batch = privatize_batch(batch, row0 + rows, plans, job.schema, job.sampler, job.subject_key,
                                        _mask_slice(held, rows, n), job.observe, job.runs)
            runs.add(out_batch, row_tags(job.order, row0 + rows, n))
            rows += n
            if on_batch is not None:
                on_batch(n)
    except BaseException:
        runs.close()
        raise
    return Spilled(runs.finish(in_memory=in_memory), rows,
                   {p.rc.name: p.diag.as_dict() for p in plans if p.rc.mechanism is not None},
                   {p.rc.name: p.reported for p in plans if p.rc.mechanism is not None})


def fragment_spill(job: PartJob, fs: Any, frag: Any, held: Held | None, folder: str) -> Spilled:
    """One Parquet fragment of the input -> its sorted runs (what a dask worker runs first)."""
    batches = _rebatch(read_fragment(fs, frag, job.read_cols, job.batch_rows, job.dictionary), job.batch_rows)
    return spill_rows(job, batches, frag.row0, held, folder, f"f{frag.row0:012d}", in_memory=False)


def part_ranges(rows: int, fragment_rows: int) -> list[tuple[int, int]]:
    """The rank ranges of a shuffled dataset's parts: ``fragment_rows`` rows each (the last may
    be shorter; an empty release has one empty part)."""
    if rows == 0:
        return [(0, 0)]
    return [(s, min(rows, s + fragment_rows)) for s in range(0, rows, fragment_rows)]


def write_sorted_part(job: PartJob, runs: Runs, wins: list[Window], start: int, stop: int, path: Path | str,
                      fmt: str = "parquet") -> PartResult:
    """Write the shuffled extract's rows of ranks [start, stop) to ``path`` (a part, or the whole
    single-file extract)."""
    writer = BatchWriter(Path(path), fmt, job.schema)
    try:
        for batch in write_ranks(runs, wins, job.schema, start, stop, job.public):
            writer.write(batch)
    finally:
        writer.close()
    digest, size = sha256_file(Path(path))
    return PartResult(Path(path).name, digest, size, stop - start, 0, {}, {})


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


def _mask_slice(held: Held | None, row0: int, n: int) -> Held | None:
    """Rows [row0, row0 + n) of the held-back masks (None: nobody held back)."""
    return None if held is None else {c: m[row0:row0 + n] for c, m in held.items()}


def run_parts_local(job: PartJob, src: Any, held: Held | None, folder: Path, fragment_rows: int,
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
            results.append(write_part(job, batches, frag.row0, _mask_slice(held, frag.row0, frag.rows),
                                      folder / frag.part_name, on_batch=tick))
    else:  # CSV (or a frame): parts of fragment_rows rows, cut while reading
        cutter = RowCutter(src.batches(job.read_cols, job.batch_rows))
        row0 = 0
        while True:
            i = len(results)
            part_held = _mask_slice(held, row0, fragment_rows)
            res = write_part(job, _rebatch(cutter.take(fragment_rows), job.batch_rows), row0, part_held,
                             folder / PART_NAME.format(i), on_batch=tick)
            results.append(res)
            row0 += res.input_rows
            if cutter.exhausted():
                break
    if not results:  # a dataset without row groups: one empty part keeps the schema
        results.append(write_part(job, iter(()), 0, None, folder / PART_NAME.format(0)))
    _pass_done(job)
    return results


@dataclass
class Written:
    """What writing the extract gives the manifest and the diagnostics."""

    info: ExtractInfo
    input_rows: int   # rows read
    rows: int         # rows released (all of them: held-back rows are released as placeholder rows)


def write_extract(job: PartJob, src: Any, held: Held | None, opts: ReleaseOptions, staged: StagedFiles,
                  on_progress: Progress) -> Written:
    """Privatize every row into the staged extract (a file, or a dataset folder of parts).
    ``held``: rows of people held back by the ledger (their reports are of placeholder values)."""
    tmp = staged.add(opts.out)
    job = with_runs(job, src, held, opts.engine, staged)
    if job.order is not None:
        return _write_shuffled(job, src, held, opts, tmp, staged, on_progress)
    if not opts.dataset_out:
        return _write_file(job, src, held, opts, tmp, staged, on_progress)
    os.mkdir(tmp, 0o755)
    if opts.engine == "dask":
        from ..engine_dask import run_parts

        parts = run_parts(job, src, held, tmp, opts.fragment_rows, opts.scheduler, staged, on_progress)
    else:
        parts = run_parts_local(job, src, held, tmp, opts.fragment_rows, staged, on_progress)
    add_part_counts(job.plans, parts)
    return _dataset_written(job, opts, parts, sum(part.input_rows for part in parts))


def with_runs(job: PartJob, src: Any, held: Held | None, engine: str, staged: StagedFiles) -> PartJob:
    """``job`` with a run for each sequential column (none: ``job`` itself).  The local engine reads
    the rows in order, so each run is filled as the writing pass goes; the dask engine's workers
    handle stretches of rows at once, so the settings of every phase are worked out first, on the
    client, in a pass of its own over the sequential columns (``sequential_prepass``)."""
    names = sequential_names(job.plans)
    if not names:
        return job
    if engine == "dask":
        return replace(job, runs=sequential_prepass(job, src, held, staged))
    return replace(job, runs={p.rc.name: p.rc.mechanism.start_run() for p in job.plans  # type: ignore[union-attr]
                              if p.rc.name in names})


def sequential_prepass(job: PartJob, src: Any, held: Held | None, staged: StagedFiles) -> dict[str, Any]:
    """Read the sequential columns once, in row order, and randomize them as the release will
    (same words, same sampling, same placeholders), only to count each phase's reports: the
    settings of every phase, fixed (``frozen``) for the workers.  Its cost: one more sequential
    read of those columns (a Parquet input reads only them; a CSV file is parsed again)."""
    names = sequential_names(job.plans)
    plans = [replace(p, diag=ColumnDiagnostics(), reported=0) for p in job.plans if p.rc.name in names]
    runs = {p.rc.name: p.rc.mechanism.start_run() for p in plans}  # type: ignore[union-attr]
    rows = 0
    for batch in src.batches(names, job.batch_rows):
        n = batch.num_rows
        reported = job.sampler.reported(rows, n) if job.sampler is not None else None
        mask = _mask_slice(held, rows, n)
        for p in plans:
            rep = None if reported is None or p.sample_index is None else reported[:, p.sample_index]
            privatize_sequential(p, batch.column(p.rc.name), rows, None if mask is None else mask.get(p.rc.name),
                                 runs[p.rc.name], rep)
        rows += n
        staged.check()
    return {name: run.frozen() for name, run in runs.items()}


def _dataset_written(job: PartJob, opts: ReleaseOptions, parts: list[PartResult], input_rows: int) -> Written:
    infos = [PartInfo(file=part.file, sha256=part.sha256, bytes=part.bytes, rows=part.rows) for part in parts]
    info = ExtractInfo(file=opts.out.name, format="parquet-dataset",
                       sha256=dataset_digest([i.model_dump() for i in infos]),
                       bytes=sum(i.bytes for i in infos), columns=job.schema.names, parts=infos,
                       part_rows=opts.fragment_rows)
    return Written(info, input_rows, sum(part.rows for part in parts))


def add_part_counts(plans: list[ColumnPlan], parts: list[PartResult] | list[Spilled]) -> None:
    """Add up the parts' (or spilled stretches') steward-only counts into the release's column plans."""
    for part in parts:
        for p in plans:
            if p.rc.name in part.diag:
                for k, v in part.diag[p.rc.name].items():
                    setattr(p.diag, k, getattr(p.diag, k) + v)
                p.reported += part.reported.get(p.rc.name, 0)


def _pass_done(job: PartJob) -> None:
    if job.on_pass_done is not None:
        job.on_pass_done()


def _batches(src: Any, job: PartJob) -> Iterator[pa.RecordBatch]:
    if job.dictionary:
        return src.batches(job.read_cols, job.batch_rows, dictionary=job.dictionary)
    return src.batches(job.read_cols, job.batch_rows)


def _write_file(job: PartJob, src: Any, held: Held | None, opts: ReleaseOptions, tmp: Path,
                staged: StagedFiles, on_progress: Progress) -> Written:
    """A single-file extract in input order, batch by batch (a stop signal is honoured between batches)."""
    rows = 0
    writer = BatchWriter(tmp, opts.fmt_out, job.schema)
    try:
        for batch in _batches(src, job):
            out_batch = privatize_batch(batch, rows, job.plans, job.schema, job.sampler, job.subject_key,
                                        _mask_slice(held, rows, batch.num_rows), job.observe, job.runs)
            writer.write(out_batch)
            rows += batch.num_rows
            staged.check()  # stop between batches on SIGTERM/SIGINT
            if on_progress is not None:
                on_progress(batch.num_rows)
        _pass_done(job)
    finally:
        writer.close()
    digest, size = sha256_file(tmp)
    info = ExtractInfo(file=opts.out.name, format=opts.fmt_out, sha256=digest, bytes=size, columns=job.schema.names)
    return Written(info, rows, rows)


def _write_shuffled(job: PartJob, src: Any, held: Held | None, opts: ReleaseOptions, tmp: Path,
                    staged: StagedFiles, on_progress: Progress) -> Written:
    """The keyed shuffle (shuffle.py): privatize into sorted runs, then write in tag order."""
    def tick(n: int) -> None:
        staged.check()
        if on_progress is not None:
            on_progress(n)

    with spilling(opts.out, needed=True) as folder:
        assert folder is not None
        if opts.engine == "dask":
            from ..engine_dask import run_shuffled

            os.mkdir(tmp, 0o755)
            return run_shuffled(job, src, held, opts, tmp, folder, staged, on_progress)
        spilled = spill_rows(job, _batches(src, job), 0, held, folder, "run", in_memory=True, on_batch=tick)
        _pass_done(job)  # the ledger's charges are worked out beside the second pass
        add_part_counts(job.plans, [spilled])
        runs, n = spilled.runs, spilled.input_rows
        wins = windows(runs)
        if not opts.dataset_out:
            res = write_sorted_part(job, runs, wins, 0, n, tmp, opts.fmt_out)
            info = ExtractInfo(file=opts.out.name, format=opts.fmt_out, sha256=res.sha256, bytes=res.bytes,
                               columns=job.schema.names)
            return Written(info, n, n)
        os.mkdir(tmp, 0o755)
        parts = []
        for i, (start, stop) in enumerate(part_ranges(n, opts.fragment_rows)):
            parts.append(write_sorted_part(job, runs, wins, start, stop, tmp / PART_NAME.format(i)))
            staged.check()
        return _dataset_written(job, opts, parts, n)
