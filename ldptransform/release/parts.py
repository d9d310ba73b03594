"""Writing the extract: one file batch by batch, or a Parquet dataset of parts (one per input
fragment, or per ``fragment_rows`` rows of a CSV or frame), by the local engine here or by dask
workers (engine_dask.py).  A part is a pure function of its rows and their first global row
index, so either engine writes the same bytes in any order of parts."""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ..dataset import PART_NAME, dataset_digest, read_fragment
from ..io import BatchWriter, StagedFiles, _rebatch, sha256_file
from ..manifest import ExtractInfo, PartInfo
from .columns import ColumnDiagnostics, ColumnPlan
from .kernel import ColumnSampler, privatize_batch
from .options import ReleaseOptions

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
class Written:
    """What writing the extract gives the manifest and the diagnostics."""

    info: ExtractInfo
    input_rows: int   # rows read
    rows: int         # rows released (fewer under --allow-partial)


def write_extract(job: PartJob, src: Any, keep: np.ndarray | None, opts: ReleaseOptions, staged: StagedFiles,
                  on_progress: Progress) -> Written:
    """Privatize every row into the staged extract (a file, or a dataset folder of parts)."""
    tmp = staged.add(opts.out)
    if not opts.dataset_out:
        return _write_file(job, src, keep, opts, tmp, staged, on_progress)
    os.mkdir(tmp, 0o755)
    if opts.engine == "dask":
        from ..engine_dask import run_parts

        parts = run_parts(job, src, keep, tmp, opts.fragment_rows, opts.scheduler, staged, on_progress)
    else:
        parts = run_parts_local(job, src, keep, tmp, opts.fragment_rows, staged, on_progress)
    add_part_counts(job.plans, parts)
    infos = [PartInfo(file=part.file, sha256=part.sha256, bytes=part.bytes, rows=part.rows) for part in parts]
    info = ExtractInfo(file=opts.out.name, format="parquet-dataset",
                       sha256=dataset_digest([i.model_dump() for i in infos]),
                       bytes=sum(i.bytes for i in infos), columns=job.schema.names, parts=infos,
                       part_rows=opts.fragment_rows)
    return Written(info, sum(part.input_rows for part in parts), sum(part.rows for part in parts))


def add_part_counts(plans: list[ColumnPlan], parts: list[PartResult]) -> None:
    """Add up the parts' steward-only counts into the release's column plans."""
    for part in parts:
        for p in plans:
            if p.rc.name in part.diag:
                for k, v in part.diag[p.rc.name].items():
                    setattr(p.diag, k, getattr(p.diag, k) + v)
                p.reported += part.reported.get(p.rc.name, 0)


def _write_file(job: PartJob, src: Any, keep: np.ndarray | None, opts: ReleaseOptions, tmp: Path,
                staged: StagedFiles, on_progress: Progress) -> Written:
    """A single-file extract, batch by batch (a stop signal is honoured between batches)."""
    rows = released = 0
    writer = BatchWriter(tmp, opts.fmt_out, job.schema)
    try:
        for batch in src.batches(job.read_cols, job.batch_rows, dictionary=job.dictionary):
            out_batch = privatize_batch(batch, rows, job.plans, job.schema, job.sampler, job.subject_key)
            if keep is not None:  # --allow-partial: drop the rows of subjects past the budget
                out_batch = out_batch.filter(pa.array(keep[rows:rows + batch.num_rows]))
            writer.write(out_batch)
            released += out_batch.num_rows
            rows += batch.num_rows
            staged.check()  # stop between batches on SIGTERM/SIGINT
            if on_progress is not None:
                on_progress(batch.num_rows)
    finally:
        writer.close()
    digest, size = sha256_file(tmp)
    info = ExtractInfo(file=opts.out.name, format=opts.fmt_out, sha256=digest, bytes=size, columns=job.schema.names)
    return Written(info, rows, released)
