"""The command line end to end: keys, privatize (formats, overwrite, manifest path),
estimate (json/csv/table, --out), validate (good and tampered releases), policy
schema/check, the demo, quiet/non-terminal output, bit-for-bit reproduction, and
interruption (SIGTERM, SIGINT, SIGKILL) leaving nothing at the destination.

Most tests run `ldpt` in this process through typer's CliRunner (the ``ldpt`` fixture);
the ones that need a real process use ``ldpt_process`` or start their own: output to a
real pipe and a terminal, signals and SIGKILL.
"""

from __future__ import annotations

import csv
import io
import json
import os
import pty
import re
import shutil
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path
from statistics import NormalDist
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from conftest import (FIXED_NONCE, write_fixed_key, DEMO_CSV, DEMO_POLICY, ROLES, SITES, cli_env, listing, partials,
                      run_cli, sha256, survey_policy, write_policy)

MISSING, OTHER = "<missing>", "<other>"
TENURE_EDGES = [0, 2, 5, 10, 20, 45]
TENURE_LABELS = ["[0, 2)", "[2, 5)", "[5, 10)", "[10, 20)", "[20, 45]"]
PRIVATIZED = ["site", "role", "pay", "weekly_hours", "tenure_years", "satisfaction", "would_recommend"]
EXTRACT_COLUMNS = [*PRIVATIZED, "survey_wave"]


def read_table(path: Path) -> pa.Table:
    path = Path(path)
    if path.suffix == ".parquet":
        return pq.read_table(path)
    return pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
        column_types={c: pa.string() for c in ["site", "role", "tenure_years", "satisfaction", "would_recommend",
                                                "survey_wave"]}))


def manifest_of(out: Path) -> dict[str, Any]:
    return json.loads(out.with_name(out.stem + ".manifest.json").read_text())


def privatize(ldpt, survey: dict[str, Path], out: Path, *extra: Any, input: Path | None = None,
              policy: Path | None = None) -> subprocess.CompletedProcess:
    res = ldpt("privatize", input or survey["csv"], "--policy", policy or survey["policy"], "--key", survey["key"],
               "--out", out, *extra)
    return res


def ok(res: subprocess.CompletedProcess) -> subprocess.CompletedProcess:
    assert res.returncode == 0, f"exit {res.returncode}\nstdout:\n{res.stdout}\nstderr:\n{res.stderr}"
    assert "Traceback" not in res.stderr
    return res


# -- keys ---------------------------------------------------------------------------------------

def test_key_new_writes_a_private_key_and_never_overwrites(tmp_path: Path, ldpt) -> None:
    path = tmp_path / "steward" / "release.key"
    path.parent.mkdir()
    res = ok(ldpt("key", "new", path))
    assert stat.S_IMODE(path.stat().st_mode) == 0o600
    lines = path.read_text(encoding="ascii").splitlines()
    assert len(lines) == 2 and re.fullmatch(r"[0-9a-f]{64}", lines[1])
    assert lines[1] not in res.stderr + res.stdout  # the key itself is never printed
    assert str(path) in res.stderr

    before = path.read_bytes()
    again = ldpt("key", "new", path)
    assert again.returncode == 2 and "Traceback" not in again.stderr
    assert "release.key" in again.stderr and "\n\n" not in again.stderr.strip()
    assert path.read_bytes() == before
    assert lines[1] not in again.stderr

    other = tmp_path / "steward" / "second.key"
    ok(ldpt("key", "new", other))
    assert other.read_bytes() != before  # fresh randomness each time


def test_key_new_in_a_missing_folder(tmp_path: Path, ldpt) -> None:
    res = ldpt("key", "new", tmp_path / "nowhere" / "release.key")
    assert res.returncode == 2 and "nowhere" in res.stderr and "Traceback" not in res.stderr
    assert listing(tmp_path) == []


# -- privatize ----------------------------------------------------------------------------------

def _parquet_input(survey: dict[str, Path]) -> Path:
    path = survey["dir"] / "staff_survey.parquet"
    pq.write_table(pacsv.read_csv(survey["csv"]), path)
    return path


@pytest.mark.parametrize("fmt_in,fmt_out", [("csv", "parquet"), ("csv", "csv"), ("parquet", "parquet"),
                                            ("parquet", "csv")])
def test_privatize_formats(fmt_in: str, fmt_out: str, survey: dict[str, Path], ldpt, private_dir: Path,
                           key_hex: str) -> None:
    from ldptransform.keys import load_key

    src = survey["csv"] if fmt_in == "csv" else _parquet_input(survey)
    src_hash = sha256(src)
    out = survey["dir"] / f"extract.{fmt_out}"
    res = ok(privatize(ldpt, survey, out, input=src))
    assert res.stdout == ""
    assert sha256(src) == src_hash

    mpath = survey["dir"] / "extract.manifest.json"  # the default: OUT with .manifest.json
    assert out.exists() and mpath.exists()
    assert partials(survey["dir"]) == []
    m = json.loads(mpath.read_text())
    raw = pd.read_csv(DEMO_CSV)
    assert m["rows"] == len(raw)
    assert m["extract"]["file"] == out.name and m["extract"]["format"] == fmt_out
    assert m["extract"]["sha256"] == sha256(out) and m["extract"]["bytes"] == out.stat().st_size
    assert m["key_fingerprint"] == load_key(survey["key"]).fingerprint()
    assert key_hex not in mpath.read_text()
    assert m["privacy"]["epsilon_per_row_used"] == pytest.approx(7.0)
    assert m["privacy"]["public_columns"] == ["survey_wave"]

    t = read_table(out)
    assert t.column_names == m["extract"]["columns"] == EXTRACT_COLUMNS  # staff_id dropped
    assert t.num_rows == len(raw)
    col = {n: t.column(n).to_pylist() for n in ("site", "role", "tenure_years", "satisfaction",
                                                 "would_recommend", "survey_wave")}
    assert set(col["role"]) <= set(ROLES) and len(set(col["role"])) == len(ROLES)
    # site is left to `mechanism: auto`: whatever it picked, every report is one its channel can
    # produce over the declared sites plus <other>
    from ldptransform.mechanisms import FrequencyOracle, build

    site_spec = next(c for c in m["columns"] if c["name"] == "site")["mechanism"]
    site_mech = build(site_spec)
    assert isinstance(site_mech, FrequencyOracle) and site_mech.categories == SITES + [OTHER]
    assert site_mech.count_invalid([t.column("site").combine_chunks()]) == 0
    assert set(col["tenure_years"]) <= set(TENURE_LABELS)
    assert set(col["would_recommend"]) <= {"yes", "no"}
    assert col["survey_wave"] == raw["survey_wave"].tolist()  # public: copied as is
    # randomized, not copied: the reported role differs from the true one in many rows
    assert np.mean(np.array(col["role"]) != raw["role"].to_numpy()) > 0.2

    diags = [n for n in listing(private_dir) if n != "nonces.jsonl"]  # and the record of release nonces
    assert len(diags) == 1 and "PRIVATE" in diags[0]
    assert stat.S_IMODE((private_dir / "nonces.jsonl").stat().st_mode) == 0o600
    assert stat.S_IMODE((private_dir / diags[0]).stat().st_mode) == 0o600
    assert str(private_dir / diags[0]) in res.stderr


