"""Coverage of the 95% intervals of every distribution route, measured over repeated releases.

For every route (``hierarchy`` and ``square-wave`` with their default parameters, and a column
released with ``bins:`` through each frequency oracle that takes one), every data shape of
``tests/coverage_tools.py`` (heavy right tail, a point mass at 0, discrete counts, ``mdvis`` of
the RAND Health Insurance Experiment data shipped with statsmodels, and smooth pay), n in {20000,
200000} and eps in {0.5, 1, 2, 4}, the same rows are released R times (release noise from the
keyed PRF under a fixed key, one nonce per release) and each 95% interval is checked against the
truth of those rows: the quantiles 0.1, 0.2, ..., 0.9 and four range shares per shape (two with both ends
on bucket edges, two with ends inside buckets).

It prints, per route and shape, the coverage of the quantile intervals (mean over levels and
configurations, and the lowest cell: one level in one configuration, with where it is), of the
range shares (ends on edges / an end inside a bucket), and the pooled coverage of the quantile
intervals made half as wide (what a wrong interval would show).  With R releases a cell's
coverage has a binomial SE of sqrt(0.95 x 0.05 / R) (0.034 at R = 40), so the lowest of many
cells falls below 0.95 by chance alone.

    .venv/bin/python benchmarks/bench_coverage.py [--quick] [--releases 40] [--sw-releases 10]
        [--routes hierarchy bins:grr ...] [--shapes zeros counts ...] [--rows 20000 200000]
        [--epsilon 0.5 1 2 4] [--json FILE] [--detail] [--code DIR]

``--code DIR`` imports ``ldptransform`` from DIR instead of this tree (for instance a
``git archive`` of an older revision), to measure the intervals of that code on the same releases.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

REPO = Path(__file__).resolve().parent.parent


def load_tools(code: str | None) -> Any:
    sys.path.insert(0, str(Path(code).resolve()) if code else str(REPO))
    spec = importlib.util.spec_from_file_location("ldpt_coverage_tools", REPO / "tests" / "coverage_tools.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module          # dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="a small run: eps 1 and 4, 20000 rows, 20 releases (4 for "
                                                         "square-wave)")
    ap.add_argument("--releases", type=int, default=40, help="releases per configuration (hierarchy, bins)")
    ap.add_argument("--sw-releases", type=int, default=10, help="releases per configuration for square-wave")
    ap.add_argument("--sw-replicates", type=int, default=100, help="bootstrap redraws per square-wave release")
    ap.add_argument("--routes", nargs="+", default=None)
    ap.add_argument("--shapes", nargs="+", default=None)
    ap.add_argument("--rows", nargs="+", type=int, default=[20000, 200000])
    ap.add_argument("--epsilon", nargs="+", type=float, default=[0.5, 1.0, 2.0, 4.0])
    ap.add_argument("--json", default=None, help="write every configuration's figures to this file")
    ap.add_argument("--detail", action="store_true", help="also print every configuration")
    ap.add_argument("--code", default=None, help="import ldptransform from this folder")
    a = ap.parse_args(argv)
    if a.quick:
        a.rows, a.epsilon, a.releases, a.sw_releases = [20000], [1.0, 4.0], 20, 4
    return a


def table(results: list[Any], tools: Any) -> list[str]:
    lines = [f"{'route':<14} {'shape':<11} {'q mean':>6} {'q min':>6}  {'lowest cell (q, n, eps)':<24} "
             f"{'edges':>6} {'inside':>6} {'r min':>6} {'q half':>6} {'rel':>4}"]
    order = list(dict.fromkeys((c.route, c.shape) for c in results))
    for route, shape in order:
        cs = [c for c in results if c.route == route and c.shape == shape]
        qmean, rel = tools.pooled(cs, "q")
        half, _ = tools.pooled(cs, "q", half=True)
        cells = [(float(c.q_cover[i]), c.quantiles[i], c.n, c.eps) for c in cs for i in range(len(c.quantiles))]
        low = min(cells)
        edge = [c.r_hits[j] / c.releases for c in cs for j in range(len(c.ranges)) if c.r_edges[j]]
        inside = [c.r_hits[j] / c.releases for c in cs for j in range(len(c.ranges)) if not c.r_edges[j]]
        rmin = min(edge + inside)

        def avg(v: list[float]) -> str:
            return f"{float(np.mean(v)):.3f}" if v else "-"
        lines.append(f"{route:<14} {shape:<11} {qmean:6.3f} {low[0]:6.3f}  "
                     f"{f'{low[1]:g}, {low[2]}, {low[3]:g}':<24} {avg(edge):>6} {avg(inside):>6} {rmin:6.3f} "
                     f"{half:6.3f} {rel // max(len(cs), 1):>4}")
    return lines


def main(argv: list[str] | None = None) -> int:
    a = parse_args(argv)
    tools = load_tools(a.code)
    import ldptransform

    routes = a.routes or list(tools.routes())
    shapes = a.shapes or list(tools.SHAPES)
    print(f"ldptransform from {Path(ldptransform.__file__).parent}; rows {a.rows}; eps {a.epsilon}; "
          f"releases {a.releases} (square-wave {a.sw_releases}, {a.sw_replicates} bootstrap redraws)")
    results = []
    t0 = time.perf_counter()
    for route in routes:
        R = a.sw_releases if route == "square-wave" else a.releases
        for shape in shapes:
            for n in a.rows:
                for eps in a.epsilon:
                    c = tools.measure(route, shape, n, eps, R, quantiles=tools.QUANTILES_FULL,
                                      sw_replicates=a.sw_replicates)
                    results.append(c)
                    if a.detail:
                        print(f"  {route} {shape} n={n} eps={eps:g}: q {np.round(c.q_cover, 3).tolist()} "
                              f"r {np.round(c.r_cover, 3).tolist()} ({c.seconds:.1f} s)", flush=True)
        print(f"[{route} done, {time.perf_counter() - t0:.0f} s]", file=sys.stderr, flush=True)
    print()
    print("\n".join(table(results, tools)))
    print()
    print("q mean: coverage of the quantile intervals (0.1..0.9) pooled over levels, rows and eps; q min: the "
          "lowest single cell; edges / inside: mean coverage of the range shares with both ends on bucket edges / "
          "an end inside a bucket; r min: the lowest range cell; q half: quantile intervals made half as wide; rel: "
          f"releases per configuration.  {time.perf_counter() - t0:.0f} s in all.")
    if a.json:
        Path(a.json).write_text(json.dumps([c.as_dict() for c in results], indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
