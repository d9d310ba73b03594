"""Single-use nonces (release/nonces.py) and the paths every writer may use (outputs.py).

A nonce used twice under one key with other data or another policy is refused before anything
is written; a true reproduction (same input and policy) is allowed; the steward's re-derivation
in validate is neither refused by nor recorded in the nonce record.  No command writes over a
file it reads or a secret it knows, nor replaces a file without --overwrite; diagnostics never
go where partners' files go; private folders are private; one job writes a destination at a
time.  Every refusal: one paragraph naming the path, nothing written (exit 2; a reused nonce 4;
an existing output 5).
"""

from __future__ import annotations

import json
import os
import sqlite3
import stat
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from conftest import (
    FIXED_NONCE,
    assert_user_error,
    cli_env,
    listing,
    partials,
    sha256,
    survey_policy,
    write_fixed_key,
    write_policy,
)

STATE = "nonces.jsonl"
OTHER_NONCE = "0123456789abcdef0123456789abcdef"


def privatize_args(survey: dict[str, Path], out: Path, *extra: object, input: Path | None = None) -> list[object]:
    return ["privatize", input or survey["csv"], "--policy", survey["policy"], "--key", survey["key"], "--out", out,
            *extra]


def records(private_dir: Path) -> list[dict]:
    path = private_dir / STATE
    return [json.loads(line) for line in path.read_text().splitlines()] if path.exists() else []


def change_one_cell(csv: Path) -> None:
    df = pd.read_csv(csv, dtype=str, keep_default_na=False)
    df.loc[7, "role"] = "Management" if df.loc[7, "role"] != "Management" else "Laboratory"
    df.to_csv(csv, index=False)


def nothing_new(folder: Path, before: list[str]) -> None:
    assert listing(folder) == before, f"the folder changed: {before} -> {listing(folder)}"
    assert partials(folder) == []


# -- single-use nonces -----------------------------------------------------------------------

