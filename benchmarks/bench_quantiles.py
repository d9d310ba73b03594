"""Accuracy of locally private medians: which route should a partner's quantiles take?

On one synthetic, skewed pay column (lognormal, clipped to the bounds; invented data from
numpy's seeded generator) and the same eps, every route is released ``--releases`` times
(release noise from the keyed PRF under a fixed benchmark key and a different nonce per
release) and decoded; the error of the median is the mean absolute difference from the data's
own median.  Routes:

* noise-then-median: Laplace noise of scale (hi - lo)/eps added to each clipped value, then the
  sample median of the noisy values (a naive baseline; numpy's generator is fine here: it is a
  baseline, not a release);
* bins: the column cut into equal bins and released through GRR and through OUE, decoded by
  ``binned_distribution`` (cumulative frequency estimates, linear within bins);
* square-wave and hierarchy with their default parameters (and, with ``--variants``, other
  grids, branchings and leaf counts).

It prints each route's error and the ratio of its error to the tool's default
(``mechanisms.default_distribution``), measured in this run, plus the error of the 90th
percentile and of one range share for context.

    .venv/bin/python benchmarks/bench_quantiles.py [--rows 100000] [--releases 100] [--epsilon 1 [2 ...]] [--variants]
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from ldptransform.distribution import binned_distribution, frequency_covariance  # noqa: E402
from ldptransform.keys import SecretKey  # noqa: E402
from ldptransform.random import KeyedStream  # noqa: E402
from ldptransform.mechanisms import GRR, OUE, Hierarchy, SquareWave, default_distribution  # noqa: E402

KEY = SecretKey(bytes(range(64, 96)))  # a fixed benchmark key: the figures are reproducible
BOUNDS = (20000.0, 200000.0)
RANGE = (40000.0, 60000.0)


def pay_data(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.clip(rng.lognormal(np.log(50000.0), 0.45, n), *BOUNDS)


def words(label: str, release: int, n: int, per_row: int) -> np.ndarray:
    return KeyedStream(KEY, f"{release:032x}", "bench-quantiles", label).words(0, n, per_row)


def answers(d) -> tuple[float, float, float]:
    return d.quantile(0.5), d.quantile(0.9), d.range_share(*RANGE)


def run_laplace(x: np.ndarray, eps: float, release: int) -> tuple[float, float, float]:
    rng = np.random.default_rng(1000 + release)
    noisy = x + rng.laplace(0.0, (BOUNDS[1] - BOUNDS[0]) / eps, size=x.size)
    a, b = RANGE
    return float(np.median(noisy)), float(np.quantile(noisy, 0.9)), float(np.mean((noisy >= a) & (noisy < b)))


def run_bins(x: np.ndarray, eps: float, release: int, oracle: str, k: int) -> tuple[float, float, float]:
    edges = np.linspace(*BOUNDS, k + 1)
    codes = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, k - 1)
    m = (GRR if oracle == "grr" else OUE)(eps, [str(i) for i in range(k)])
    arrays = m.randomize(codes, words(f"bins-{oracle}-{k}", release, x.size, m.words_per_row))
    S = m.support(arrays)
    s = S.sum(axis=0).astype(float)
    co = None if oracle == "grr" else (S.T.astype(float) @ S.astype(float))
    n = x.size
    f = (s / n - m.q_star) / (m.p_star - m.q_star)
    cov = frequency_covariance(m.p_star, m.q_star, n, s, co)
    prefix_se = np.sqrt(np.maximum(np.diag(np.cumsum(np.cumsum(cov, 0), 1)), 0.0))
    d = binned_distribution(edges, f, prefix_se, cov=cov, n=n)
    return answers(d)


Route = tuple[str, Callable[[int], tuple[float, float, float]]]


def _routes(x: np.ndarray, eps: float, bins: int) -> list[Route]:
    """The compared routes at one eps: (name, release number -> the three errors' estimates)."""
    return [
        ("noise-then-median (Laplace)", lambda r: run_laplace(x, eps, r)),
        (f"bins: grr, {bins} bins", lambda r: run_bins(x, eps, r, "grr", bins)),
        (f"bins: oue, {bins} bins", lambda r: run_bins(x, eps, r, "oue", bins)),
        ("square-wave (grid 256)", lambda r: run_mech(x, r, SquareWave(eps, BOUNDS))),
        ("hierarchy (B=4, 64 leaves)", lambda r: run_mech(x, r, Hierarchy(eps, BOUNDS))),
    ]


def _variant_routes(x: np.ndarray, eps: float) -> list[Route]:
    """Other grids, branchings and leaf counts of the two distribution mechanisms (--variants)."""
    def square_wave(g: int) -> Route:
        return (f"square-wave (grid {g})", lambda r: run_mech(x, r, SquareWave(eps, BOUNDS, g)))

    def hierarchy(B: int, D: int) -> Route:
        return (f"hierarchy (B={B}, {D} leaves)", lambda r: run_mech(x, r, Hierarchy(eps, BOUNDS, B, D)))

    return ([square_wave(g) for g in (64, 128, 512, 1024)]
            + [hierarchy(B, D) for B, D in ((2, 256), (4, 256), (4, 1024), (8, 64), (8, 512), (16, 256))])


def run_mech(x: np.ndarray, release: int, m) -> tuple[float, float, float]:
    label = "-".join(str(v) for v in m.to_spec().values() if not isinstance(v, (list, dict)))
    arrays = m.randomize(x, words(label, release, x.size, m.words_per_row))
    st = m.new_stats()
    m.add_stats(st, arrays)
    return answers(m.decode(st, x.size))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--releases", type=int, default=100)
    ap.add_argument("--epsilon", type=float, nargs="+", default=[1.0])
    ap.add_argument("--bins", type=int, default=16)
    ap.add_argument("--seed", type=int, default=20240611, help="seed of the synthetic data")
    ap.add_argument("--variants", action="store_true", help="also other grids, branchings and leaf counts")
    args = ap.parse_args(argv)

    x = pay_data(args.rows, args.seed)
    truth = np.array([np.median(x), np.quantile(x, 0.9), np.mean((x >= RANGE[0]) & (x < RANGE[1]))])
    print(f"synthetic pay: {args.rows} rows, lognormal clipped to {BOUNDS}; median {truth[0]:.0f}, "
          f"90th percentile {truth[1]:.0f}, share in [{RANGE[0]:.0f}, {RANGE[1]:.0f}) {truth[2]:.4f}")
    print(f"{args.releases} releases per route; error = mean absolute error over releases\n")
    worst_ratio = np.inf
    for eps in args.epsilon:
        default, why = default_distribution(eps, BOUNDS)
        routes = _routes(x, eps, args.bins)
        main_routes = [name for name, _ in routes]
        if args.variants:
            routes += _variant_routes(x, eps)
        results = {}
        for name, fn in routes:
            t0 = time.perf_counter()
            got = np.array([fn(r) for r in range(args.releases)])
            err = np.abs(got - truth).mean(axis=0)
            results[name] = (err, time.perf_counter() - t0)
        dname = "square-wave (grid 256)" if default.name == "square-wave" else "hierarchy (B=4, 64 leaves)"
        base = results[dname][0]
        print(f"eps = {eps:g}; the tool's default for quantiles: {default.name} ({why})")
        print(f"  {'route':34s} {'median MAE':>11s} {'ratio':>7s} {'p90 MAE':>9s} {'ratio':>7s} "
              f"{'share MAE':>10s} {'ratio':>7s}")
        for name, (err, _secs) in results.items():
            r = err / base
            mark = "  <- default" if name == dname else ""
            print(f"  {name:34s} {err[0]:11.0f} {r[0]:7.2f} {err[1]:9.0f} {r[1]:7.2f} {err[2]:10.4f} {r[2]:7.2f}{mark}")
            if name in main_routes and name != dname:
                worst_ratio = min(worst_ratio, r[0])
        print()
    print(f"smallest median-error ratio of another main route to the default: {worst_ratio:.2f} "
          "(> 1 means the default won)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