def test_privatize_manifest_option_and_diagnostics_option(survey: dict[str, Path], ldpt, private_dir: Path) -> None:
    out = survey["dir"] / "extract.parquet"
    mpath = survey["dir"] / "public" / "release-2026.json"
    mpath.parent.mkdir()
    diag = survey["dir"] / "steward" / "steward.json"  # never in the folder of the extract or the manifest
    diag.parent.mkdir(mode=0o700)
    ok(privatize(ldpt, survey, out, "--manifest", mpath, "--diagnostics", diag))
    assert mpath.exists() and diag.exists()
    assert not (survey["dir"] / "extract.manifest.json").exists()
    assert listing(private_dir) == ["nonces.jsonl"]  # only the record of release nonces
    assert json.loads(mpath.read_text())["extract"]["sha256"] == sha256(out)
    ok(ldpt("validate", out, "--manifest", mpath))


def test_privatize_overwrite_replaces_extract_and_manifest(survey: dict[str, Path], ldpt) -> None:
    out = survey["dir"] / "extract.parquet"
    ok(privatize(ldpt, survey, out))
    first, m1 = sha256(out), manifest_of(out)
    assert privatize(ldpt, survey, out).returncode == 5  # the output exists
    assert sha256(out) == first
    ok(privatize(ldpt, survey, out, "--overwrite"))
    m2 = manifest_of(out)
    assert m2["nonce"] != m1["nonce"]
    assert sha256(out) != first
    assert m2["extract"]["sha256"] == sha256(out)
    assert partials(survey["dir"]) == []
    ok(ldpt("validate", out))


def test_non_terminal_run_prints_only_the_summary_line(survey: dict[str, Path], ldpt_process) -> None:
    """A real process writing to pipes (not terminals): only the summary line, no escapes."""
    for i, extra in enumerate(([], ["--quiet"], ["-q"])):
        out = survey["dir"] / f"extract{i}.csv"
        res = ok(privatize(ldpt_process, survey, out, "--batch-rows", "500", *extra))
        assert res.stdout == ""
        lines = [line for line in res.stderr.splitlines() if not line.startswith("WARNING: ")]  # data warnings
        assert len(lines) == 1, res.stderr
        assert lines[0].startswith("privatized 12000 rows into ") and str(out) in lines[0]
        assert "survey_wave" in lines[0]  # the caution about the public column
        assert "\x1b" not in res.stderr and "\r" not in res.stderr


def test_summary_names_paths_verbatim(survey: dict[str, Path], ldpt) -> None:
    out = survey["dir"] / "extract[v2].parquet"
    res = ok(privatize(ldpt, survey, out))
    assert str(out) in res.stderr and "extract[v2].manifest.json" in res.stderr


_ANSI = re.compile(r"\x1b\[[0-9;?]*[ -/]*[@-~]|\x1b[()][0-9A-Za-z]|\x1b[=>]")


def _run_with_terminal_stderr(args: list[str | Path], private: Path) -> tuple[int, str, str]:
    env = cli_env(private)
    env["TERM"] = "xterm-256color"
    env["COLUMNS"] = "120"
    master, slave = pty.openpty()
    p = subprocess.Popen([sys.executable, "-m", "ldptransform", *map(str, args)], stdin=subprocess.DEVNULL,
                         stdout=subprocess.PIPE, stderr=slave, env=env)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # EIO: the child closed its end
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    assert p.stdout is not None
    stdout = p.stdout.read().decode()
    p.wait(timeout=120)
    return p.returncode, stdout, b"".join(chunks).decode(errors="replace")


def test_quiet_on_a_terminal_prints_only_the_summary(survey: dict[str, Path], private_dir: Path) -> None:
    base: list[str | Path] = ["privatize", survey["csv"], "--policy", survey["policy"], "--key", survey["key"],
                              "--batch-rows", "200"]
    # without --quiet a terminal gets the progress bar (so the check below can see one)
    code, stdout, err = _run_with_terminal_stderr([*base, "--out", survey["dir"] / "a.parquet"], private_dir)
    assert code == 0 and stdout == ""
    assert "privatizing" in err

    code, stdout, err = _run_with_terminal_stderr([*base, "--out", survey["dir"] / "b.parquet", "--quiet"],
                                                  private_dir)
    assert code == 0 and stdout == ""
    assert "privatizing" not in err
    text = _ANSI.sub("", err).replace("\r\n", "\n").strip()
    text = "\n".join(line for line in text.splitlines() if not line.startswith("WARNING: "))  # data warnings
    assert len(text.splitlines()) == 1, repr(err)
    assert text.startswith("privatized 12000 rows into ")


# -- estimate -----------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def _one_release(tmp_path_factory: pytest.TempPathFactory, key_file: Path) -> Path:
    """One CSV release of the survey, made once per module (tests get copies)."""
    folder = tmp_path_factory.mktemp("one-release")
    policy = write_policy(folder / "survey_policy.yaml", survey_policy())
    ok(run_cli("privatize", DEMO_CSV, "--policy", policy, "--key", key_file, "--out", folder / "extract.csv",
               "--nonce", FIXED_NONCE, private=tmp_path_factory.mktemp("one-release-private")))
    return folder


