"""Cost of the privacy ledger in nightly releases.

    python benchmarks/bench_ledger.py [--rows N] [--changed F] [--out-dir DIR]

On one synthetic table of N people (default 200,000; one row each, an identifier, two
memoized columns and one fresh column, Parquet), prints the seconds of:
  hash       ledger.subject_hashes over the N identifiers (the keyed digests, all at once)
  plain      privatize without a ledger
  night 1    privatize with a new ledger (everyone charged, everyone's state stored)
  night 2    privatize the next night, a fraction F (default 0.1) of memoized values changed
and the ledger file's size after each night, and the ratios night/plain.  One run, wall
clock in this process (imports excluded); the machine is shared, so quote ratios from one
run.  The synthetic data is seeded numpy (benchmark input only); the release noise comes
from the fixed benchmark key like every release.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ldptransform.keys import SecretKey
from ldptransform.ledger import subject_hashes
from ldptransform.policy import parse_policy
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(100, 132)))  # a fixed benchmark key, never a real one
NONCES = ("0" * 31 + "1", "0" * 31 + "2", "0" * 31 + "3")
POLICY = {
    "budget": {"epsilon_per_row": 3.0},
    "subject_key": "person",
    "columns": {
        "team": {"type": "categorical", "categories": [f"team-{i}" for i in range(12)], "epsilon": 1.0,
                 "memoize": True},
        "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0, "mechanism": "hybrid", "memoize": True},
        "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": "hybrid"},
    },
}


def table(n: int, changed: float, night: int) -> pa.Table:
    rng = np.random.default_rng(2026)
    team = rng.integers(0, 12, size=n)
    hours = np.round(rng.uniform(0, 60, size=n), 1)
    score = np.round(rng.uniform(0, 100, size=n), 1)
    if night > 1:
        move = rng.random(n) < changed
        team = np.where(move, (team + 1) % 12, team)
        hours = np.where(move, np.clip(hours + 20, 0, 60), hours)
    return pa.table({"person": pa.array([f"P{i:08d}" for i in range(n)]),
                     "team": pa.array([f"team-{t}" for t in team]), "hours": hours, "score": score})


def timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--changed", type=float, default=0.1)
    ap.add_argument("--out-dir", type=Path, default=None)
    a = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=a.out_dir) as d:
        tmp = Path(d)
        pol = parse_policy(POLICY, "bench-ledger.yaml")
        for night in (1, 2):
            pq.write_table(table(a.rows, a.changed, night), tmp / f"night{night}.parquet")
        ids = pq.read_table(tmp / "night1.parquet", columns=["person"]).column("person")
        ledger = tmp / "ledger.sqlite3"
        rows: list[tuple[str, float, int | None]] = []
        rows.append(("hash", timed(lambda: subject_hashes(KEY, ids)), None))
        plain = timed(lambda: privatize(tmp / "night1.parquet", pol, KEY, tmp / "plain.parquet", nonce=NONCES[0]))
        rows.append(("plain", plain, None))
        for night in (1, 2):
            s = timed(lambda night=night: privatize(tmp / f"night{night}.parquet", pol, KEY,
                                                    tmp / f"out{night}.parquet", nonce=NONCES[night],
                                                    ledger_path=ledger))
            rows.append((f"night {night}", s, ledger.stat().st_size))
        print(f"bench_ledger: {a.rows:,} people, {a.changed:.0%} of memoized values changed on night 2")
        for name, s, size in rows:
            extra = "" if size is None else f"   ledger {size / 1e6:7.1f} MB   {s / plain:5.2f}x plain"
            print(f"  {name:8s} {s:7.2f} s{extra}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
