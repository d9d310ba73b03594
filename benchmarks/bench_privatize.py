"""Throughput and peak memory of `ldpt privatize` (and `ldpt estimate`) against plain copies.

    python benchmarks/bench_privatize.py [--rows N] [--format parquet|csv] [--out-dir DIR]
                                         [--policy core|mixed] [--no-dask] [--memory-scaling]
                                         [--small-rows M] [--batch-rows B] [--repeat R] [--check]

Every measurement runs in a fresh child process (this script re-invoked with --child),
so each child's peak resident memory is its own: it is read with os.wait4 (the same
kernel figure /usr/bin/time -v prints) and cross-checked against VmHWM from the child's
/proc/self/status.  The parent imports only the standard library (even the synthetic
data is generated in a child): a forked child's ru_maxrss starts at its parent's RSS, so
a heavy parent would inflate every figure.  Seconds are the child's own timer around the
work (interpreter start and imports excluded, on both sides of every ratio); "process s"
is the child's whole life, start-up included.

Default: timings and memory scaling.  Timings, on one synthetic file of N rows, in
--repeat rounds (default 3) that each run every step once:
  copy       plain pyarrow read + write of the same file (Parquet: ParquetFile.iter_batches
             -> ParquetWriter, zstd like the extract; CSV: pyarrow.csv streaming reader ->
             CSVWriter)
  privatize  ldptransform.release.privatize on it (manifest, hash and diagnostics included), rows in
             the keyed shuffled order (the default)
  as-input   the same with policy output.row_order: as-input (no shuffle)
  estimate   ldptransform.estimate.estimate on the extract
  pandas     pandas read of the same extract columns + value_counts / mean per column
  parts      privatize with the local engine into a Parquet dataset (one part per 1M rows)
  dask       the same with --engine dask on a LocalCluster of 2 worker processes started in the
             child before its timer (the start-up is printed apart); identical parts
and prints privatize/copy of the fastest runs (target <= 2 for the "core" policy of grr, oue
and piecewise columns, <= 3 for the "mixed" one), estimate/pandas (target <= 2) and dask/parts
(informative: the workers share the machine's cores with nothing else to do but also pay
for inter-process transfer; on 2 cores there is little to gain).  Memory scaling: privatize at
--small-rows (default N/10) as well, and the ratio of peak memory at N rows to that at N/10 rows
(target <= 1.3), each the largest over as many runs as there are timing rounds.  --memory-scaling runs only this part.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

FIXED_NONCE = "00112233445566778899aabbccddeeff"  # fixed so repeated runs write identical extracts
DEFAULT_CHUNK_ROWS = 100_000  # = synthetic.DEFAULT_CHUNK_ROWS (not imported: the parent stays small)
TARGET_TIME_RATIO = {"core": 2.0, "mixed": 3.0}
TARGET_ESTIMATE_RATIO = 2.0
TARGET_MEMORY_RATIO = 1.3
DASK_WORKERS = 2


# -- children -------------------------------------------------------------------------------

def _vmhwm_kb() -> int:
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return -1


def _child_copy(a: dict) -> dict:
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    src, dst = a["input"], a["output"]
    t0 = time.perf_counter()
    rows = 0
    if src.endswith(".parquet"):
        pf = pq.ParquetFile(src)
        # Same writer settings as ldptransform.io.BatchWriter.
        with pq.ParquetWriter(dst, pf.schema_arrow, compression="zstd", use_dictionary=True,
                              write_statistics=False) as w:
            for b in pf.iter_batches(batch_size=a["batch_rows"]):
                w.write_batch(b)
                rows += b.num_rows
    else:
        reader = pacsv.open_csv(src, read_options=pacsv.ReadOptions(block_size=1 << 22))
        with pacsv.CSVWriter(dst, reader.schema) as w:
            for b in reader:
                w.write_batch(b)
                rows += b.num_rows
    return {"seconds": time.perf_counter() - t0, "rows": rows}


def _child_privatize(a: dict) -> dict:
    from ldptransform.keys import load_key
    from ldptransform.policy import load_policy
    from ldptransform.release import privatize

    lp = load_policy(a["policy"])
    key = load_key(a["key"])
    t0 = time.perf_counter()
    res = privatize(a["input"], lp, key, a["output"],
                    batch_rows=a["batch_rows"], overwrite=True, nonce=FIXED_NONCE)
    return {"seconds": time.perf_counter() - t0, "rows": res.manifest.rows, "sha256": res.manifest.extract.sha256}


def _child_parts(a: dict) -> dict:
    """privatize into a Parquet dataset, local engine or dask (a LocalCluster started first)."""
    import shutil

    from ldptransform.keys import load_key
    from ldptransform.policy import load_policy
    from ldptransform.release import privatize

    lp = load_policy(a["policy"])
    key = load_key(a["key"])
    out = Path(a["output"])
    if out.exists():
        shutil.rmtree(out)
    kw: dict = {}
    cluster = None
    start = 0.0
    if a["engine"] == "dask":
        import logging

        from distributed import LocalCluster

        t0 = time.perf_counter()
        cluster = LocalCluster(n_workers=DASK_WORKERS, threads_per_worker=1, processes=True, dashboard_address=None,
                               silence_logs=logging.ERROR)
        start = time.perf_counter() - t0
        kw = {"engine": "dask", "scheduler": cluster.scheduler_address}
    try:
        t0 = time.perf_counter()
        res = privatize(a["input"], lp, key, out,
                        batch_rows=a["batch_rows"], overwrite=True, nonce=FIXED_NONCE, **kw)
        secs = time.perf_counter() - t0
    finally:
        if cluster is not None:
            cluster.close()
    return {"seconds": secs, "rows": res.manifest.rows, "sha256": res.manifest.extract.sha256,
            "cluster_start_seconds": start}


def _child_estimate(a: dict) -> dict:
    from ldptransform.estimate import estimate

    t0 = time.perf_counter()
    res = estimate(a["extract"])
    return {"seconds": time.perf_counter() - t0, "rows": res["rows"]}


def _child_pandas(a: dict) -> dict:
    import pandas as pd

    from ldptransform.manifest import default_manifest_path, load_manifest

    extract = a["extract"]
    man = load_manifest(default_manifest_path(Path(extract)))
    entries = [c for c in man.columns if c.mechanism is not None]
    cols = [o.name for c in entries for o in c.outputs]  # the same columns estimate reads
    t0 = time.perf_counter()
    df = pd.read_parquet(extract, columns=cols) if extract.endswith(".parquet") else pd.read_csv(extract, usecols=cols)
    out = {}
    for c in entries:
        s = df[c.name]
        out[c.name] = float(s.mean()) if c.type == "numeric" else int(s.value_counts().size)
    return {"seconds": time.perf_counter() - t0, "rows": len(df)}


def _child_generate(a: dict) -> dict:
    import synthetic

    t0 = time.perf_counter()
    synthetic.write_input(a["output"], a["rows"], chunk_rows=a["chunk_rows"])
    return {"seconds": time.perf_counter() - t0, "rows": a["rows"]}


def _child_setup(a: dict) -> dict:
    import synthetic

    synthetic.write_policy(a["policy"], a["policy_kind"])
    # the same policy with the rows kept in input order (no keyed shuffle)
    Path(a["policy_as_input"]).write_text(Path(a["policy"]).read_text() + "\noutput:\n  row_order: as-input\n")
    synthetic.write_key(a["key"])
    return {"seconds": 0.0, "rows": 0}


CHILDREN = {"setup": _child_setup, "generate": _child_generate, "copy": _child_copy, "privatize": _child_privatize,
            "as-input": _child_privatize,
            "estimate": _child_estimate, "pandas": _child_pandas, "parts": _child_parts, "dask": _child_parts}


def child_main(kind: str, args_json: str) -> None:
    import shutil

    # every child is a steward of its own: its own private folder (0700) for the diagnostics and
    # the record of used nonces, so the fixed nonce can be reused from one child to the next
    private = tempfile.mkdtemp(prefix="ldpt-bench-private-")
    os.environ["LDPT_PRIVATE_DIR"] = private
    try:
        result = CHILDREN[kind](json.loads(args_json))
    finally:
        shutil.rmtree(private, ignore_errors=True)
    result["vmhwm_kb"] = _vmhwm_kb()
    print(json.dumps(result))


# -- parent ---------------------------------------------------------------------------------

def run_child(kind: str, **kw: object) -> dict:
    """Run one measurement in a fresh interpreter; return its result with its own peak RSS."""
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        t0 = time.perf_counter()
        p = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--child", kind, json.dumps(kw)],
                             stdout=out, stderr=err)
        _, status, usage = os.wait4(p.pid, 0)
        wall = time.perf_counter() - t0
        p.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        text, etext = out.read().decode(), err.read().decode()
    if p.returncode != 0:
        raise SystemExit(f"child {kind} failed (exit {p.returncode}):\n{etext}")
    res = json.loads(text.strip().splitlines()[-1])
    res["maxrss_kb"] = usage.ru_maxrss  # kilobytes on Linux
    res["process_seconds"] = wall
    return res


def summarize(runs: list[dict]) -> dict:
    """The fastest run's figures; peak memory is the largest seen over all runs."""
    best = dict(min(runs, key=lambda r: r["seconds"]))
    best["maxrss_kb"] = max(r["maxrss_kb"] for r in runs)
    best["vmhwm_kb"] = max(r["vmhwm_kb"] for r in runs)
    best["all_seconds"] = [r["seconds"] for r in runs]
    return best