@pytest.fixture
def released(survey: dict[str, Path], _one_release: Path) -> dict[str, Path]:
    """The survey privatized into a CSV extract (easy to tamper with) with its manifest."""
    out = survey["dir"] / "extract.csv"
    manifest = survey["dir"] / "extract.manifest.json"
    shutil.copyfile(_one_release / out.name, out)
    shutil.copyfile(_one_release / manifest.name, manifest)
    return {**survey, "out": out, "manifest": manifest}


def true_values(raw: pd.DataFrame) -> dict[str, Any]:
    """What the tests' policy makes of the raw survey, computed independently of the tool."""
    site = raw["site"].where(raw["site"].isin(SITES), OTHER)
    sat = raw["satisfaction"].map(lambda v: MISSING if pd.isna(v) else str(int(v)))
    tenure = np.clip(np.searchsorted(TENURE_EDGES, raw["tenure_years"].to_numpy(), side="right") - 1, 0, 4)

    def freqs(series: pd.Series, labels: list[str]) -> list[float]:
        return [float((series == label).mean()) for label in labels]

    return {
        "site": freqs(site, [*SITES, OTHER]),
        "role": freqs(raw["role"], ROLES),
        "tenure_years": freqs(pd.Series(np.array(TENURE_LABELS)[tenure]), TENURE_LABELS),
        "satisfaction": freqs(sat, ["1", "2", "3", "4", "5", MISSING]),
        "would_recommend": freqs(raw["would_recommend"], ["yes", "no"]),
        "pay": float(raw["pay"].clip(24000, 140000).mean()),
        "weekly_hours": float(raw["weekly_hours"].fillna(37.5).clip(0, 70).mean()),
    }


# The documented shape of `estimate --format json`; the tool also adds a few informative
# keys, listed here so that any other addition or removal is noticed.
DOC_TOP, EXTRA_TOP = {"rows", "confidence", "columns"}, {"se_method", "public_columns"}
DOC_COL = {"type", "mechanism", "epsilon"}
EXTRA_CAT, EXTRA_NUM = {"consistent_method", "distribution", "estimand"}, {"bounds", "distribution", "estimand"}
DOC_FREQ, EXTRA_FREQ = {"value", "estimate", "se", "ci_low", "ci_high"}, {"count_estimate", "consistent"}
DOC_MEAN = {"estimate", "se", "ci_low", "ci_high"}


