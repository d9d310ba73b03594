"""Joint groups against separate columns: n*Var of a small cross-tab cell and of each member's marginal.

    python benchmarks/efficiency_joint.py [--json FILE] [--rows N]

For (k_A x k_B) in 2x2, 3x2, 5x5, 10x4 and eps per column 0.5, 1, 2: a small cell's n*Var from one
joint report at 2 eps (the automatic oracle over the k_A k_B cells) and from the product of two
independent reports (each column at eps, its own automatic oracle), both exact (docs/formulas.md
section 22); each member's marginal share at uniform data (1 / k), read off the joint report
(simulated, N reports under the public planning key) and from the column's own report (exact).
Sources: Cormode, Kulkarni, Srivastava, "Marginal Release Under Local Differential Privacy", SIGMOD
2018; Zhang, Wang, Li, He, Chen, "CALM: Consistent Adaptive Local Marginal for Marginal Release
under Local Differential Privacy", CCS 2018.
"""

from __future__ import annotations

import argparse
import itertools
import json

from ldptransform import mechanisms as mech
from ldptransform.joint import product_cell_nvar, simulated_marginal_nvar, small_share_nvar
from ldptransform.policy import joint_label

SHAPES = [(2, 2), (3, 2), (5, 5), (10, 4)]
EPS = [0.5, 1.0, 2.0]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--json", default=None, help="also write the table as JSON to this file")
    ap.add_argument("--rows", type=int, default=100_000, help="simulated reports per marginal")
    args = ap.parse_args()
    rows = []
    print("| k_A x k_B | eps/col | cell joint | cell separate | marg A joint | marg A separate "
          "| marg B joint | marg B separate |")
    print("|---|---|---|---|---|---|---|---|")
    for (ka, kb), eps in itertools.product(SHAPES, EPS):
        cols = [[f"a{i}" for i in range(ka)], [f"b{i}" for i in range(kb)]]
        alone = [mech.choose_categorical(eps, c)[0] for c in cols]
        g = mech.choose_categorical(2 * eps, [joint_label(list(t)) for t in itertools.product(*cols)])[0]
        r = {"shape": f"{ka}x{kb}", "eps_per_column": eps, "joint_oracle": g.name,
             "separate_oracles": [o.name for o in alone], "cell_joint": small_share_nvar(g),
             "cell_separate": product_cell_nvar(alone)}
        for i, (name, o) in enumerate(zip("AB", alone)):
            r[f"marginal_{name}_joint"] = simulated_marginal_nvar(g, [ka, kb], i, args.rows, uniform=True)
            r[f"marginal_{name}_separate"] = float(o.variance(1.0 / len(cols[i])))
        rows.append(r)
        print(f"| {ka}x{kb} | {eps:g} | {r['cell_joint']:.4g} ({g.name}) | {r['cell_separate']:.4g} | "
              f"{r['marginal_A_joint']:.4g} | {r['marginal_A_separate']:.4g} | {r['marginal_B_joint']:.4g} | "
              f"{r['marginal_B_separate']:.4g} |", flush=True)
    if args.json:
        with open(args.json, "w") as fh:
            json.dump({"rows_simulated": args.rows, "table": rows}, fh, indent=2)


if __name__ == "__main__":
    main()
