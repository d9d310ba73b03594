"""The distributed engine: the same release, its parts written in parallel by dask workers.

Installed with ``pip install 'ldptransform[dask]'``; nothing else in the package imports this
module, so the core never needs dask.

How it stays identical to the local engine: a release's randomness is addressed by each
row's global index (and, for memoized columns, by the person and the value), never by which
process handles the row.  For a Parquet input the global index of every fragment's first row
comes from the files' footers (dataset.py), so each worker reads its own fragment and writes
its own part, and the parts are byte for byte those the local engine writes.  For a CSV input
the client reads the file once, in order (that sequential read is the counting pass: CSV has no
row counts to read ahead), cuts it into parts of ``fragment_rows`` rows and ships each part to
a worker.  For a dask DataFrame, a counting pass (one ``len`` per partition) gives each
partition's first row, and each partition becomes one part.

What reaches the workers: the plans of the release's columns, which hold only keys derived from
the secret key for this release and column (AES keys of the keyed streams; for memoized columns
the long-lived per-column keys of the memoized randomness), never the secret key itself.  They
are still secrets: a scheduler on another machine must be reached over TLS (``tls://``
addresses, with dask's TLS configuration), and the workers must be trusted like the steward's
own machine.  A plaintext ``tcp://`` address that is not this machine is refused.  The local
cluster of a run with no scheduler speaks only TLS, under credentials made for the run
(``start_local_cluster``), so other processes on the machine cannot use it.

The manifest, the diagnostics, the ledger and the final move into place stay on the client.
"""

from __future__ import annotations

import ipaddress
import logging
import os
import socket
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from .dataset import PART_NAME
from .errors import UsageError
from .io import StagedFiles, _rebatch
from .release.parts import (
    PartJob,
    PartResult,
    RowCutter,
    Spilled,
    Written,
    _dataset_written,
    _mask_slice,
    add_part_counts,
    fragment_part,
    fragment_spill,
    part_ranges,
    spill_rows,
    write_part,
    write_sorted_part,
)
from .release.shuffle import Runs, windows

DEFAULT_WORKERS = max(1, min(os.cpu_count() or 1, 8))


def _require_dask() -> None:
    try:
        import dask  # noqa: F401
        import distributed  # noqa: F401
    except ImportError:
        raise UsageError("--engine dask needs the optional dask packages: pip install 'ldptransform[dask]' "
                         "(dask and distributed), or use --engine local.") from None


def check_scheduler_address(address: str) -> None:
    """Refuse a plaintext connection to a scheduler on another machine (keys travel to workers)."""
    scheme, sep, rest = address.partition("://")
    if not sep:
        scheme, rest = "tcp", address
    scheme = scheme.lower()
    if scheme in ("tls", "inproc"):
        return
    if scheme not in ("tcp", "ucx", "ws", "wss"):
        raise UsageError(f"--scheduler {address!r}: unknown address scheme {scheme!r}; give tls://HOST:PORT (or "
                         "tcp://127.0.0.1:PORT for a scheduler on this machine).")
    if scheme == "wss":
        return
    host = rest.rsplit(":", 1)[0].strip("[]") if ":" in rest else rest
    if host in ("localhost", ""):
        return
    try:
        addrs = {ipaddress.ip_address(host)}
    except ValueError:
        try:
            addrs = {ipaddress.ip_address(i[4][0]) for i in socket.getaddrinfo(host, None)}
        except OSError:
            addrs = set()
    if addrs and all(a.is_loopback for a in addrs):
        return
    raise UsageError(f"--scheduler {address!r}: a {scheme}:// connection to another machine is not encrypted, and "
                     "the release sends its derived column keys (and, for memoized columns, long-lived keys) to "
                     "the workers. Use a tls:// address with dask's TLS security configuration, or run the "
                     "scheduler on this machine.")