def _check_interval(stat: dict[str, Any], z: float) -> None:
    for k in ("estimate", "se", "ci_low", "ci_high"):
        assert isinstance(stat[k], float) and np.isfinite(stat[k])
    assert stat["se"] > 0
    assert stat["ci_low"] == pytest.approx(stat["estimate"] - z * stat["se"], rel=1e-12, abs=1e-12)
    assert stat["ci_high"] == pytest.approx(stat["estimate"] + z * stat["se"], rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("confidence", [None, 0.9])
def test_estimate_json_shape_and_values(confidence: float | None, released: dict[str, Path], ldpt) -> None:
    args = ["estimate", released["out"], "--format", "json"]
    if confidence is not None:
        args += ["--confidence", str(confidence)]
    res = ok(ldpt(*args))
    result = json.loads(res.stdout)
    level = 0.95 if confidence is None else confidence
    z = NormalDist().inv_cdf(0.5 + level / 2)
    truth = true_values(pd.read_csv(DEMO_CSV))

    assert DOC_TOP <= set(result) <= DOC_TOP | EXTRA_TOP
    assert result["rows"] == 12000 and isinstance(result["rows"], int)
    assert result["confidence"] == level
    assert list(result["columns"]) == PRIVATIZED  # not the dropped or the public column
    spent = 0.0
    for name, col in result["columns"].items():
        numeric = name in ("pay", "weekly_hours")
        assert DOC_COL <= set(col)
        assert set(col) - DOC_COL <= ({"mean"} | EXTRA_NUM if numeric else {"frequencies"} | EXTRA_CAT)
        assert isinstance(col["mechanism"], str) and isinstance(col["epsilon"], float)
        spent += col["epsilon"]
        if numeric:
            assert col["type"] == "numeric" and "frequencies" not in col
            assert set(col["mean"]) == DOC_MEAN
            _check_interval(col["mean"], z)
            assert abs(col["mean"]["estimate"] - truth[name]) <= 6 * col["mean"]["se"]
        else:
            assert col["type"] == ("binned" if name == "tenure_years" else "categorical") and "mean" not in col
            freqs = col["frequencies"]
            assert isinstance(freqs, list) and len(freqs) == len(truth[name])
            for f, t in zip(freqs, truth[name]):
                assert DOC_FREQ <= set(f) <= DOC_FREQ | EXTRA_FREQ
                assert isinstance(f["value"], str)
                _check_interval(f, z)
                assert abs(f["estimate"] - t) <= 6 * f["se"], (name, f, t)
            assert sum(f["estimate"] for f in freqs) == pytest.approx(1.0, abs=1e-9)
    assert [f["value"] for f in result["columns"]["site"]["frequencies"]] == [*SITES, OTHER]
    assert [f["value"] for f in result["columns"]["satisfaction"]["frequencies"]] == ["1", "2", "3", "4", "5",
                                                                                      MISSING]
    assert [f["value"] for f in result["columns"]["tenure_years"]["frequencies"]] == TENURE_LABELS
    assert result["columns"]["role"]["mechanism"] == "grr" and result["columns"]["pay"]["mechanism"] == "hybrid"
    assert spent == pytest.approx(7.0)


def test_estimate_csv_matches_json(released: dict[str, Path], ldpt) -> None:
    result = json.loads(ok(ldpt("estimate", released["out"], "--format", "json")).stdout)
    text = ok(ldpt("estimate", released["out"], "--format", "csv")).stdout
    rows = list(csv.DictReader(io.StringIO(text)))
    assert rows and {"column", "statistic", "value", "estimate", "se", "ci_low", "ci_high"} <= set(rows[0])
    expected = []
    for name, col in result["columns"].items():
        if "frequencies" in col:
            expected += [(name, "frequency", f["value"], f["estimate"], f["se"], f["ci_low"], f["ci_high"])
                         for f in col["frequencies"]]
        else:
            m = col["mean"]
            expected.append((name, "mean", "", m["estimate"], m["se"], m["ci_low"], m["ci_high"]))
        for q in col.get("distribution", {}).get("quantiles", []):
            expected.append((name, "quantile", repr(q["q"]), q["estimate"], q["se"], q["ci_low"], q["ci_high"]))

    def num(v: str) -> float | None:
        return None if v == "" else float(v)

    got = [(r["column"], r["statistic"], r["value"], num(r["estimate"]), num(r["se"]), num(r["ci_low"]),
            num(r["ci_high"])) for r in rows if r["statistic"] in ("frequency", "mean", "quantile")]
    assert got == expected  # the CSV's other rows (descriptors, histograms, CDFs): tests/test_frames.py


@pytest.mark.parametrize("fmt", ["json", "csv", "table"])
def test_estimate_out_writes_the_file_not_stdout(fmt: str, released: dict[str, Path], ldpt) -> None:
    dest = released["dir"] / f"estimates.{fmt}"
    res = ok(ldpt("estimate", released["out"], "--format", fmt, "--out", dest))
    assert res.stdout == ""
    assert dest.exists() and partials(released["dir"]) == []
    text = dest.read_text()
    if fmt == "json":
        assert json.loads(text) == json.loads(ok(ldpt("estimate", released["out"], "--format", "json")).stdout)
    elif fmt == "csv":
        assert text == ok(ldpt("estimate", released["out"], "--format", "csv")).stdout
    else:
        for name in PRIVATIZED:
            assert name in text
        assert "\x1b" not in text


def test_estimate_with_manifest_elsewhere(released: dict[str, Path], ldpt) -> None:
    moved = released["dir"] / "elsewhere.json"
    released["manifest"].rename(moved)
    res = ldpt("estimate", released["out"], "--format", "json")
    assert res.returncode == 2 and "extract.manifest.json" in res.stderr and "Traceback" not in res.stderr
    assert json.loads(ok(ldpt("estimate", released["out"], "--manifest", moved, "--format", "json")).stdout)["rows"] \
        == 12000


# -- validate -----------------------------------------------------------------------------------

def _checks(res: subprocess.CompletedProcess) -> dict[str, dict[str, str]]:
    data = json.loads(res.stdout)
    return {c["check"]: c for c in data["checks"]}


def test_validate_good_release(released: dict[str, Path], ldpt) -> None:
    res = ok(ldpt("validate", released["out"], "--format", "json"))
    data = json.loads(res.stdout)
    assert data["ok"] is True
    checks = _checks(res)
    assert {"extract hash", "privacy budget", "no key material", "row count", "output alphabet"} <= set(checks)
    assert all(c["status"] != "fail" for c in checks.values())
    table = ok(ldpt("validate", released["out"]))
    assert "all checks passed" in table.stdout


def test_validate_good_release_with_raw_and_key(released: dict[str, Path], ldpt) -> None:
    res = ok(ldpt("validate", released["out"], "--raw", released["csv"], "--key", released["key"],
                  "--format", "json"))
    checks = _checks(res)
    assert checks["reproduced"]["status"] == "pass"
    assert checks["key matches"]["status"] == "pass"
    assert checks["calibration"]["status"] == "pass"


def _tamper_value(out: Path, old_to_new: Any) -> None:
    """Rewrite the role of the first data row of a CSV extract, leaving every other byte alone."""
    lines = out.read_bytes().split(b"\n")
    header = next(csv.reader([lines[0].decode()]))
    row = next(csv.reader([lines[1].decode()]))
    old = row[header.index("role")]
    new = old_to_new(old)
    assert lines[1].count(f'"{old}"'.encode()) == 1
    lines[1] = lines[1].replace(f'"{old}"'.encode(), f'"{new}"'.encode())
    out.write_bytes(b"\n".join(lines))


def _failing(res: subprocess.CompletedProcess) -> list[str]:
    assert res.returncode == 1, f"exit {res.returncode}\n{res.stdout}\n{res.stderr}"
    assert "Traceback" not in res.stderr
    return [name for name, c in _checks(res).items() if c["status"] == "fail"]


def _table_names_failure(ldpt, out: Path, check: str) -> None:
    res = ldpt("validate", out)
    assert res.returncode == 1
    assert re.search(rf"{re.escape(check)}\s*\S*\s*fail", res.stdout), res.stdout
    assert "FAILED" in res.stdout


def test_validate_detects_a_rewritten_value(released: dict[str, Path], ldpt) -> None:
    _tamper_value(released["out"], lambda old: next(r for r in ROLES if r != old))
    failing = _failing(ldpt("validate", released["out"], "--format", "json"))
    assert failing == ["extract hash"]
    _table_names_failure(ldpt, released["out"], "extract hash")


def test_validate_detects_a_label_outside_the_alphabet(released: dict[str, Path], ldpt) -> None:
    _tamper_value(released["out"], lambda old: "Ship's cat")
    res = ldpt("validate", released["out"], "--format", "json")
    failing = _failing(res)
    # the fit check sees the same reports: they cannot come from the declared mechanism at all
    assert set(failing) == {"extract hash", "output alphabet", "fit"}
    assert "role" in _checks(res)["output alphabet"]["detail"]
    assert "role" in _checks(res)["fit"]["detail"] and "Ship's cat" not in _checks(res)["fit"]["detail"]
    _table_names_failure(ldpt, released["out"], "output alphabet")
    est = ldpt("estimate", released["out"])  # refused first because its bytes are not the manifest's
    assert est.returncode == 2 and "does not match manifest" in est.stderr and "Ship's cat" not in est.stderr


def test_validate_detects_epsilon_raised_beyond_the_budget(released: dict[str, Path], ldpt) -> None:
    m = json.loads(released["manifest"].read_text())
    for c in m["columns"]:
        if c["name"] == "role":
            c["mechanism"]["epsilon"] = c["mechanism"]["epsilon"] + 2.0
    released["manifest"].write_text(json.dumps(m, indent=2))
    res = ldpt("validate", released["out"], "--format", "json")
    assert _failing(res) == ["privacy budget"]
    assert "role" in _checks(res)["privacy budget"]["detail"]
    _table_names_failure(ldpt, released["out"], "privacy budget")


def test_validate_detects_rows_removed(released: dict[str, Path], ldpt) -> None:
    lines = released["out"].read_bytes().split(b"\n")
    released["out"].write_bytes(b"\n".join(lines[:-11] + [b""]))
    failing = _failing(ldpt("validate", released["out"], "--format", "json"))
    assert "extract hash" in failing and "row count" in failing


def test_validate_with_other_raw_data_fails_reproduction(released: dict[str, Path], ldpt) -> None:
    # One changed row can leave its randomized report unchanged (that is the point of LDP),
    # so change 200: the chance that every report stays the same is below 0.5^200.
    raw = pd.read_csv(released["csv"], keep_default_na=False, dtype=str)
    raw.loc[:199, "role"] = [ROLES[(ROLES.index(r) + 1) % len(ROLES)] for r in raw.loc[:199, "role"]]
    other = released["dir"] / "other_survey.csv"
    raw.to_csv(other, index=False)
    res = ldpt("validate", released["out"], "--raw", other, "--key", released["key"], "--format", "json")
    assert "reproduced" in _failing(res)


def test_validate_with_the_wrong_key(released: dict[str, Path], ldpt, tmp_path: Path) -> None:
    other = tmp_path / "other.key"
    ok(ldpt("key", "new", other))
    res = ldpt("validate", released["out"], "--raw", released["csv"], "--key", other, "--format", "json")
    failing = _failing(res)
    assert "key matches" in failing and "reproduced" in failing


def test_validate_raw_without_key_is_a_usage_error(released: dict[str, Path], ldpt) -> None:
    res = ldpt("validate", released["out"], "--raw", released["csv"])
    assert res.returncode == 2 and "--key" in res.stderr and "Traceback" not in res.stderr


# -- policy ---------------------------------------------------------------------------------------

def test_policy_schema_is_json_schema(ldpt) -> None:
    schema = json.loads(ok(ldpt("policy", "schema")).stdout)
    assert "properties" in schema
    assert {"budget", "columns"} <= set(schema["properties"])
    assert schema.get("$schema", "").startswith("https://json-schema.org/")


@pytest.mark.parametrize("which", ["bundled", "tests"])
def test_policy_check_valid(which: str, survey: dict[str, Path], ldpt) -> None:
    path = DEMO_POLICY if which == "bundled" else survey["policy"]
    res = ok(ldpt("policy", "check", path))
    for name in ("site", "role", "pay", "weekly_hours", "tenure_years", "satisfaction", "would_recommend",
                 "survey_wave", "staff_id"):
        assert name in res.stdout
    assert "valid" in res.stdout


def test_policy_check_json_policy(survey: dict[str, Path], ldpt) -> None:
    path = survey["dir"] / "policy.json"
    path.write_text(json.dumps(survey_policy()))
    ok(ldpt("policy", "check", path))
    ok(privatize(ldpt, survey, survey["dir"] / "e.parquet", policy=path))


# -- demo -----------------------------------------------------------------------------------------

def test_demo(tmp_path: Path, ldpt) -> None:
    folder = tmp_path / "demo"
    (folder / "steward-private").mkdir(parents=True, mode=0o700)
    write_fixed_key(folder / "steward-private" / "demo.key")  # fixed key + nonce: calibration cannot flake
    res = ok(ldpt("demo", "--dir", folder, "--nonce", FIXED_NONCE))
    partner = folder / "for-partner"
    extract = partner / "staff_survey_extract.parquet"
    manifest = partner / "staff_survey_extract.manifest.json"
    estimates = partner / "estimates.json"
    assert extract.exists() and manifest.exists() and estimates.exists()
    assert json.loads(manifest.read_text())["extract"]["sha256"] == sha256(extract)
    est = json.loads(estimates.read_text())
    assert est["rows"] == json.loads(manifest.read_text())["rows"] > 0
    key = folder / "steward-private" / "demo.key"
    assert stat.S_IMODE(key.stat().st_mode) == 0o600
    assert key.read_text().split()[-1] not in res.stdout + res.stderr + manifest.read_text()
    # nothing steward-only sits in the partner's folder
    assert sorted(p.name for p in partner.iterdir()) == sorted([extract.name, manifest.name, estimates.name])
    ok(ldpt("validate", extract))
    assert json.loads(ok(ldpt("estimate", extract, "--format", "json")).stdout) == est


# -- reproduction ---------------------------------------------------------------------------------

def _without(m: dict[str, Any], *keys: str) -> dict[str, Any]:
    return {k: v for k, v in m.items() if k not in keys}


@pytest.mark.parametrize("fmt_in,fmt_out", [("csv", "parquet"), ("csv", "csv"), ("parquet", "parquet")])
def test_same_key_and_nonce_reproduce_bit_for_bit(fmt_in: str, fmt_out: str, survey: dict[str, Path],
                                                   ldpt) -> None:
    src = survey["csv"] if fmt_in == "csv" else _parquet_input(survey)
    first = survey["dir"] / f"first.{fmt_out}"
    ok(privatize(ldpt, survey, first, input=src))
    m1 = manifest_of(first)
    again = survey["dir"] / "again" / f"first.{fmt_out}"
    again.parent.mkdir()
    ok(privatize(ldpt, survey, again, "--nonce", m1["nonce"], input=src))
    assert sha256(again) == sha256(first) == m1["extract"]["sha256"]
    assert _without(manifest_of(again), "created_utc") == _without(m1, "created_utc")
    # a different nonce gives a different extract
    other = survey["dir"] / "other" / f"first.{fmt_out}"
    other.parent.mkdir()
    ok(privatize(ldpt, survey, other, input=src))
    assert sha256(other) != sha256(first)


def _head_csv(src: Path, dest: Path, rows: int) -> Path:
    lines = src.read_text(encoding="utf-8").splitlines()[: rows + 1]
    dest.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return dest


@pytest.mark.parametrize("fmt_out", ["parquet", "csv"])
def test_batch_rows_do_not_change_the_bytes(fmt_out: str, survey: dict[str, Path], ldpt) -> None:
    small = _head_csv(survey["csv"], survey["dir"] / "head.csv", 2001)
    nonce = "00112233445566778899aabbccddeeff"
    digests = {}
    for b in ("7", "333", "2001", "65536"):
        out = survey["dir"] / f"b{b}" / f"extract.{fmt_out}"
        out.parent.mkdir()
        ok(privatize(ldpt, survey, out, "--nonce", nonce, "--batch-rows", b, input=small))
        digests[b] = sha256(out)
        assert manifest_of(out)["rows"] == 2001
    assert len(set(digests.values())) == 1, digests


def synthetic_survey(path: Path, rows: int, seed: int) -> Path:
    """Invented survey rows (numpy's generator: synthetic input data only), written as CSV."""
    rng = np.random.default_rng(seed)

    def pick(values: list[str], p: list[float] | None = None) -> pa.Array:
        return pc.take(pa.array(values), pa.array(rng.choice(len(values), size=rows, p=p)))

    hours = np.round(rng.normal(39, 6, rows), 1)
    table = pa.table({
        "staff_id": pa.array(np.arange(100001, 100001 + rows)),
        "site": pick([*SITES, "Lakeside Depot"], [0.28, 0.24, 0.17, 0.12, 0.17, 0.02]),
        "role": pick(ROLES),
        "pay": pa.array(np.round(rng.lognormal(10.8, 0.3, rows), -2)),
        "weekly_hours": pa.array(hours, mask=rng.random(rows) < 0.03),
        "tenure_years": pa.array(np.round(np.clip(rng.gamma(1.6, 5.5, rows), 0, 44.5), 1)),
        "satisfaction": pa.array(rng.integers(1, 6, rows), mask=rng.random(rows) < 0.05),
        "would_recommend": pick(["yes", "no"]),
        "survey_wave": pick(["2026-spring"]),
    })
    pacsv.write_csv(table, path)
    return path


@pytest.mark.slow
def test_batch_rows_do_not_change_the_bytes_across_row_groups(survey: dict[str, Path], ldpt) -> None:
    """More rows than one Parquet row group: batch sizes that do and do not divide it."""
    big = synthetic_survey(survey["dir"] / "big.csv", 300_000, seed=11)
    nonce = "ffeeddccbbaa99887766554433221100"
    digests = {}
    for b in ("50000", "65536", "131072", "300001"):
        out = survey["dir"] / f"b{b}" / "extract.parquet"
        out.parent.mkdir()
        ok(privatize(ldpt, survey, out, "--nonce", nonce, "--batch-rows", b, input=big))
        digests[b] = sha256(out)
    assert len(set(digests.values())) == 1, digests
    assert pq.ParquetFile(out).metadata.num_row_groups > 1


def _flatten(obj: Any, prefix: str = "") -> dict[str, Any]:
    if isinstance(obj, dict):
        out: dict[str, Any] = {}
        for k, v in obj.items():
            out.update(_flatten(v, f"{prefix}.{k}" if prefix else k))
        return out
    if isinstance(obj, list):
        out = {}
        for i, v in enumerate(obj):
            out.update(_flatten(v, f"{prefix}[{i}]"))
        return out if obj else {prefix: []}
    return {prefix: obj}


@pytest.mark.parametrize("fmt_out", ["parquet", "csv"])
def test_manifest_depends_on_the_data_only_through_the_extract(fmt_out: str, survey: dict[str, Path],
                                                                ldpt) -> None:
    a = synthetic_survey(survey["dir"] / "wave_a.csv", 3000, seed=1)
    b = synthetic_survey(survey["dir"] / "wave_b.csv", 3000, seed=2)
    assert sha256(a) != sha256(b)
    outs = []
    for name, src in (("a", a), ("b", b)):
        out = survey["dir"] / name / f"extract.{fmt_out}"
        out.parent.mkdir()
        ok(privatize(ldpt, survey, out, input=src))
        outs.append(manifest_of(out))
    fa, fb = _flatten(outs[0]), _flatten(outs[1])
    assert set(fa) == set(fb)
    differ = {k for k in fa if fa[k] != fb[k]}
    assert "extract.sha256" in differ
    assert differ <= {"created_utc", "nonce", "extract.sha256", "extract.bytes"}, differ


# -- interruption ---------------------------------------------------------------------------------

@pytest.fixture(scope="session")
def million_rows(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return synthetic_survey(tmp_path_factory.mktemp("big") / "staff_survey_big.csv", 1_000_000, seed=5)


def _start(survey: dict[str, Path], src: Path, out: Path, private: Path, batch_rows: int) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "ldptransform", "privatize", str(src), "--policy", str(survey["policy"]), "--key",
         str(survey["key"]), "--out", str(out), "--batch-rows", str(batch_rows)],
        stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=cli_env(private))


