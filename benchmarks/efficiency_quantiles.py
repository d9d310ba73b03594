"""Quantile error of sequential-quantile against the asymptotic optimum and the default distribution
mechanism (hierarchy), Beta(2, 5) on [0, 1], n = 100,000 rows, eps 0.5 / 1 / 2, quantiles 0.1, 0.5, 0.9.

RMSE over releases with fixed seeds (data) and fixed PRF words (a public benchmark key); the
optimum is sqrt(p(1-p)/(2p-1)^2 + q(1-q)) / (f(x_q) sqrt(n)) (docs/formulas.md section 21).  The
sequential rows are randomized phase by phase as a release does (``randomize_in_order``).
Standalone: ``.venv/bin/python benchmarks/efficiency_quantiles.py [--json FILE] [--seeds N]``.
"""

from __future__ import annotations

import argparse
import json
import math
import time

import numpy as np
from scipy import stats

from ldptransform.keys import SecretKey
from ldptransform.mechanisms import make
from ldptransform.mechanisms.quantile import SequentialQuantile, randomize_in_order
from ldptransform.random import KeyedStream

KEY = SecretKey(bytes(range(32)))
N = 100_000


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--json", default=None)
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--default-seeds", type=int, default=10)
    a = ap.parse_args()
    dist = stats.beta(2, 5)
    rows = []
    t0 = time.perf_counter()
    for eps in (0.5, 1.0, 2.0):
        for q in (0.1, 0.5, 0.9):
            true = float(dist.ppf(q))
            m = SequentialQuantile(eps, (0.0, 1.0), q)
            opt = m.asymptotic_se(float(dist.pdf(true)), N)
            seq, cover = [], 0
            for s in range(a.seeds):
                x = np.random.default_rng(s).beta(2, 5, N)
                w = KeyedStream(KEY, f"{s:032x}", "bench", f"seq/{eps}/{q}").words(0, N, 2)
                arr, _ = randomize_in_order(m, x, w)
                r = m.decoder().add(arr).quantile()
                assert r.estimate is not None
                seq.append(r.estimate - true)
                cover += bool(r.lo is not None and r.hi is not None and r.lo <= true <= r.hi)
            h = make("hierarchy", "numeric", eps, (0.0, 1.0))
            dflt = []
            for s in range(a.default_seeds):
                x = np.random.default_rng(s).beta(2, 5, N)
                w = KeyedStream(KEY, f"{s:032x}", "bench", f"hier/{eps}").words(0, N, h.words_per_row)
                d = h.decoder().add(h.randomize(x, w)).distribution()   # type: ignore[attr-defined]
                dflt.append(float(d.quantile(q)) - true)
            rmse = math.sqrt(float(np.mean(np.square(seq))))
            rmse_h = math.sqrt(float(np.mean(np.square(dflt))))
            rows.append({"epsilon": eps, "q": q, "optimum_se": opt, "sequential_rmse": rmse, "ratio": rmse / opt,
                         "coverage": cover / a.seeds, "hierarchy_rmse": rmse_h, "releases": a.seeds,
                         "hierarchy_releases": a.default_seeds})
            print(f"eps {eps:<4} q {q:<4} optimum {opt:.5f}  sequential {rmse:.5f} ({rmse / opt:.2f}x, "
                  f"coverage {cover}/{a.seeds})  hierarchy {rmse_h:.5f}", flush=True)
    print(f"{time.perf_counter() - t0:.0f} s")
    if a.json:
        with open(a.json, "w") as fh:
            json.dump(rows, fh, indent=2)


if __name__ == "__main__":
    main()