def start_local_cluster(n_workers: int = DEFAULT_WORKERS) -> tuple[Any, Any]:
    """The local cluster of a run with no ``--scheduler``: ``(cluster, security)``.

    The scheduler, the nannies and the workers listen on the loopback interface over ``tls://``
    only, with mutual authentication under credentials made for this run
    (``Security.temporary()``: a fresh RSA key and a self-signed certificate that is also the
    only trusted authority).  A client must present a certificate signed by that key, so no
    other process on the machine can connect without those credentials, run code in a worker or
    read the derived keys the release sends there.  The credentials are never
    written to a file by this tool: they stay in this process's memory and reach the worker
    processes it spawns through their start-up pipes (distributed hands them to Python's ssl
    module through a file in a fresh temporary folder of mode 0700, deleted at once).  The
    HTTP servers that the scheduler and the workers always start (plaintext, no authentication)
    serve no page but their own empty list of pages: no dashboard, no cluster state, no logs;
    the scheduler's takes a free port (not 8787).  Connect to it with
    ``Client(cluster, security=security)``."""
    _require_dask()
    import dask
    from distributed import LocalCluster
    from distributed.security import Security

    security = Security.temporary()
    # read when the scheduler starts and copied into each worker process by its nanny
    no_pages: dict[str, list[str]] = {"distributed.scheduler.http.routes": [], "distributed.worker.http.routes": []}
    with dask.config.set(no_pages):
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                               protocol="tls://", security=security, dashboard_address=None,
                               scheduler_kwargs={"dashboard_address": "127.0.0.1:0"},
                               silence_logs=logging.CRITICAL)
    return cluster, security


def _open_client(scheduler: str | None, needs_keys: bool = True) -> tuple[Any, Any]:
    _require_dask()
    from distributed import Client

    if scheduler is None:
        cluster, security = start_local_cluster()
        try:
            return Client(cluster, security=security), cluster
        except BaseException:
            cluster.close()
            raise
    if needs_keys:
        check_scheduler_address(scheduler)
    try:
        return Client(scheduler, timeout=30), None
    except (OSError, TimeoutError) as err:
        raise UsageError(f"--scheduler {scheduler!r}: cannot connect ({err}). Check the address and that the "
                         "scheduler is running.") from None


def _close(client: Any, cluster: Any) -> None:
    try:
        client.close()
    finally:
        if cluster is not None:
            cluster.close()


def run_parts(job: PartJob, src: Any, held: Any, folder: Path, fragment_rows: int,
              scheduler: str | None, staged: StagedFiles,
              on_progress: Callable[[int], None] | None) -> list[PartResult]:
    """Write every part of the release with dask workers; results in part order."""
    client, cluster = _open_client(scheduler)
    try:
        if isinstance(src, FrameSource):
            return _frame_parts(client, job, src, held, folder, staged, on_progress)
        ds = src.parquet_dataset(fragment_rows)
        if ds is not None:
            job_f = client.scatter(job, broadcast=True)
            futs = [client.submit(fragment_part, job_f, ds.fs, frag, _mask_slice(held, frag.row0, frag.rows),
                                  str(folder), pure=False) for frag in ds.fragments]
            if not futs:
                return [write_part(job, iter(()), 0, None, folder / PART_NAME.format(0))]
            return _gather(client, futs, staged, on_progress)
        return _csv_parts(client, job, src, held, folder, fragment_rows, staged, on_progress)
    finally:
        _close(client, cluster)


def run_shuffled(job: PartJob, src: Any, held: Any, opts: Any, folder: Path, spill: Path,
                 staged: StagedFiles, on_progress: Callable[[int], None] | None) -> Written:
    """A shuffled release (release/shuffle.py) on dask workers, in two rounds: every input
    fragment (or CSV stretch, or frame partition) is privatized into sorted runs in the private
    ``spill`` folder; then every part of ``fragment_rows`` rows (by rank in the keyed order) is
    merged from the runs and written.  The same bytes as the local engine's."""
    client, cluster = _open_client(opts.scheduler)
    try:
        spilled = _spill_parts(client, job, src, held, spill, opts.fragment_rows, staged, on_progress)
        runs = Runs()
        for s in spilled:
            runs.extend(s.runs)
        add_part_counts(job.plans, spilled)
        n, wins = runs.rows, windows(runs)
        job_f, runs_f = client.scatter(job, broadcast=True), client.scatter(runs, broadcast=True)
        futs = [client.submit(write_sorted_part, job_f, runs_f, wins, start, stop, str(folder / PART_NAME.format(i)),
                              pure=False) for i, (start, stop) in enumerate(part_ranges(n, opts.fragment_rows))]
        parts: list[PartResult] = _gather(client, futs, staged, None)
        return _dataset_written(job, opts, parts, n)
    finally:
        _close(client, cluster)