def _wait_for_partial(p: subprocess.Popen, folder: Path, timeout: float = 60) -> None:
    t0 = time.monotonic()
    assert p.stderr is not None
    while not partials(folder):
        assert p.poll() is None, f"privatize ended (exit {p.returncode}) before its partial file appeared: " \
                                 f"{p.stderr.read().decode()}"
        assert time.monotonic() - t0 < timeout
        time.sleep(0.002)


def _interrupt(survey: dict[str, Path], src: Path, private: Path, sig: int, delay: float,
               batch_rows: int = 1000) -> tuple[subprocess.Popen, str, Path]:
    out = survey["dir"] / "extract.parquet"
    src_hash = sha256(src)
    p = _start(survey, src, out, private, batch_rows)
    _wait_for_partial(p, survey["dir"])
    time.sleep(delay)
    assert p.poll() is None, "the run finished before it could be interrupted: use a larger input"
    p.send_signal(sig)
    _, err = p.communicate(timeout=60)
    assert sha256(src) == src_hash
    return p, err.decode(), out


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
@pytest.mark.parametrize("delay", [0.0, 0.05, 0.15, 0.4])
def test_interrupted_run_leaves_nothing(sig: int, delay: float, survey: dict[str, Path], million_rows: Path,
                                        private_dir: Path) -> None:
    p, err, out = _interrupt(survey, million_rows, private_dir, sig, delay)
    assert p.returncode == 130, f"exit {p.returncode}: {err}"
    assert "Traceback" not in err and "privatized" not in err
    left = listing(survey["dir"])
    assert not out.exists() and not (survey["dir"] / "extract.manifest.json").exists(), left
    assert partials(survey["dir"]) == [], left
    assert listing(private_dir) == []


