"""Scale: peak memory does not grow with the number of rows, and the extract does not
depend on the batch size.

The synthetic input comes from benchmarks/synthetic.py (invented data, made chunk by
chunk with numpy's seeded generator; release noise only ever comes from the keyed PRF).
"""

from __future__ import annotations

import csv
import hashlib
import importlib.util
import threading
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from ldptransform.io import _rebatch
from ldptransform.keys import load_key, new_key_file
from ldptransform.policy import load_policy
from ldptransform.release import privatize

REPO = Path(__file__).resolve().parent.parent
NONCE = "0123456789abcdef0123456789abcdef"

# Peak memory: the same release at a small size and at 10x as many rows, in fresh
# processes.  The small size holds more than one output row group (io.ROW_GROUP_ROWS =
# 131072), so both runs reach the steady state of reader, batch kernel and writer; what
# is left to differ is anything that grows with the rows.
BATCH_ROWS = 20_000
MAX_MEMORY_RATIO = 1.3


def _load_synthetic():
    spec = importlib.util.spec_from_file_location("ldpt_bench_synthetic", REPO / "benchmarks" / "synthetic.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


synthetic = _load_synthetic()


@pytest.fixture(scope="module")
def work(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("scale")
    key = d / "release.key"
    new_key_file(key)
    return {"dir": d, "policy": synthetic.write_policy(d / "policy.yaml"), "key": key}


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# -- (a) peak memory -------------------------------------------------------------------------

# Runs the command line (`ldpt ARGS`) in this fresh interpreter, then prints the process's
# own peak resident memory.  VmHWM is read in the child itself: a child's ru_maxrss from
# wait4 starts at the forking parent's RSS (pytest's), which would hide the child's own.
_CHILD = """
import sys
from ldptransform.cli import main
sys.argv = ["ldpt", *sys.argv[1:]]
try:
    main()
except SystemExit as exit:
    if exit.code not in (0, None):
        raise
with open("/proc/self/status") as f:
    print("VMHWM_KB", next(int(line.split()[1]) for line in f if line.startswith("VmHWM:")))
"""


def peak_rss_kb(args: list[str], private: Path) -> int:
    env = dict(os.environ, LDPT_PRIVATE_DIR=str(private), NO_COLOR="1")
    proc = subprocess.run([sys.executable, "-c", _CHILD, *args], capture_output=True, text=True, env=env,
                          cwd=private, stdin=subprocess.DEVNULL, timeout=600)
    assert proc.returncode == 0, proc.stderr
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("VMHWM_KB ")]
    assert lines, proc.stdout + proc.stderr
    return int(lines[-1].split()[1])


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="peak memory is read from /proc (Linux)")
@pytest.mark.parametrize("fmt, small", [("parquet", 300_000), ("csv", 200_000)])
def test_peak_memory_flat_in_rows(work: dict[str, Path], fmt: str, small: int) -> None:
    d = work["dir"]
    peaks, est_peaks = {}, {}
    for rows in (small, 10 * small):
        src = synthetic.write_input(d / f"in_{rows}.{fmt}", rows)
        out = d / f"out_{rows}.{fmt}"
        peaks[rows] = peak_rss_kb(["privatize", str(src), "--policy", str(work["policy"]), "--key",
                                   str(work["key"]), "--out", str(out), "--batch-rows", str(BATCH_ROWS),
                                   "--diagnostics", str(steward(d) / f"diag_{rows}_{fmt}.json"), "--quiet"], d)
        src.unlink()  # keep the temporary folder small
        if fmt == "parquet":
            assert pq.ParquetFile(out).metadata.num_rows == rows
        # decoding streams too: `estimate` keeps only sums
        est_peaks[rows] = peak_rss_kb(["estimate", str(out), "--format", "json", "--out",
                                       str(d / f"est_{rows}_{fmt}.json")], d)
        out.unlink()
    large = 10 * small
    est_ratio = est_peaks[large] / est_peaks[small]
    print(f"\n{fmt} estimate peak RSS: {small} rows {est_peaks[small] / 1024:.0f} MiB, {large} rows "
          f"{est_peaks[large] / 1024:.0f} MiB, ratio {est_ratio:.3f}")
    assert est_ratio <= MAX_MEMORY_RATIO, (fmt, est_peaks)
    ratio = peaks[large] / peaks[small]
    print(f"\n{fmt} peak RSS: {small} rows {peaks[small] / 1024:.0f} MiB, {large} rows "
          f"{peaks[large] / 1024:.0f} MiB, ratio {ratio:.3f}")
    assert ratio <= MAX_MEMORY_RATIO, (
        f"{fmt}: peak memory grows with the rows: {peaks[small] / 1024:.0f} MiB at {small} rows, "
        f"{peaks[large] / 1024:.0f} MiB at {large} rows (ratio {ratio:.2f} > {MAX_MEMORY_RATIO})")