def _spill_parts(client: Any, job: PartJob, src: Any, held: Any, spill: Path, fragment_rows: int,
                 staged: StagedFiles, on_progress: Callable[[int], None] | None) -> list[Spilled]:
    """The first round of a shuffled release: sorted runs of every stretch of input rows, in row order."""
    job_f = client.scatter(job, broadcast=True)
    if isinstance(src, FrameSource):
        import dask

        lengths = src.lengths()
        starts = np.concatenate([[0], np.cumsum(lengths)]).astype(int)
        tasks = [dask.delayed(frame_spill)(job, part, src.schema, int(starts[i]),
                                           _mask_slice(held, int(starts[i]), lengths[i]), str(spill))
                 for i, part in enumerate(src.frame.to_delayed())]
        return _gather(client, list(client.compute(tasks)), staged, on_progress)
    ds = src.parquet_dataset(fragment_rows)
    if ds is not None:
        futs = [client.submit(fragment_spill, job_f, ds.fs, frag, _mask_slice(held, frag.row0, frag.rows), str(spill),
                              pure=False) for frag in ds.fragments]
        return _gather(client, futs, staged, on_progress)
    return _csv_stretches(  # CSV: read here in order
        client, src, job, fragment_rows, staged, on_progress, at_least_one=False,
        submit=lambda batches, row0, n, i: client.submit(spill_rows, job_f, batches, row0, _mask_slice(held, row0, n),
                                                         str(spill), f"c{row0:012d}", in_memory=False, pure=False))


def frame_spill(job: PartJob, pdf: Any, schema: pa.Schema, row0: int, held: Any, folder: str) -> Spilled:
    batch = _to_batch(pdf, schema, job.read_cols)
    return spill_rows(job, _rebatch(iter([batch]), job.batch_rows), row0, held, folder, f"p{row0:012d}",
                      in_memory=False)


def _gather(client: Any, futs: list[Any], staged: StagedFiles,
            on_progress: Callable[[int], None] | None) -> list[Any]:
    from distributed import as_completed

    index = {f.key: i for i, f in enumerate(futs)}
    out: list[PartResult | None] = [None] * len(futs)
    try:
        for fut in as_completed(futs):
            res = fut.result()  # a worker's error (a DataError, say) is raised here, as locally
            out[index[fut.key]] = res
            staged.check()
            if on_progress is not None:
                on_progress(res.input_rows)
    except BaseException:
        client.cancel(futs)
        raise
    return [r for r in out if r is not None]


def _csv_parts(client: Any, job: PartJob, src: Any, held: Any, folder: Path, fragment_rows: int,
               staged: StagedFiles, on_progress: Callable[[int], None] | None) -> list[PartResult]:
    """CSV: read here, in order, part by part; each part is randomized and written by a worker."""
    job_f = client.scatter(job, broadcast=True)
    return _csv_stretches(
        client, src, job, fragment_rows, staged, on_progress, at_least_one=True,  # an empty CSV: one empty part
        submit=lambda batches, row0, n, i: client.submit(write_part, job_f, batches, row0, _mask_slice(held, row0, n),
                                                         folder / PART_NAME.format(i), pure=False))


def _csv_stretches(client: Any, src: Any, job: PartJob, fragment_rows: int, staged: StagedFiles,
                   on_progress: Callable[[int], None] | None, *, at_least_one: bool,
                   submit: Callable[[list[pa.RecordBatch], int, int, int], Any]) -> list[Any]:
    """Read a CSV here, in order, in stretches of ``fragment_rows`` rows; ``submit(batches, row0,
    n, i)`` sends stretch i to a worker.  At most two stretches per worker are in flight, so the
    client's memory stays bounded.  The workers' results, in order."""
    limit = 2 * max(1, len(client.scheduler_info().get("workers", {})) or 1)
    cutter = RowCutter(src.batches(job.read_cols, job.batch_rows))
    pending: deque = deque()
    out: list[Any] = []
    row0 = 0
    try:
        first = at_least_one
        while first or not cutter.exhausted():
            first = False
            batches = list(cutter.take(fragment_rows))
            n = sum(b.num_rows for b in batches)
            pending.append(submit(batches, row0, n, len(out) + len(pending)))
            row0 += n
            staged.check()
            while len(pending) >= limit:
                out.append(_one(pending.popleft(), on_progress))
        while pending:
            out.append(_one(pending.popleft(), on_progress))
    except BaseException:
        client.cancel(list(pending))
        raise
    return out


def _one(fut: Any, on_progress: Callable[[int], None] | None) -> Any:
    res = fut.result()
    if on_progress is not None:
        on_progress(res.input_rows)
    return res


def map_fragments(fn: Callable[..., Any], manifest: Any, an: Any, ds: Any, batch_rows: int, check_alphabet: bool,
                  where: str, scheduler: str | None) -> list[Any]:
    """Run ``fn(manifest, an, fs, fragment, ...)`` for every fragment of a dataset extract on the
    workers (``ldpt estimate --engine dask``); results in fragment order, merged by the caller.
    Only the public extract and manifest travel: no key is involved in estimating."""
    client, cluster = _open_client(scheduler, needs_keys=False)
    try:
        futs = [client.submit(fn, manifest, an, ds.fs, frag, batch_rows, check_alphabet, where, pure=False)
                for frag in ds.fragments]
        return client.gather(futs)
    finally:
        _close(client, cluster)