@pytest.mark.slow
def test_killed_run_leaves_no_release_and_the_next_run_cleans_up(survey: dict[str, Path], million_rows: Path,
                                                                  private_dir: Path, ldpt) -> None:
    p, err, out = _interrupt(survey, million_rows, private_dir, signal.SIGKILL, 0.3)
    assert p.returncode == -signal.SIGKILL
    mpath = survey["dir"] / "extract.manifest.json"
    assert not out.exists() and not mpath.exists()
    assert listing(private_dir) == []
    stale = partials(survey["dir"])  # a killed process cannot clean up after itself
    assert stale, "expected the killed run's partial file"

    res = ok(privatize(ldpt, survey, out, input=million_rows))
    assert partials(survey["dir"]) == [], f"stale partial(s) {stale} not removed"
    assert out.exists() and mpath.exists()
    assert json.loads(mpath.read_text())["extract"]["sha256"] == sha256(out)
    assert "1000000 rows" in res.stderr


# -- help, tables and logs for unattended runs ---------------------------------------------------

def _command_paths() -> list[list[str]]:
    """Every command and group of ``ldpt`` (from the command tree itself)."""
    import typer.main

    from ldptransform.cli import app

    out: list[list[str]] = []

    def walk(cmd: Any, path: list[str]) -> None:
        out.append(path)
        for name, sub in sorted(getattr(cmd, "commands", {}).items()):
            walk(sub, [*path, name])

    walk(typer.main.get_command(app), [])
    return out