def rounds(repeat: int, steps: dict[str, dict]) -> dict[str, dict]:
    """Run every step once per round, round after round (so that the steps share the
    machine's load of the moment), and summarize each step over the rounds."""
    runs: dict[str, list[dict]] = {k: [] for k in steps}
    for _ in range(repeat):
        for kind, kw in steps.items():
            runs[kind].append(run_child(kind, **kw))
    return {k: summarize(v) for k, v in runs.items()}


def mib(kb: int) -> str:
    return f"{kb / 1024:.0f} MiB"


def make_input(out_dir: Path, rows: int, fmt: str, chunk_rows: int) -> Path:
    """Generate the synthetic input in a child (reused if an identical one is already there)."""
    path = out_dir / f"synthetic_{rows}.{fmt}"
    stamp = path.with_suffix(path.suffix + ".done")
    gen_source = (HERE / "synthetic.py").read_bytes()
    want = json.dumps({"rows": rows, "chunk_rows": chunk_rows,
                       "generator_sha256": hashlib.sha256(gen_source).hexdigest()})
    if path.exists() and stamp.exists() and stamp.read_text() == want:
        print(f"  reusing {path}")
        return path
    r = run_child("generate", output=str(path), rows=rows, chunk_rows=chunk_rows)
    stamp.write_text(want)
    print(f"  wrote {path} ({path.stat().st_size / 2**20:.0f} MiB) in {r['seconds']:.1f} s, generator peak RSS "
          f"{mib(r['maxrss_kb'])}")
    return path


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=2_000_000, help="rows of the synthetic input (default 2,000,000)")
    ap.add_argument("--format", choices=["parquet", "csv"], default="parquet", help="input and extract format")
    ap.add_argument("--out-dir", type=Path, default=None,
                    help="where to write the input, policy, key and extracts (default: a temporary folder, removed)")
    ap.add_argument("--batch-rows", type=int, default=65536, help="--batch-rows of privatize and the copy's batch size")
    ap.add_argument("--chunk-rows", type=int, default=None,
                    help="rows per generated chunk = input row group (default 100,000)")
    ap.add_argument("--repeat", type=int, default=3,
                    help="rounds of timings (each round runs every step once); the fastest of each is kept (default 3)")
    ap.add_argument("--policy", choices=["core", "mixed"], default="core",
                    help="core: grr, oue and piecewise columns (default); mixed: one column per kind of work")
    ap.add_argument("--no-dask", action="store_true", help="skip the dataset and dask steps")
    ap.add_argument("--memory-scaling", action="store_true",
                    help="only the peak-memory scaling of privatize (no copy, estimate or pandas timings)")
    ap.add_argument("--small-rows", type=int, default=None, help="smaller size for --memory-scaling (default N/10)")
    ap.add_argument("--json", type=Path, default=None, help="also write all results to this JSON file")
    ap.add_argument("--check", action="store_true", help="exit with status 1 if a target is missed")
    if argv is None and len(sys.argv) >= 2 and sys.argv[1] == "--child":
        child_main(sys.argv[2], sys.argv[3])
        return 0
    args = ap.parse_args(argv)

    chunk_rows = args.chunk_rows or DEFAULT_CHUNK_ROWS
    tmp = None
    if args.out_dir is None:
        tmp = tempfile.TemporaryDirectory(prefix="ldpt-bench-")
        out_dir = Path(tmp.name)
    else:
        out_dir = args.out_dir
        out_dir.mkdir(parents=True, exist_ok=True)
    t_start = time.perf_counter()
    try:
        return _run(args, out_dir, chunk_rows)
    finally:
        print(f"\nbenchmark total: {time.perf_counter() - t_start:.1f} s")
        if tmp is not None:
            tmp.cleanup()


