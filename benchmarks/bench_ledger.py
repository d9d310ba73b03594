"""Cost of the spend ledger in nightly releases, against its targets.

    python benchmarks/bench_ledger.py [--rows N] [--changed F] [--charged K] [--repeat R] [--out-dir DIR]

On one synthetic table of N people (default 1,000,000; one row each, an identifier, two
memoized columns and one fresh column, Parquet), prints the fastest of R runs (default 5) of:
  hash       ledger.subject_hashes over the N identifiers (the keyed digests, all at once)
  plain      privatize without a ledger
  night 1    privatize with a new ledger (everyone charged and registered)
  night 2    the next night against the ledger of night 1 (everyone already registered), a
             fraction F (default 0.1) of memoized values changed
  small      a release of K people (default 10,000) against the ledger of night 1 (N registered)
and, for the ledger nights, the ratio to plain (target: at most 1.5x), the stages of the
fastest run (beside the writing pass, in the ledger's worker thread: its check of the stored
state, the keyed digests, the registry search, the last values, and once the rows are privatized
(beside the shuffle's second pass) the charges and the record's new state; after the pass: the
record's writes and commit), the ledger file's size and its growth
per release (target: proportional to the people charged, not to everyone registered: the small
release adds at most 16 bytes per person charged and two pages).  One process, wall clock,
imports excluded; the machine may be shared, so quote ratios from one run.  Each ledger run
starts from its own copy of the ledger, with a nonce of its own.  The synthetic data is seeded
numpy (benchmark input only); the release noise comes from the fixed benchmark key like every
release.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ldptransform.keys import SecretKey
from ldptransform.ledger import store as ledger_store
from ldptransform.ledger import subject_hashes
from ldptransform.policy import parse_policy
from ldptransform.release import charges as release_charges
from ldptransform.release import run as release_run
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(100, 132)))  # a fixed benchmark key, never a real one
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
RATIO_TARGET = 1.5
# growth target of a release: its spend uncompressed (a u64 registry index and an f64 eps per
# person charged), plus two 64 KiB pages (the release's row, the rounding to whole pages)
GROWTH_PER_PERSON = 16
GROWTH_SLACK = 2 * 65536

# stage -> (owner, attribute): timed by wrapping them for the benchmark's runs.  The ledger's
# work beside the writing pass runs in a worker thread (release/charges.py ChargeTap): its stages
# are counted apart ("... [worker]"), as they overlap the pass rather than add to it
STAGES = {
    "pre-pass": (release_charges, "ledger_prepass"),
    "charges": (release_charges.ChargeTap, "charges"),
    "recording": (release_run, "record_release"),
    "state check": (ledger_store.Ledger, "check_state"),
    "subject digests": (release_charges, "subject_digests"),
    "value digests": (release_charges, "memo_value_hashes"),
    "search": (ledger_store.Ledger, "row_positions"),
    "last values": (ledger_store.Ledger, "last_values"),
    "search, charges": (release_charges, "charges_of"),
    "record": (ledger_store.Ledger, "record_release"),
    "preparing the record": (ledger_store, "_prepare"),
    "state digest": (ledger_store, "_state_digest"),
    "writes": (ledger_store.Ledger, "_write_state"),
}
SPENT: dict[str, float] = {}  # stage -> seconds in it, not counting the stages it calls
_LOCAL = threading.local()  # each thread's stack of the stages it is in


def _timed_stage(name: str, fn: Callable[..., Any]) -> Callable[..., Any]:
    def run(*args: Any, **kwargs: Any) -> Any:
        stack: list[str] = _LOCAL.__dict__.setdefault("stack", [])
        where = "" if threading.current_thread() is threading.main_thread() else " [worker]"
        key = (f"{name} ({stack[-1]})" if name == "state digest" and stack else name) + where
        stack.append(name)
        t0 = time.perf_counter()
        try:
            return fn(*args, **kwargs)
        finally:
            spent = time.perf_counter() - t0
            stack.pop()
            SPENT[key] = SPENT.get(key, 0.0) + spent
            if stack:
                outer = stack[-1] + where
                SPENT[outer] = SPENT.get(outer, 0.0) - spent
    return run


def instrument() -> None:
    for name, (owner, attr) in STAGES.items():
        setattr(owner, attr, _timed_stage(name, getattr(owner, attr)))


def table(n: int, changed: float, night: int, every: int = 1) -> pa.Table:
    rng = np.random.default_rng(2026)
    team = rng.integers(0, 12, size=n)
    hours = np.round(rng.uniform(0, 60, size=n), 1)
    score = np.round(rng.uniform(0, 100, size=n), 1)
    if night > 1:
        move = rng.random(n) < changed
        team = np.where(move, (team + 1) % 12, team)
        hours = np.where(move, np.clip(hours + 20, 0, 60), hours)
    keep = slice(None, None, every)
    return pa.table({"person": pa.array([f"P{i:08d}" for i in range(n)][keep]),
                     "team": pa.array([f"team-{t}" for t in team[keep]]), "hours": hours[keep],
                     "score": score[keep]})


class Runs:
    """Releases with nonces of their own, each ledger run on its own copy of a ledger."""

    def __init__(self, tmp: Path, private: Path) -> None:
        self.tmp, self.private, self.count = tmp, private, 0
        self.pol = parse_policy(POLICY, "bench-ledger.yaml")

    def release(self, data: Path, ledger_from: Path | None | str = "none") -> tuple[float, dict[str, float], int,
                                                                                     Path | None]:
        """(seconds, stage seconds, ledger growth in bytes, ledger path) of one release of ``data``;
        ``ledger_from``: "none" (no ledger), None (a new ledger) or a ledger to copy first."""
        self.count += 1
        ledger = None
        before = 0
        if ledger_from != "none":
            ledger = self.private / f"ledger-{self.count}.sqlite3"
            if isinstance(ledger_from, Path):
                shutil.copy2(ledger_from, ledger)
                before = ledger.stat().st_size
        out = self.tmp / "out" / f"run{self.count}.parquet"
        SPENT.clear()
        t0 = time.perf_counter()
        privatize(data, self.pol, KEY, out, nonce=f"{self.count:032x}", ledger_path=ledger)
        seconds = time.perf_counter() - t0
        stages = dict(SPENT)
        out.unlink()
        growth = ledger.stat().st_size - before if ledger is not None else 0
        return seconds, stages, growth, ledger


def fastest(runs: list[tuple[float, dict[str, float], int, Path | None]]
            ) -> tuple[float, dict[str, float], int, Path | None]:
    return min(runs, key=lambda r: r[0])


def stage_text(stages: dict[str, float]) -> str:
    """The stages of one run (their own seconds: a stage's figure leaves out the stages it calls)."""
    g = stages.get
    w = " [worker]"
    worker = sum(v for k, v in stages.items() if k.endswith(w))
    return (f"beside the pass (worker thread, {worker:.2f} s in all): state check "
            f"{g('state check' + w, 0) + g('state digest (state check)' + w, 0):.2f} s (its digest "
            f"{g('state digest (state check)' + w, 0):.2f}), subject digests {g('subject digests' + w, 0):.2f}, value "
            f"digests {g('value digests' + w, 0):.2f}, search {g('search' + w, 0):.2f}, last values "
            f"{g('last values' + w, 0):.2f}; once the rows are privatized, the charges "
            f"{g('search, charges' + w, 0):.2f} and the record's new state "
            f"{g('preparing the record' + w, 0) + g('state digest (preparing the record)' + w, 0):.2f}"
            f"\n            after the pass: waiting for the worker and the like {g('charges', 0):.2f} s, charges "
            f"{g('search, charges', 0) + g('last values', 0):.2f}; record: state digest "
            f"{g('state digest (record)', 0):.2f}, writes {g('writes', 0):.2f}, the rest (its commit included) "
            f"{g('record', 0):.2f}; the release's side {g('recording', 0):.2f}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--changed", type=float, default=0.1)
    ap.add_argument("--charged", type=int, default=10_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--out-dir", type=Path, default=None)
    a = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=a.out_dir) as d:
        tmp = Path(d)
        private = tmp / "private"  # the steward's folder: ledgers, nonce record, diagnostics
        private.mkdir(mode=0o700)
        (tmp / "out").mkdir()
        os.environ["LDPT_PRIVATE_DIR"] = str(private)
        for night in (1, 2):
            pq.write_table(table(a.rows, a.changed, night), tmp / f"night{night}.parquet")
        every = max(a.rows // a.charged, 1)
        pq.write_table(table(a.rows, a.changed, 2, every), tmp / "small.parquet")
        ids = pq.read_table(tmp / "night1.parquet", columns=["person"]).column("person")
        instrument()
        runs = Runs(tmp, private)
        hash_s = min(_seconds(lambda: subject_hashes(KEY, ids)) for _ in range(a.repeat))
        plain = fastest([runs.release(tmp / "night1.parquet") for _ in range(a.repeat)])[0]
        night1 = fastest([runs.release(tmp / "night1.parquet", None) for _ in range(a.repeat)])
        base = night1[3]
        assert base is not None
        night2 = fastest([runs.release(tmp / "night2.parquet", base) for _ in range(a.repeat)])
        small_plain = fastest([runs.release(tmp / "small.parquet") for _ in range(a.repeat)])[0]
        small = fastest([runs.release(tmp / "small.parquet", base) for _ in range(a.repeat)])
        charged_small = len(range(0, a.rows, every))
        print(f"bench_ledger: {a.rows:,} people, {a.changed:.0%} of memoized values changed on night 2; "
              f"fastest of {a.repeat} runs")
        print(f"  hash      {hash_s:6.2f} s   (subject digests of {a.rows:,} identifiers)")
        print(f"  plain     {plain:6.2f} s")
        for name, (s, stages, growth, _), charged in (("night 1", night1, a.rows), ("night 2", night2, a.rows)):
            print(f"  {name}   {s:6.2f} s   {s / plain:5.2f}x plain (target <= {RATIO_TARGET}x: "
                  f"{'met' if s / plain <= RATIO_TARGET else 'NOT met'})   ledger +{growth / 1e6:.2f} MB "
                  f"({growth / charged:.1f} bytes per person charged)")
            print(f"            {stage_text(stages)}")
        s, stages, growth, _ = small
        per_small = growth / charged_small
        print(f"  small     {s:6.2f} s   ({charged_small:,} people charged, {a.rows:,} registered; "
              f"{small_plain:.2f} s without a ledger)   ledger +{growth / 1e3:.1f} kB "
              f"({per_small:.1f} bytes per person charged)")
        print(f"            {stage_text(stages)}")
        bound = GROWTH_PER_PERSON * charged_small + GROWTH_SLACK
        print(f"  ledger    {base.stat().st_size / 1e6:.1f} MB after night 1; growth per release "
              f"{growth / 1e3:.1f} kB with {charged_small:,} charged and {a.rows:,} registered (target: proportional "
              f"to the people charged, at most {GROWTH_PER_PERSON} bytes per person charged + "
              f"{GROWTH_SLACK // 1024} KiB = {bound / 1e3:.1f} kB: {'met' if growth <= bound else 'NOT met'}; "
              f"rewriting the state of everyone registered would add about "
              f"{base.stat().st_size / 1e6:.0f} MB)")
    return 0


def _seconds(fn: Callable[[], object]) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


if __name__ == "__main__":
    sys.exit(main())