def _help(path: list[str], columns: str | None) -> tuple[str, Any]:
    import typer.main
    from typer.testing import CliRunner

    from ldptransform.cli import app

    res = CliRunner().invoke(app, [*path, "--help"], env={"COLUMNS": columns, "NO_COLOR": "1"}, prog_name="ldpt")
    assert res.exit_code == 0, res.output
    cmd: Any = typer.main.get_command(app)
    for name in path:
        cmd = cmd.commands[name]
    return res.stdout, cmd


def _flat(text: str) -> str:
    return " ".join(text.replace("│", " ").replace("╭", " ").replace("╰", " ").replace("─", " ").split())


def _option_rows(text: str) -> dict[str, str]:
    """The help's option table: each option's row (its lines joined), by its long name."""
    rows: dict[str, str] = {}
    name = None
    for line in text.splitlines():
        m = re.match(r"^│\s*\*?\s*(--[\w-]+)\s", line)
        if m:
            name = m.group(1)
            rows[name] = ""
        elif not line.startswith("│"):
            name = None
        if name is not None:
            rows[name] += " " + _flat(line)
    return {k: v.strip() for k, v in rows.items()}


@pytest.mark.parametrize("columns", [None, "80"], ids=["file", "80-columns"])
def test_every_help_shows_its_defaults_hints_and_flags(columns: str | None) -> None:
    paths = _command_paths()
    assert ["privatize"] in paths and ["ledger", "verify"] in paths and len(paths) >= 15
    flags = 0
    for path in paths:
        text, cmd = _help(path, columns)
        where = " ".join(path) or "ldpt"
        assert "…" not in text and "<bool>" not in text, f"{where}:\n{text}"
        rows = _option_rows(text)
        for param in cmd.params:
            if param.param_type_name != "option" or param.hidden:
                continue
            long = next(o for o in param.opts if o.startswith("--"))
            row = rows[long]
            help_text = " ".join((param.help or "").split()).replace("\\[", "[")
            assert help_text in row, f"{where} {long}: {help_text!r} not shown in full: {row!r}"
            after = row[row.index(long) + len(long):].strip()
            if getattr(param, "is_flag", False):  # a flag: no value type after its names
                flags += 1
                after = re.sub(r"^-\w\s+", "", after)
                assert not after.startswith("<") and after.startswith(help_text[:20]), f"{where} {long}: {row!r}"
            else:
                assert after.startswith("<"), f"{where} {long}: {row!r}"
                if param.default is not None and not param.required and not param.multiple:
                    assert "[default: " in row, f"{where} {long}: {row!r}"
    assert flags >= 8


def test_help_keeps_the_bracketed_hints() -> None:
    text = _flat(_help(["privatize"], None)[0])
    for hint in ("pip install 'ldptransform[dask]'", "[default: OUT with .manifest.json]",
                 "a ledger is used automatically when the policy sets budget.lifetime_epsilon",
                 "[default: none; with budget.lifetime_epsilon: ledger.sqlite3 in the private folder",
                 "[default: 65536]", "--idempotent", "exit 5"):
        assert hint in text, hint
    assert "[default: beside each extract]" in _flat(_help(["estimate"], None)[0])
    assert "[default: ledger.sqlite3 in the private folder" in _flat(_help(["ledger", "show"], None)[0])