def _dask_installed() -> bool:
    """Whether the dask step can run here (distributed importable); says so when it cannot."""
    try:
        import importlib.util

        found = importlib.util.find_spec("distributed") is not None
    except ImportError:
        found = False
    if not found:
        print("  (dask not installed: no dask step; pip install 'ldptransform[dask]')")
    return found


def _run(args: argparse.Namespace, out_dir: Path, chunk_rows: int) -> int:
    fmt, n, batch = args.format, args.rows, args.batch_rows
    timings = not args.memory_scaling
    print(f"ldptransform benchmark: {n:,} rows, {fmt}, batch_rows {batch:,}, input row groups/chunks of "
          f"{chunk_rows:,}, repeat {args.repeat}, python {sys.version.split()[0]}, {os.cpu_count()} CPU(s)")
    policy, key = out_dir / f"synthetic_policy_{args.policy}.yaml", out_dir / "synthetic.key"
    policy_kept = out_dir / f"synthetic_policy_{args.policy}_as_input.yaml"
    run_child("setup", policy=str(policy), key=str(key), policy_kind=args.policy, policy_as_input=str(policy_kept))
    dask_ok = timings and not args.no_dask and fmt == "parquet" and _dask_installed()
    src = make_input(out_dir, n, fmt, chunk_rows)
    results: dict = {"rows": n, "format": fmt, "batch_rows": batch, "chunk_rows": chunk_rows,
                     "repeat": args.repeat}
    ok = True

    extract = out_dir / f"extract_{n}.{fmt}"
    steps: dict[str, dict] = {}
    if timings:
        steps["copy"] = dict(input=str(src), output=str(out_dir / f"copy_{n}.{fmt}"), batch_rows=batch)
    steps["privatize"] = dict(input=str(src), output=str(extract), policy=str(policy), key=str(key), batch_rows=batch)
    if timings:
        steps["as-input"] = dict(input=str(src), output=str(out_dir / f"extract_as_input_{n}.{fmt}"),
                                 policy=str(policy_kept), key=str(key), batch_rows=batch)
        steps["estimate"] = dict(extract=str(extract))
        steps["pandas"] = dict(extract=str(extract))
    if dask_ok:
        common = dict(input=str(src), policy=str(policy), key=str(key), batch_rows=batch)
        steps["parts"] = dict(common, output=str(out_dir / f"parts_{n}"), engine="local")
        steps["dask"] = dict(common, output=str(out_dir / f"dask_{n}"), engine="dask")
    repeat = args.repeat if timings else 1
    measured = rounds(repeat, steps)
    priv = measured["privatize"]
    results["privatize"] = priv

    if timings:
        copy, est, pdr = measured["copy"], measured["estimate"], measured["pandas"]
        results.update(copy=copy, estimate=est, pandas=pdr)
        ratio = priv["seconds"] / copy["seconds"]
        eratio = est["seconds"] / pdr["seconds"]
        per_round = [p / c for p, c in zip(priv["all_seconds"], copy["all_seconds"])]
        results["privatize_over_copy"] = ratio
        results["privatize_over_copy_per_round"] = per_round
        results["estimate_over_pandas"] = eratio
        print(f"\nfastest of {args.repeat} round(s); peak RSS is the largest over the rounds")
        print(f"{'step':<11}{'rows':>12}{'seconds':>10}{'rows/s':>13}{'peak RSS':>11}{'(VmHWM)':>11}"
              f"{'process s':>11}")
        kept = measured["as-input"]
        results["as_input"] = kept
        results["as_input_over_copy"] = kept["seconds"] / copy["seconds"]
        shown = [("copy", copy), ("privatize", priv), ("as-input", kept), ("estimate", est), ("pandas", pdr)]
        if dask_ok:
            shown += [("parts", measured["parts"]), ("dask", measured["dask"])]
        for name, r in shown:
            print(f"{name:<11}{r['rows']:>12,}{r['seconds']:>10.2f}{r['rows'] / r['seconds']:>13,.0f}"
                  f"{mib(r['maxrss_kb']):>11}{mib(r['vmhwm_kb']):>11}{r['process_seconds']:>11.2f}")
        target = TARGET_TIME_RATIO[args.policy]
        verdict = "OK" if ratio <= target else "ABOVE TARGET"
        ok &= ratio <= target
        print(f"\nprivatize / copy   = {ratio:.2f}  (fastest of each; policy {args.policy!r}, target <= {target:g}: "
              f"{verdict})")
        if len(per_round) > 1:
            print(f"  round by round:    {', '.join(f'{r:.2f}' for r in per_round)}")
        print(f"as-input / copy    = {kept['seconds'] / copy['seconds']:.2f}  (policy output.row_order: as-input, "
              "no shuffle; informative)")
        everdict = "OK" if eratio <= TARGET_ESTIMATE_RATIO else "ABOVE TARGET"
        ok &= eratio <= TARGET_ESTIMATE_RATIO
        print(f"estimate / pandas  = {eratio:.2f}  (target <= {TARGET_ESTIMATE_RATIO:g}: {everdict}; estimate also "
              "checks every value against the mechanism's output alphabet)")
        if dask_ok:
            parts, dsk = measured["parts"], measured["dask"]
            same = parts["sha256"] == dsk["sha256"]
            results.update(parts=parts, dask=dsk, dask_over_parts=dsk["seconds"] / parts["seconds"])
            print(f"dask / parts       = {dsk['seconds'] / parts['seconds']:.2f}  ({DASK_WORKERS} worker processes "
                  f"against the local engine writing the same parts; cluster start-up "
                  f"{dsk['cluster_start_seconds']:.1f} s not included; same digest: {same}; informative)")
            ok &= same

    # memory scaling (always)
    small = args.small_rows or max(1, n // 10)
    src_small = make_input(out_dir, small, fmt, chunk_rows)
    priv_small = rounds(repeat, {"privatize": dict(
        input=str(src_small), output=str(out_dir / f"extract_{small}.{fmt}"), policy=str(policy), key=str(key),
        batch_rows=batch)})["privatize"]
    results["privatize_small"] = priv_small
    mratio = priv["maxrss_kb"] / priv_small["maxrss_kb"]
    results["memory_ratio"] = mratio
    verdict = "OK" if mratio <= TARGET_MEMORY_RATIO else "ABOVE TARGET"
    ok &= mratio <= TARGET_MEMORY_RATIO
    print(f"\nprivatize peak RSS (largest of {repeat} run(s) at each size): {small:,} rows "
          f"{mib(priv_small['maxrss_kb'])} ({priv_small['seconds']:.2f} s); {n:,} rows {mib(priv['maxrss_kb'])} "
          f"({priv['seconds']:.2f} s)")
    print(f"peak memory ratio  = {mratio:.2f}  ({n / small:g}x the rows; target <= {TARGET_MEMORY_RATIO:g}: "
          f"{verdict})")

    if args.json:
        args.json.write_text(json.dumps(results, indent=2) + "\n")
    return 0 if (ok or not args.check) else 1


if __name__ == "__main__":
    sys.exit(main())