# -- a dask DataFrame as the input -------------------------------------------------------------

def _arrow_schema(meta: Any) -> pa.Schema:
    """The Arrow schema of a pandas frame's columns; object columns (text in pandas) as strings."""
    fields = []
    for name in meta.columns:
        dt = meta[name].dtype
        if dt == np.dtype(object):
            t: pa.DataType = pa.string()
        else:
            t = pa.Schema.from_pandas(meta[[name]], preserve_index=False).field(0).type
            if pa.types.is_dictionary(t):
                t = t.value_type
        fields.append(pa.field(str(name), t))
    return pa.schema(fields)


def _to_batch(pdf: Any, schema: pa.Schema, columns: list[str]) -> pa.RecordBatch:
    sub = pa.schema([schema.field(c) for c in columns])
    table = pa.Table.from_pandas(pdf[columns], schema=sub, preserve_index=False)
    return table.combine_chunks().to_batches()[0] if table.num_rows else pa.RecordBatch.from_pylist([], schema=sub)


class FrameSource:
    """A dask DataFrame read like a TableSource (one pandas partition at a time on the client,
    for the ledger's pre-pass) and split into parts by partition (on the workers)."""

    format = "parquet"  # typed columns, as from Parquet (no CSV text rules)
    dataset = None

    def __init__(self, frame: Any) -> None:
        _require_dask()
        import dask.dataframe as dd

        if not isinstance(frame, dd.DataFrame):
            raise UsageError(f"the input must be a path, a URI or a dask DataFrame, not {type(frame).__name__}.")
        self.frame = frame
        self.location = "the dask DataFrame given"
        self.schema = _arrow_schema(frame._meta)
        self.num_rows: int | None = None
        self.size_bytes = 0
        self._lengths: list[int] | None = None

    @property
    def column_names(self) -> list[str]:
        return list(self.schema.names)

    def lengths(self) -> list[int]:
        """The counting pass: the number of rows of every partition, in order."""
        if self._lengths is None:
            self._lengths = [int(n) for n in self.frame.map_partitions(len).compute()]
            self.num_rows = sum(self._lengths)
        return self._lengths

    def batches(self, columns: list[str], batch_rows: int) -> Any:
        def gen() -> Any:
            for i in range(self.frame.npartitions):
                yield _to_batch(self.frame.get_partition(i)[columns].compute(), self.schema, columns)
        return _rebatch(gen(), batch_rows)


def frame_part(job: PartJob, pdf: Any, schema: pa.Schema, row0: int, held: Any,
               path: str) -> PartResult:
    batch = _to_batch(pdf, schema, job.read_cols)
    return write_part(job, _rebatch(iter([batch]), job.batch_rows), row0, held, Path(path))


def _frame_parts(client: Any, job: PartJob, src: FrameSource, held: Any, folder: Path,
                 staged: StagedFiles, on_progress: Callable[[int], None] | None) -> list[PartResult]:
    import dask

    lengths = src.lengths()
    starts = np.concatenate([[0], np.cumsum(lengths)]).astype(int)
    parts = src.frame.to_delayed()
    tasks = [dask.delayed(frame_part)(job, part, src.schema, int(starts[i]), _mask_slice(held, int(starts[i]),
                                                                                          lengths[i]),
                                      str(folder / PART_NAME.format(i)))
             for i, part in enumerate(parts)]
    futs = client.compute(tasks)
    return _gather(client, list(futs), staged, on_progress)


def privatize_frame(frame: Any, policy: Any, key: Any, out: Path | str, **kwargs: Any) -> Any:
    """Privatize a dask DataFrame into a Parquet dataset folder ``out`` (one part per partition)
    plus its manifest; the keyword arguments are those of ``release.privatize`` (``scheduler``
    for a running cluster; none: a local cluster).  Rows are numbered in partition order, so the
    extract equals the local engine's on the same rows in the same order."""
    from .release import privatize

    kwargs.setdefault("engine", "dask")
    if kwargs["engine"] != "dask":
        raise UsageError("a dask DataFrame is released with engine='dask'.")
    return privatize(frame, policy, key, out, **kwargs)


__all__ = ["DEFAULT_WORKERS", "FrameSource", "check_scheduler_address", "map_fragments", "privatize_frame", "run_parts",
           "start_local_cluster"]