def test_an_automatic_nonce_is_recorded_with_the_digests(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    from ldptransform.keys import load_key
    from ldptransform.policy import load_policy

    out = survey["dir"] / "extract.parquet"
    res = ldpt(*privatize_args(survey, out))
    assert res.returncode == 0, res.stderr
    (rec,) = records(private_dir)
    manifest = json.loads(out.with_name("extract.manifest.json").read_text())
    assert rec["nonce"] == manifest["nonce"] and rec["key_fingerprint"] == manifest["key_fingerprint"]
    assert rec["key_fingerprint"] == load_key(survey["key"]).fingerprint()
    assert rec["input"] == {"kind": "file", "sha256": sha256(survey["csv"]), "bytes": survey["csv"].stat().st_size}
    assert rec["policy_sha256"] == manifest["policy_sha256"] == load_policy(survey["policy"]).policy.sha256()
    assert stat.S_IMODE((private_dir / STATE).stat().st_mode) == 0o600
    assert stat.S_IMODE(private_dir.stat().st_mode) == 0o700


@pytest.mark.parametrize("change", ["input", "policy"])
def test_a_nonce_reused_on_changed_data_or_policy_is_refused(change: str, survey: dict[str, Path], ldpt,
                                                             private_dir: Path) -> None:
    first = survey["dir"] / "night1.parquet"
    assert ldpt(*privatize_args(survey, first, "--nonce", FIXED_NONCE)).returncode == 0
    if change == "input":
        change_one_cell(survey["csv"])
    else:
        p = survey_policy()
        p["columns"]["site"]["epsilon"] = 0.5
        write_policy(survey["policy"], p)
    state = (private_dir / STATE).read_bytes()
    before, private_before = listing(survey["dir"]), listing(private_dir)
    res = ldpt(*privatize_args(survey, survey["dir"] / "night2.parquet", "--nonce", FIXED_NONCE))
    text = assert_user_error(res, ["--nonce", FIXED_NONCE, str(first), "Leave out --nonce",
                                   "different input data" if change == "input" else "a different policy"], code=4)
    assert "which cells changed" in text
    nothing_new(survey["dir"], before)
    assert listing(private_dir) == private_before and (private_dir / STATE).read_bytes() == state
    # with a fresh nonce the same release goes through
    assert ldpt(*privatize_args(survey, survey["dir"] / "night2.parquet")).returncode == 0
    assert len(records(private_dir)) == 2


def test_a_true_reproduction_is_allowed_and_recorded_once(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    a, b = survey["dir"] / "a.parquet", survey["dir"] / "b.parquet"
    assert ldpt(*privatize_args(survey, a, "--nonce", FIXED_NONCE)).returncode == 0
    res = ldpt(*privatize_args(survey, b, "--nonce", FIXED_NONCE))
    assert res.returncode == 0, res.stderr
    assert sha256(a) == sha256(b)
    assert len(records(private_dir)) == 1


def test_the_same_nonce_under_another_key_is_another_stream(survey: dict[str, Path], ldpt, tmp_path: Path,
                                                            private_dir: Path) -> None:
    assert ldpt(*privatize_args(survey, survey["dir"] / "a.parquet", "--nonce", FIXED_NONCE)).returncode == 0
    change_one_cell(survey["csv"])
    other = write_fixed_key(tmp_path / "other.key")
    other.write_text(other.read_text().replace(other.read_text().split()[-1], "ab" * 32))
    res = ldpt("privatize", survey["csv"], "--policy", survey["policy"], "--key", other, "--out",
               survey["dir"] / "b.parquet", "--nonce", FIXED_NONCE)
    assert res.returncode == 0, res.stderr
    assert len({r["key_fingerprint"] for r in records(private_dir)}) == 2


def test_a_dataset_input_is_digested_file_by_file(survey: dict[str, Path], ldpt, tmp_path: Path,
                                                  private_dir: Path) -> None:
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    table = pacsv.read_csv(survey["csv"])
    folder = tmp_path / "raw-dataset"
    folder.mkdir()
    pq.write_table(table.slice(0, 6000), folder / "b.parquet")
    pq.write_table(table.slice(6000), folder / "a.parquet")
    out = survey["dir"] / "ds.parquet"
    assert ldpt(*privatize_args(survey, out, "--nonce", FIXED_NONCE, input=folder)).returncode == 0
    (rec,) = records(private_dir)
    assert rec["input"]["kind"] == "dataset"
    assert [f[:2] for f in rec["input"]["files"]] == [["a.parquet", sha256(folder / "a.parquet")],
                                                      ["b.parquet", sha256(folder / "b.parquet")]]
    pq.write_table(table.slice(6000, 10), folder / "a.parquet")  # one part changed
    res = ldpt(*privatize_args(survey, survey["dir"] / "ds2.parquet", "--nonce", FIXED_NONCE, input=folder))
    assert_user_error(res, ["--nonce", "different input data"], code=4)


def test_a_nonce_of_a_dask_dataframe_release_is_never_reused(survey: dict[str, Path], ldpt,
                                                            private_dir: Path) -> None:
    """A dask DataFrame cannot be digested (recorded as such), so its nonce is never taken as a
    reproduction, even with the same policy and key."""
    from ldptransform.keys import load_key
    from ldptransform.policy import load_policy

    rec = {"nonce": FIXED_NONCE, "key_fingerprint": load_key(survey["key"]).fingerprint(),
           "input": {"kind": "dask-dataframe", "sha256": None},
           "policy_sha256": load_policy(survey["policy"]).policy.sha256(), "extract": "/srv/frame",
           "time_utc": "2026-01-01T00:00:00Z"}
    (private_dir / STATE).write_text(json.dumps(rec) + "\n")
    res = ldpt(*privatize_args(survey, survey["dir"] / "x.parquet", "--nonce", FIXED_NONCE))
    assert_user_error(res, ["--nonce", "dask DataFrame", "/srv/frame"], code=4)


def test_a_refused_release_records_no_nonce(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    p = survey_policy()
    p["columns"]["role"]["mechanism"] = "blur"
    write_policy(survey["policy"], p)
    assert_user_error(ldpt(*privatize_args(survey, survey["dir"] / "x.parquet", "--nonce", FIXED_NONCE)), ["role"])
    assert listing(private_dir) == []


def test_a_damaged_nonce_record_stops_releases(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    assert ldpt(*privatize_args(survey, survey["dir"] / "a.parquet")).returncode == 0
    path = private_dir / STATE
    path.write_text("not json\n" + path.read_text())
    before = listing(survey["dir"])
    assert_user_error(ldpt(*privatize_args(survey, survey["dir"] / "b.parquet")), [str(path), "line 1", "backup"])
    nothing_new(survey["dir"], before)


def test_an_unfinished_last_line_is_ignored_and_closed(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    assert ldpt(*privatize_args(survey, survey["dir"] / "a.parquet")).returncode == 0
    path = private_dir / STATE
    path.write_text(path.read_text() + '{"nonce": "ab')  # a crash while appending
    assert ldpt(*privatize_args(survey, survey["dir"] / "b.parquet")).returncode == 0
    lines = path.read_text().splitlines()
    assert len(lines) == 3 and lines[1] == '{"nonce": "ab'
    assert len(records_tolerant(path)) == 2


def records_tolerant(path: Path) -> list[dict]:
    out = []
    for line in path.read_text().splitlines():
        try:
            out.append(json.loads(line))
        except ValueError:
            pass
    return out


def test_a_reused_nonce_charges_no_ledger(tmp_path: Path, ldpt, private_dir: Path) -> None:
    key = write_fixed_key(tmp_path / "k.key")
    people = pd.DataFrame({"person": [f"p{i}" for i in range(200)], "colour": ["red", "blue"] * 100})
    raw = tmp_path / "in.csv"
    people.to_csv(raw, index=False)
    pol = write_policy(tmp_path / "p.yaml", {
        "budget": {"epsilon_per_row": 1.0, "lifetime_epsilon": 10.0}, "subject_key": "person",
        "columns": {"person": {"type": "drop"},
                    "colour": {"type": "categorical", "categories": ["red", "blue"], "epsilon": 1.0}}})
    led = tmp_path / "ledger.sqlite3"
    args = ["privatize", raw, "--policy", pol, "--key", key, "--ledger", led, "--nonce", FIXED_NONCE]
    assert ldpt(*args, "--out", tmp_path / "a.parquet").returncode == 0
    people.loc[3, "colour"] = "red" if people.loc[3, "colour"] == "blue" else "blue"
    people.to_csv(raw, index=False)
    assert_user_error(ldpt(*args, "--out", tmp_path / "b.parquet"), ["--nonce"], code=4)
    assert sqlite3.connect(led).execute("SELECT COUNT(*) FROM releases").fetchone()[0] == 1
    assert not (tmp_path / "b.parquet").exists()


def test_validate_rederives_outside_the_record_and_in_a_private_folder(survey: dict[str, Path], ldpt,
                                                                      private_dir: Path) -> None:
    out = survey["dir"] / "extract.parquet"
    assert ldpt(*privatize_args(survey, out, "--nonce", FIXED_NONCE)).returncode == 0
    state = (private_dir / STATE).read_bytes()
    before, private_before = listing(survey["dir"]), listing(private_dir)
    res = ldpt("validate", out, "--raw", survey["csv"], "--key", survey["key"], "--format", "json")
    assert res.returncode == 0, res.stdout + res.stderr
    assert {c["check"]: c["status"] for c in json.loads(res.stdout)["checks"]}["reproduced"] == "pass"
    assert (private_dir / STATE).read_bytes() == state  # not recorded
    assert listing(survey["dir"]) == before and listing(private_dir) == private_before  # the folder is gone
    # other raw data under the release's nonce: the re-derivation is not refused (it is no release),
    # it simply does not reproduce
    change_one_cell(survey["csv"])
    res = ldpt("validate", out, "--raw", survey["csv"], "--key", survey["key"], "--format", "json")
    assert res.returncode == 1, res.stdout + res.stderr
    assert {c["check"]: c["status"] for c in json.loads(res.stdout)["checks"]}["reproduced"] == "fail"
    assert (private_dir / STATE).read_bytes() == state
    assert listing(survey["dir"]) == before and listing(private_dir) == private_before


def test_validate_writes_only_into_a_fresh_private_folder(survey: dict[str, Path], private_dir: Path,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """The re-derivation's own release goes into a folder of mode 0700 inside the private folder,
    never beside the extract, and with no nonce record."""
    from ldptransform import validate
    from ldptransform.keys import load_key
    from ldptransform.policy import load_policy
    from ldptransform.release import privatize

    out = survey["dir"] / "extract.parquet"
    key = load_key(survey["key"])
    privatize(survey["csv"], load_policy(survey["policy"]), key, out)
    seen: list[Path] = []
    module = sys.modules["ldptransform.validate"]
    real = module.privatize

    def spy(*args, **kw):
        seen.append(Path(args[3]))
        res = real(*args, **kw)
        folder = Path(args[3]).parent.parent
        assert stat.S_IMODE(folder.stat().st_mode) == 0o700 and folder.parent == private_dir
        assert records(private_dir)[-1]["extract"] == str(out)  # the re-derivation recorded nothing
        return res

    monkeypatch.setattr(module, "privatize", spy)
    rep = validate(out, raw=survey["csv"], key=key)
    assert rep.ok and len(seen) == 1 and not seen[0].exists()
    assert len(records(private_dir)) == 1


def test_validate_does_not_charge_the_stewards_ledger(tmp_path: Path, private_dir: Path) -> None:
    from ldptransform import validate
    from ldptransform.keys import load_key
    from ldptransform.ledger import Ledger
    from ldptransform.policy import parse_policy
    from ldptransform.release import privatize

    key = load_key(write_fixed_key(tmp_path / "k.key"))
    raw = tmp_path / "in.csv"
    pd.DataFrame({"person": [f"p{i}" for i in range(300)], "colour": ["red", "blue", "red"] * 100}).to_csv(
        raw, index=False)
    lp = parse_policy({"budget": {"epsilon_per_row": 1.0, "lifetime_epsilon": 10.0}, "subject_key": "person",
                       "columns": {"person": {"type": "drop"},
                                   "colour": {"type": "categorical", "categories": ["red", "blue"],
                                              "epsilon": 1.0}}}, "p.yaml")
    pub = tmp_path / "pub"
    pub.mkdir()
    res = privatize(raw, lp, key, pub / "x.parquet")
    assert res.ledger_path == private_dir / "ledger.sqlite3"
    rep = validate(pub / "x.parquet", raw=raw, key=key)
    assert rep.ok, [c for c in rep.checks if c.ok is False]
    with Ledger.open(private_dir / "ledger.sqlite3", create=False) as led:
        assert led.verify().releases == 1


# -- diagnostics and private folders ---------------------------------------------------------

def test_diagnostics_never_go_where_partners_files_go(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    out = survey["dir"] / "extract.csv"
    public = survey["dir"] / "public"
    public.mkdir()
    before = listing(survey["dir"])
    cases = [
        (["--diagnostics", out], ["extract.csv", "destroy"]),  # the issue's --out x.csv --diagnostics x.csv
        (["--diagnostics", survey["dir"] / "d.json"], ["d.json", "partners", "--diagnostics"]),
        (["--manifest", public / "m.json", "--diagnostics", public / "d.json"], ["d.json", "partners"]),
    ]
    for extra, names in cases:
        assert_user_error(ldpt(*privatize_args(survey, out, *extra)), names)
        nothing_new(survey["dir"], before)
        assert listing(public) == [] and listing(private_dir) == []


def test_diagnostics_inside_a_dataset_extract_are_refused(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    out = survey["dir"] / "parts"
    assert ldpt(*privatize_args(survey, out)).returncode == 0
    before = listing(out)
    res = ldpt(*privatize_args(survey, out, "--overwrite", "--diagnostics", out / "d.json"))
    assert_user_error(res, ["d.json", "parts"])
    assert listing(out) == before


def test_a_private_folder_open_to_others_is_refused(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    private_dir.chmod(0o755)
    try:
        before = listing(survey["dir"])
        res = ldpt(*privatize_args(survey, survey["dir"] / "extract.parquet"))
        assert_user_error(res, [str(private_dir), "chmod 700", "0755"])
        nothing_new(survey["dir"], before)
        assert listing(private_dir) == []
    finally:
        private_dir.chmod(0o700)


def test_a_missing_private_folder_is_created_private(survey: dict[str, Path], tmp_path: Path) -> None:
    from conftest import run_cli

    folder = tmp_path / "state" / "ldpt"
    res = run_cli(*privatize_args(survey, survey["dir"] / "extract.parquet"), private=folder)
    assert res.returncode == 0, res.stderr
    assert stat.S_IMODE(folder.stat().st_mode) == 0o700 and STATE in listing(folder)


# -- no writer replaces what it reads, nor anything without --overwrite ------------------------

def test_manifest_over_the_key_is_refused_even_without_overwrite(survey: dict[str, Path], ldpt, key_hex: str) -> None:
    key_bytes = survey["key"].read_bytes()
    res = ldpt(*privatize_args(survey, survey["dir"] / "e.parquet", "--manifest", survey["key"]))
    assert_user_error(res, [survey["key"].name, "key file", "destroy"], forbidden=[key_hex])
    assert survey["key"].read_bytes() == key_bytes


def test_estimate_out_never_replaces_what_it_reads_nor_a_file_without_overwrite(
        survey: dict[str, Path], ldpt, key_hex: str) -> None:
    out = survey["dir"] / "extract.parquet"
    manifest = survey["dir"] / "extract.manifest.json"
    assert ldpt(*privatize_args(survey, out)).returncode == 0
    kept = {p: sha256(p) for p in (out, manifest, survey["key"])}
    # a file that exists: not without --overwrite (the issue: estimate --out KEYFILE), and a secret
    # key or a ledger never, even with it
    res = ldpt("estimate", out, "--format", "json", "--out", survey["key"])
    assert_user_error(res, [survey["key"].name, "--overwrite"], forbidden=[key_hex], code=5)
    res = ldpt("estimate", out, "--format", "json", "--out", survey["key"], "--overwrite")
    assert_user_error(res, [survey["key"].name, "secret key"], forbidden=[key_hex])
    # what estimate reads: never, even with --overwrite (also through a symlink)
    link = survey["dir"] / "innocent.json"
    link.symlink_to(manifest)
    for target, role in ((out, "extract"), (manifest, "manifest"), (link, "manifest")):
        res = ldpt("estimate", out, "--format", "json", "--out", target, "--overwrite")
        assert_user_error(res, [target.name, role, "destroy"])
    assert {p: sha256(p) for p in kept} == kept
    # an ordinary file: replaced with --overwrite only
    est = survey["dir"] / "estimates.json"
    est.write_text("old\n")
    assert_user_error(ldpt("estimate", out, "--format", "json", "--out", est), ["estimates.json", "--overwrite"],
                      code=5)
    assert est.read_text() == "old\n"
    res = ldpt("estimate", out, "--format", "json", "--out", est, "--overwrite")
    assert res.returncode == 0, res.stderr
    assert json.loads(est.read_text())["rows"] == 12000
    assert [n for n in listing(survey["dir"]) if "ldpt-lock" in n] == []


def test_estimate_out_inside_a_dataset_extract_is_refused(survey: dict[str, Path], ldpt) -> None:
    out = survey["dir"] / "parts"
    assert ldpt(*privatize_args(survey, out)).returncode == 0
    before = listing(out)
    assert_user_error(ldpt("estimate", out, "--out", out / "e.json"), ["e.json", "parts"])
    assert listing(out) == before


def test_demo_needs_overwrite_to_run_again(tmp_path: Path, ldpt) -> None:
    folder = tmp_path / "demo"
    assert ldpt("demo", "--dir", folder).returncode == 0
    key = folder / "steward-private" / "demo.key"
    kept = {p: sha256(p) for p in folder.rglob("*") if p.is_file()}
    res = ldpt("demo", "--dir", folder)
    assert_user_error(res, ["--overwrite", "staff_survey"], code=5)
    assert {p: sha256(p) for p in folder.rglob("*") if p.is_file()} == kept
    res = ldpt("demo", "--dir", folder, "--overwrite")
    assert res.returncode == 0, res.stderr
    assert sha256(key) == kept[key]  # the key is kept, never replaced
    (folder / "steward-private").chmod(0o755)
    assert_user_error(ldpt("demo", "--dir", folder, "--overwrite"), ["steward-private", "chmod 700"])


# -- one writer per destination ----------------------------------------------------------------

_HOLD = """
import sys
from pathlib import Path
from ldptransform.outputs import DestinationLock
with DestinationLock([("output", Path(sys.argv[1]))]):
    print("held", flush=True)
    sys.stdin.read()
"""


def test_a_second_job_on_the_same_destination_exits_2_and_changes_nothing(survey: dict[str, Path], ldpt_process,
                                                                         tmp_path: Path, private_dir: Path) -> None:
    """Another process holds the destination (as a running release does): a release aimed at it
    stops with exit 2 before anything is written and charges no ledger; once the first lets go,
    the release runs and leaves no lock file behind."""
    key = write_fixed_key(tmp_path / "k.key")
    raw = tmp_path / "in.csv"
    pd.DataFrame({"person": [f"p{i}" for i in range(300)], "colour": ["red", "blue", "red"] * 100}).to_csv(
        raw, index=False)
    pol = write_policy(tmp_path / "p.yaml", {
        "budget": {"epsilon_per_row": 1.0, "lifetime_epsilon": 10.0}, "subject_key": "person",
        "columns": {"person": {"type": "drop"},
                    "colour": {"type": "categorical", "categories": ["red", "blue"], "epsilon": 1.0}}})
    pub = tmp_path / "pub"
    pub.mkdir()
    out, led = pub / "x.parquet", tmp_path / "ledger.sqlite3"
    holder = subprocess.Popen([sys.executable, "-c", _HOLD, str(out)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True, env=cli_env(private_dir))
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        before = listing(pub)
        res = ldpt_process("privatize", raw, "--policy", pol, "--key", key, "--out", out, "--ledger", led)
        assert_user_error(res, [str(out), "another job"], code=6)
        assert listing(pub) == before and not led.exists() and listing(private_dir) == []
    finally:
        assert holder.stdin is not None
        holder.stdin.close()
        holder.wait(timeout=30)
    res = ldpt_process("privatize", raw, "--policy", pol, "--key", key, "--out", out, "--ledger", led)
    assert res.returncode == 0, res.stderr
    assert sorted(listing(pub)) == ["x.manifest.json", "x.parquet"]


def test_two_jobs_at_once_on_one_destination(survey: dict[str, Path], tmp_path: Path, private_dir: Path) -> None:
    """Two real releases started together on the same OUT (--overwrite, so only the lock can stop
    one): exactly one publishes unless they do not overlap at all; a refused one says why."""
    import numpy as np

    df = pd.read_csv(survey["csv"], dtype=str, keep_default_na=False)
    big = tmp_path / "big.csv"
    pd.concat([df] * 25, ignore_index=True).to_csv(big, index=False)  # 300,000 rows: a second or two
    out = survey["dir"] / "extract.parquet"

    def start() -> subprocess.Popen:
        return subprocess.Popen([sys.executable, "-m", "ldptransform", *map(str, privatize_args(
            survey, out, "--overwrite", "--quiet", input=big))], env=cli_env(private_dir),
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, stdin=subprocess.DEVNULL)

    jobs = [start(), start()]
    done = [(j.wait(timeout=300), j.stderr.read() if j.stderr else "") for j in jobs]
    codes = sorted(c for c, _ in done)
    assert codes in ([0, 0], [0, 6]), done  # 6: the environment (another job holds the destination)
    for code, err in done:
        if code == 6:
            assert "another job" in err and "Traceback" not in err
    manifest = json.loads(out.with_name("extract.manifest.json").read_text())
    assert manifest["extract"]["sha256"] == sha256(out)  # extract and manifest of one and the same job
    assert np.sum([c == 0 for c, _ in done]) == len(records(private_dir))
    assert [n for n in listing(survey["dir"]) if "ldpt-lock" in n or "ldpt-partial" in n] == []


def test_the_lock_is_free_again_after_a_refused_release(survey: dict[str, Path], ldpt) -> None:
    out = survey["dir"] / "extract.parquet"
    assert ldpt(*privatize_args(survey, out)).returncode == 0
    assert_user_error(ldpt(*privatize_args(survey, out)), ["extract.parquet", "--overwrite"], code=5)
    assert ldpt(*privatize_args(survey, out, "--overwrite")).returncode == 0
    assert [n for n in listing(survey["dir"]) if "ldpt-lock" in n] == []
    assert os.path.exists(out)