def test_tables_in_a_file_are_never_cut(released: dict[str, Path], ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    """Piped into a file with an 80-column COLUMNS: no cell cut into an ellipsis, every interval in full."""
    monkeypatch.setenv("COLUMNS", "80")
    args = [released["out"], "--crosstab", "site:role", "--mean-by", "pay:site"]
    res = ok(ldpt("estimate", *args))
    assert "…" not in res.stdout
    result = json.loads(ok(ldpt("estimate", *args, "--format", "json")).stdout)
    assert max(len(line) for line in res.stdout.splitlines()) > 80  # laid out wider than the terminal would be
    cells = result["crosstabs"][0]["cells"]
    assert len(cells) >= len(SITES) * len(ROLES)
    for c in cells:
        assert f"{c['ci_low']:.3f}..{c['ci_high']:.3f}" in res.stdout
    plan_res = ok(ldpt("plan", "--policy", released["policy"], "--rows", "20000"))
    header = next(line for line in plan_res.stdout.splitlines() if "mechanism" in line)
    for h in ("column", "mechanism", "statistic", "best possible", "rows needed", "efficiency"):
        assert h in header, header  # no header folded over two lines
    assert "…" not in plan_res.stdout


def _log(res: subprocess.CompletedProcess) -> list[dict[str, Any]]:
    recs = [json.loads(line) for line in res.stderr.splitlines()]
    assert recs and recs[0]["event"] == "start" and recs[-1]["event"] in ("result", "error"), res.stderr
    return recs


def test_json_log_of_estimate_validate_plan_and_the_ledger(released: dict[str, Path], ldpt) -> None:
    res = ok(ldpt("estimate", released["out"], "--format", "json", "--log-format", "json"))
    assert json.loads(res.stdout)["rows"] == 12000  # stdout as without the log
    recs = _log(res)
    assert recs[0]["inputs"]["extracts"] == [str(released["out"])]
    prog = [r for r in recs if r["event"] == "progress"]
    assert prog and prog[-1] == {**prog[-1], "stage": "decoding", "unit": "rows", "done": 12000, "total": 12000,
                                 "eta_seconds": 0.0}
    assert recs[-1]["exit_code"] == 0 and recs[-1]["rows"] == 12000

    res = ldpt("validate", released["out"], "--log-format", "json")
    assert res.returncode == 0, res.stderr
    recs = _log(res)
    assert recs[-1]["ok"] is True and recs[-1]["failed"] == [] and recs[-1]["exit_code"] == 0
    assert [r["done"] for r in recs if r["event"] == "progress"][-1] == 12000
    _tamper_value(released["out"], lambda old: next(r for r in ROLES if r != old))
    res = ldpt("validate", released["out"], "--log-format", "json")
    assert res.returncode == 1
    assert _log(res)[-1] == {**_log(res)[-1], "event": "result", "exit_code": 1, "ok": False,
                             "failed": ["extract hash"]}

    res = ok(ldpt("plan", "--policy", released["policy"], "--rows", "50", "--log-format", "json"))
    recs = _log(res)
    assert recs[-1]["event"] == "result" and recs[-1]["exit_code"] == 0
    assert all(r["event"] in ("start", "message", "result") for r in recs)  # warnings as messages

    res = ldpt("ledger", "verify", "--ledger", released["dir"] / "none.sqlite3", "--log-format", "json")
    assert res.returncode == 2 and _log(res)[-1]["kind"] == "bad_ledger"


def test_no_progress_when_not_on_a_terminal(released: dict[str, Path], ldpt_process) -> None:
    res = ldpt_process("estimate", released["out"], "--format", "json")
    assert res.returncode == 0 and res.stderr == ""
    res = ldpt_process("validate", released["out"], "--format", "json")
    assert res.returncode == 0 and res.stderr == ""


def test_estimate_shows_progress_on_a_terminal(released: dict[str, Path], private_dir: Path) -> None:
    code, stdout, err = _run_with_terminal_stderr(["estimate", released["out"], "--format", "json"], private_dir)
    assert code == 0 and json.loads(stdout)["rows"] == 12000
    assert "decoding" in err and "12,000" not in stdout


def test_ledger_reports_are_typed_results(tmp_path: Path, survey: dict[str, Path], ldpt) -> None:
    from ldptransform.ledger import Ledger
    from ldptransform.ledger.report import LedgerCheck, LedgerSummary, ledger_check, ledger_summary

    pol = survey_policy()
    pol["subject_key"] = "staff_id"
    policy = write_policy(survey["dir"] / "ledgered.yaml", pol)
    led = tmp_path / "ledger.sqlite3"
    for night in (1, 2):
        ok(ldpt("privatize", survey["csv"], "--policy", policy, "--key", survey["key"], "--out",
                survey["dir"] / f"n{night}.parquet", "--ledger", led))
    summary = ledger_summary(led)
    assert isinstance(summary, LedgerSummary) and summary.releases == 2
    with Ledger.open(led, create=False, readonly=True) as lg:
        assert summary.to_dict() == lg.show()  # the JSON shape of `ledger show` is kept
    frame = summary.to_frame()
    assert list(frame.columns) == ["id", "time", "eps_per_row", "subjects_charged", "lifetime_epsilon"]
    assert frame["id"].tolist() == [1, 2]
    assert json.loads(ok(ldpt("ledger", "show", "--ledger", led, "--format", "json")).stdout) == summary.to_dict()
    check = ledger_check(led)
    assert isinstance(check, LedgerCheck) and check.ok and check.releases == 2 and not check.damaged
    assert check.to_frame().iloc[0]["releases"] == 2
    assert json.loads(ok(ldpt("ledger", "verify", "--ledger", led, "--format", "json")).stdout) == check.to_dict()
    junk = tmp_path / "junk.sqlite3"
    junk.write_bytes(b"\x00" * 4096)
    junk.chmod(0o600)
    bad = ldpt("ledger", "verify", "--ledger", junk, "--format", "json")
    assert bad.returncode == 1
    assert json.loads(bad.stdout) == {**ledger_check(junk).to_dict(), "ok": False, "damaged": True}


def test_plan_suggest_shows_a_status_on_a_terminal_only(tmp_path: Path, private_dir: Path, ldpt_process) -> None:
    pol = write_policy(tmp_path / "tiny.yaml", {
        "budget": {"epsilon_per_row": 1.0}, "quality": {"max_se": 0.05},
        "columns": {"colour": {"type": "categorical", "categories": ["red", "blue", "green"], "epsilon": 1.0}}})
    args: list[str | Path] = ["plan", "--policy", pol, "--rows", "1000", "--suggest"]
    code, stdout, err = _run_with_terminal_stderr(args, private_dir)
    assert code == 0 and "Suggested eps split" in stdout
    assert "suggesting an eps split" in err
    res = ldpt_process(*args)
    assert res.returncode == 0 and "suggesting" not in res.stderr


def test_audit_json_log(tmp_path: Path, ldpt) -> None:
    pol = write_policy(tmp_path / "tiny.yaml", {
        "budget": {"epsilon_per_row": 1.0},
        "columns": {"colour": {"type": "categorical", "categories": ["red", "blue", "green"], "epsilon": 1.0}}})
    res = ldpt("audit", "--policy", pol, "--rows", "2000", "--format", "json", "--log-format", "json")
    assert res.returncode == 0, res.stderr
    recs = _log(res)
    assert recs[0]["command"] == "audit" and recs[0]["inputs"] == {"policy": str(pol), "rows": 2000}
    assert recs[-1] == {**recs[-1], "event": "result", "exit_code": 0, "ok": True, "failed": []}
    assert json.loads(res.stdout)["columns"][0]["column"] == "colour"