# -- (b) the extract does not depend on the batch size -------------------------------------

def _release(work: dict[str, Path], src: Path, out: Path, batch_rows: int) -> Path:
    privatize(src, load_policy(work["policy"]), load_key(work["key"]), out, batch_rows=batch_rows, nonce=NONCE,
              diagnostics_path=steward(out.parent) / f"{out.stem}.diag.json")
    return out


def steward(folder: Path) -> Path:
    """A steward-only folder (0700) beside ``folder``: diagnostics never go where the extract goes."""
    d = folder.parent / f"{folder.name}-steward"
    d.mkdir(mode=0o700, exist_ok=True)
    return d


def _read(path: Path) -> pa.Table:
    if path.suffix == ".csv":  # every column as text, so that nothing is lost to type guessing
        with path.open(newline="") as f:
            names = next(csv.reader(f))
        return pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
            column_types={n: pa.string() for n in names}, strings_can_be_null=True))
    return pq.read_table(path)


@pytest.mark.parametrize("src_format, out_format, rows, batches", [
    ("parquet", "parquet", 400, [1, 7, 65536]),
    ("parquet", "csv", 400, [1, 7, 65536]),
    ("csv", "parquet", 40_000, [7_001, 65536]),        # several CSV reader blocks per batch
    ("parquet", "parquet", 270_000, [50_000, 65536]),  # several output row groups
])
def test_extract_independent_of_batch_size(work: dict[str, Path], src_format: str, out_format: str, rows: int,
                                           batches: list[int]) -> None:
    d = work["dir"]
    src = d / f"b_{rows}.{src_format}"
    if not src.exists():
        synthetic.write_input(src, rows, chunk_rows=max(1, rows // 3 + 1))
    outs = [_release(work, src, d / f"b_{rows}_{src_format}_{out_format}_{b}.{out_format}", b) for b in batches]
    first = _read(outs[0])
    assert first.num_rows == rows
    for other in outs[1:]:
        assert _read(other).equals(first), f"{other.name} differs in value from {outs[0].name}"
        assert sha256(other) == sha256(outs[0]), f"{other.name} differs in bytes from {outs[0].name}"


def test_rebatch_cuts_exact_batches_in_order() -> None:
    rng = np.random.default_rng(11)
    for _ in range(200):
        sizes = [int(s) for s in rng.integers(0, 40, int(rng.integers(0, 12)))]
        rows = int(rng.integers(1, 50))
        total = sum(sizes)
        values = np.arange(total)
        source, start = [], 0
        for s in sizes:
            part = values[start:start + s]
            source.append(pa.record_batch([pa.array(part), pa.array([f"v{v}" for v in part], pa.string())],
                                          names=["n", "s"]))
            start += s
        out = list(_rebatch(iter(source), rows))
        assert [b.num_rows for b in out] == [rows] * (total // rows) + ([total % rows] if total % rows else [])
        if out:
            table = pa.Table.from_batches(out)
            assert table.column("n").to_pylist() == list(range(total))
            assert table.column("s").to_pylist() == [f"v{v}" for v in range(total)]


def test_prefetched_reads_ahead_in_order_raises_the_source_error_and_stops_early() -> None:
    """The read-ahead thread: same items in the same order; the source's own error reaches the
    caller as raised; a caller that stops early stops the reader and the source is closed."""
    from ldptransform.errors import DataError
    from ldptransform.io import prefetched

    assert list(prefetched(iter(range(1000)))) == list(range(1000))

    def failing():
        yield 1
        yield 2
        raise DataError("input file x.csv could not be read after data row 2")

    got = []
    with pytest.raises(DataError, match="after data row 2"):
        for item in prefetched(failing()):
            got.append(item)
    assert got == [1, 2]

    closed = []

    def endless():
        try:
            i = 0
            while True:
                yield i
                i += 1
        finally:
            closed.append(True)

    before = {t for t in threading.enumerate() if t.name == "ldpt-reader"}
    gen = prefetched(endless(), depth=2)
    assert [next(gen) for _ in range(5)] == [0, 1, 2, 3, 4]
    gen.close()  # type: ignore[attr-defined]
    assert closed == [True]
    assert {t for t in threading.enumerate() if t.name == "ldpt-reader"} <= before
