"""Check that a change to the release path leaves every extract bit-for-bit identical.

    python benchmarks/check_identical.py [--baseline REF] [--out-dir DIR]

Exports the git revision REF (default HEAD) to a temporary folder with `git archive`,
then privatizes the same synthetic inputs with the same key and nonce under both the
baseline and the working tree (each in its own child process, with that tree first on
sys.path) and compares the sha256 of every extract.  The cases cover Parquet and CSV in
and out, input row groups and CSV blocks that do not line up with the batches, several
output row groups, and batch sizes from 1 to larger than a row group; within each tree,
every batch size of one input and output format must also give the same file.  Every example
policy in policies/ is also run on the demo survey (demo_data/, as CSV and as a Parquet copy with
row groups that do not line up with the batches), to Parquet and CSV, at several batch sizes;
a policy with a subject key records into a fresh ledger for each run.

Exit status 0 if everything matches, 1 otherwise.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pyarrow.csv as pacsv
import pyarrow.parquet as pq

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
NONCE = "ffeeddccbbaa99887766554433221100"

POLICIES = REPO / "policies"
DEMO_CSV = REPO / "demo_data" / "staff_survey.csv"
POLICY_BATCHES = [65536, 999, 7]

# (input name, rows, input chunk rows, output format, batch sizes)
CASES = [
    ("a.parquet", 300_000, 70_001, "parquet", [65536, 1000, 131072, 100_000]),
    ("a.parquet", 300_000, 70_001, "csv", [65536, 4099]),
    ("b.csv", 150_000, 50_000, "parquet", [65536, 1000]),
    ("b.csv", 150_000, 50_000, "csv", [65536, 1000]),
    ("c.parquet", 3_001, 1000, "parquet", [1, 7, 65536]),
    ("c.parquet", 3_001, 1000, "csv", [1, 7, 65536]),
]

_CHILD = """
import json, os, sys, tempfile
from pathlib import Path
tree, work, cases = sys.argv[1], Path(sys.argv[2]), json.loads(sys.argv[3])
sys.path.insert(0, tree)
import ldptransform
assert Path(ldptransform.__file__).resolve().is_relative_to(Path(tree).resolve()), ldptransform.__file__
from ldptransform.keys import load_key
from ldptransform.policy import load_policy
from ldptransform.release import privatize
lp, key = load_policy(work / "policy.yaml"), load_key(work / "release.key")
out = {}
for name, fmt, batch, policy in cases:
    dest = work / f"out-{Path(tree).name}-{Path(name).name}-{batch}.{fmt}"
    ledger = work / f"ledger-{Path(tree).name}-{len(out)}.sqlite3"
    pol = load_policy(policy) if policy else lp
    # each case a steward of its own (the nonce is reused on purpose), diagnostics kept apart
    private = Path(tempfile.mkdtemp(prefix="ldpt-identical-"))
    os.environ["LDPT_PRIVATE_DIR"] = str(private)
    r = privatize(work / name, pol, key, dest, batch_rows=batch, overwrite=True, nonce=sys.argv[4],
                  ledger_path=ledger if pol.policy.subject_key else None,
                  diagnostics_path=private / "diagnostics.json", manifest_path=work / "manifest.json")
    label = f"{Path(policy).name}: " if policy else ""
    out[f"{label}{Path(name).name} -> {fmt}, batch {batch}"] = r.manifest.extract.sha256
    dest.unlink()
print(json.dumps(out))
"""


def run_tree(tree: Path, work: Path) -> dict[str, str]:
    cases: list[tuple[str, str, int, str | None]] = [
        (name, fmt, b, None) for name, _, _, fmt, batches in CASES for b in batches]
    for policy in sorted(p for p in POLICIES.iterdir() if p.suffix in (".yaml", ".yml", ".json")):
        for name in ("demo.csv", "demo.parquet"):
            cases += [(name, fmt, b, str(policy)) for fmt in ("parquet", "csv") for b in POLICY_BATCHES]
    proc = subprocess.run([sys.executable, "-c", _CHILD, str(tree), str(work), json.dumps(cases), NONCE],
                          capture_output=True, text=True, cwd=work, env=dict(os.environ, LDPT_PRIVATE_DIR=str(work)))
    if proc.returncode != 0:
        raise SystemExit(f"privatize under {tree} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--baseline", default="HEAD", help="git revision to compare against (default HEAD)")
    ap.add_argument("--out-dir", type=Path, default=None, help="folder for inputs and extracts (default: temporary)")
    args = ap.parse_args()

    sys.path.insert(0, str(HERE))
    import synthetic

    with tempfile.TemporaryDirectory(prefix="ldpt-identical-") as tmp:
        work = args.out_dir or Path(tmp) / "work"
        work.mkdir(parents=True, exist_ok=True)
        base = Path(tmp) / "baseline"
        base.mkdir()
        archive = subprocess.run(["git", "-C", str(REPO), "archive", args.baseline, "ldptransform"],
                                 capture_output=True, check=True).stdout
        subprocess.run(["tar", "-x", "-C", str(base)], input=archive, check=True)
        synthetic.write_policy(work / "policy.yaml")
        synthetic.write_key(work / "release.key")
        for name, rows, chunk, _, _ in CASES:
            if not (work / name).exists():
                synthetic.write_input(work / name, rows, chunk_rows=chunk)
        shutil.copyfile(DEMO_CSV, work / "demo.csv")
        pq.write_table(pacsv.read_csv(DEMO_CSV), work / "demo.parquet", row_group_size=5_003)
        before = run_tree(base, work)
        after = run_tree(REPO, work)

    ok = True
    for case, digest in before.items():
        same = after.get(case) == digest
        ok &= same
        print(f"{'same' if same else 'DIFFERENT':>9}  {digest[:16]}  {case}")
    for label, results in (("baseline", before), ("working tree", after)):
        groups: dict[str, set[str]] = {}
        for case, digest in results.items():
            groups.setdefault(case.split(", batch")[0], set()).add(digest)
        bad = [g for g, ds in groups.items() if len(ds) != 1]
        ok &= not bad
        verdict = f"changes the extract for {', '.join(bad)}" if bad else "never changes the extract"
        print(f"{label}: batch size {verdict}")
    print("IDENTICAL" if ok else "MISMATCH")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
