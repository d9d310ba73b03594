"""A nightly pipeline as a scheduler runs it: three nights of releases charged to one ledger
through the command line with the JSON log, one night failing on a bad input and one refused
for the budget, then an idempotent rerun.  After each step: the exit code, every record of the
JSON log (each stderr line parsed), and the ledger's state (`ldpt ledger show --format json`,
`ldpt ledger verify --format json`)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from conftest import listing, sha256, write_fixed_key, write_policy

PEOPLE = 300
NONCES = [f"{n:032x}" for n in (101, 102, 103)]
RECORD_KEYS = {"event", "command", "time"}


def _policy() -> dict[str, Any]:
    # each night costs eps 2 per person; the lifetime budget 4.5 allows two nights, not three
    return {"budget": {"epsilon_per_row": 2.0, "lifetime_epsilon": 4.5}, "subject_key": "person",
            "columns": {"person": {"type": "drop"},
                        "colour": {"type": "categorical", "categories": ["red", "blue", "green"], "epsilon": 1.0},
                        "satisfaction": {"type": "categorical", "categories": [1, 2, 3, 4, 5], "epsilon": 1.0}}}


def _raw(path: Path, seed: int) -> Path:
    rng = np.random.default_rng(seed)  # invented test data
    pd.DataFrame({"person": [f"p{i:04d}" for i in range(PEOPLE)],
                  "colour": rng.choice(["red", "blue", "green"], PEOPLE, p=[0.5, 0.3, 0.2]),
                  "satisfaction": rng.integers(1, 6, PEOPLE)}).to_csv(path, index=False)
    return path


def _records(res: Any) -> list[dict[str, Any]]:
    """Every stderr line of a JSON-log run as a record (each must parse as one JSON object)."""
    lines = res.stderr.splitlines()
    assert lines, "no log records"
    out = []
    for line in lines:
        rec = json.loads(line)  # strict JSON, one object per line, nothing else on stderr
        assert isinstance(rec, dict) and RECORD_KEYS <= rec.keys(), line
        out.append(rec)
    assert out[0]["event"] == "start" and out[0]["command"] == "privatize"
    assert sum(r["event"] in ("result", "error") for r in out) == 1 and out[-1]["event"] in ("result", "error")
    return out


def _ledger(ldpt: Any, led: Path) -> dict[str, Any]:
    shown = ldpt("ledger", "show", "--ledger", led, "--format", "json")
    assert shown.returncode == 0, shown.stderr
    checked = ldpt("ledger", "verify", "--ledger", led, "--format", "json")
    assert checked.returncode == 0, checked.stdout + checked.stderr
    verify = json.loads(checked.stdout)
    assert verify["ok"] is True and verify["damaged"] is False
    summary = json.loads(shown.stdout)
    assert verify["releases"] == summary["releases"] and verify["head"] == summary["head"]
    return summary


def test_three_nights_a_failure_a_refusal_and_an_idempotent_rerun(tmp_path: Path, private_dir: Path, ldpt,
                                                                  ldpt_process) -> None:
    key = write_fixed_key(tmp_path / "release.key")
    pol = write_policy(tmp_path / "nightly.yaml", _policy())
    led = tmp_path / "ledger.sqlite3"
    nights = [tmp_path / f"night{n}" for n in (1, 2, 3)]
    for folder in nights:
        folder.mkdir()

    def release(raw: Path, night: int, *extra: str, runner: Any = ldpt) -> Any:
        return runner("privatize", raw, "--policy", pol, "--key", key, "--out", nights[night - 1] / "extract.parquet",
                      "--ledger", led, "--nonce", NONCES[night - 1], "--log-format", "json", *extra)

    # night 1: published and charged
    raw1 = _raw(tmp_path / "raw1.csv", 1)
    res = release(raw1, 1)
    assert res.returncode == 0 and res.stdout == "", res.stderr
    recs = _records(res)
    assert recs[0]["inputs"]["input"] == str(raw1) and recs[0]["inputs"]["ledger"] == str(led)
    progress = [r for r in recs if r["event"] == "progress"]
    assert progress and progress[-1]["unit"] == "bytes" and progress[-1]["total"] == raw1.stat().st_size
    assert all(0 <= p["done"] <= p["total"] for p in progress)
    assert progress[-1]["rows_done"] == PEOPLE
    columns = {r["column"]: r for r in recs if r["event"] == "column"}
    assert sorted(columns) == ["colour", "satisfaction"]
    assert all(c["eps"] == 1.0 and c["mechanism"] and isinstance(c["steward_only"], dict) for c in columns.values())
    result = recs[-1]
    assert result["event"] == "result" and result["exit_code"] == 0 and result["release_id"] == 1
    assert result["eps"] == 2.0 and result["already_published"] is False and result["rows"] == PEOPLE
    assert result["outputs"]["extract"] == str(nights[0] / "extract.parquet")
    state = _ledger(ldpt, led)
    assert state["releases"] == 1 and state["subjects"] == PEOPLE
    assert state["spend_quantiles"]["1"] == 2.0

    # night 2, first try: the extract job delivered a file without the satisfaction column
    raw2 = _raw(tmp_path / "raw2.csv", 2)
    bad = tmp_path / "raw2-bad.csv"
    pd.read_csv(raw2).drop(columns=["satisfaction"]).to_csv(bad, index=False)
    res = release(bad, 2)
    assert res.returncode == 2 and res.stdout == ""
    recs = _records(res)
    err = recs[-1]
    assert err["event"] == "error" and err["exit_code"] == 2 and err["kind"].startswith("bad_")
    assert "satisfaction" in err["message"] and "Traceback" not in res.stderr
    assert listing(nights[1]) == []
    assert _ledger(ldpt, led) == state  # nothing charged

    # night 2, fixed input: published and charged
    res = release(raw2, 2)
    assert res.returncode == 0, res.stderr
    result = _records(res)[-1]
    assert result["release_id"] == 2 and result["already_published"] is False
    state = _ledger(ldpt, led)
    assert state["releases"] == 2 and state["spend_quantiles"]["1"] == 4.0
    published = {p: sha256(p) for p in sorted(nights[1].iterdir())}
    nonce_record = (private_dir / "nonces.jsonl").read_bytes()

    # night 3 (a real process): everyone would pass the lifetime budget, refused for privacy
    raw3 = _raw(tmp_path / "raw3.csv", 3)
    res = release(raw3, 3, runner=ldpt_process)
    assert res.returncode == 4, res.stderr
    err = _records(res)[-1]
    assert err["event"] == "error" and err["exit_code"] == 4 and err["kind"] == "budget_refused"
    assert "lifetime" in err["message"]
    assert listing(nights[2]) == []
    assert _ledger(ldpt, led) == state

    # the scheduler reruns night 2 (it lost the job's status): an identical release is a no-op
    res = release(raw2, 2, "--idempotent")
    assert res.returncode == 0, res.stderr
    recs = _records(res)
    result = recs[-1]
    assert result["event"] == "result" and result["exit_code"] == 0 and result["already_published"] is True
    assert result["outputs"]["extract"] == str(nights[1] / "extract.parquet")
    assert not any(r["event"] == "column" for r in recs)  # nothing was released again
    assert {p: sha256(p) for p in sorted(nights[1].iterdir())} == published
    assert (private_dir / "nonces.jsonl").read_bytes() == nonce_record
    assert _ledger(ldpt, led) == state  # no second charge

    # a rerun of night 2 on data that changed since: a different release is refused, exit 5
    changed = tmp_path / "raw2-changed.csv"
    df = pd.read_csv(raw2)
    df.loc[0, "colour"] = "green" if df.loc[0, "colour"] != "green" else "red"
    df.to_csv(changed, index=False)
    res = release(changed, 2, "--idempotent")
    assert res.returncode == 5, res.stderr
    err = _records(res)[-1]
    assert err["event"] == "error" and err["exit_code"] == 5 and err["kind"] == "output_exists"
    assert {p: sha256(p) for p in sorted(nights[1].iterdir())} == published
    assert _ledger(ldpt, led) == state


def test_the_text_log_of_a_rerun_says_already_published_in_one_line(tmp_path: Path, ldpt) -> None:
    key = write_fixed_key(tmp_path / "release.key")
    pol = write_policy(tmp_path / "nightly.yaml", _policy())
    raw = _raw(tmp_path / "raw.csv", 4)
    args = ["privatize", raw, "--policy", pol, "--key", key, "--out", tmp_path / "x.parquet", "--ledger",
            tmp_path / "ledger.sqlite3"]
    first = ldpt(*args)
    assert first.returncode == 0 and "recorded as release 1" in first.stderr, first.stderr
    again = ldpt(*args, "--idempotent")
    assert again.returncode == 0, again.stderr
    lines = again.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("already published: ") and "nothing was written" in lines[0]
    # without --idempotent the same rerun is an existing output (exit 5), never a second charge
    assert ldpt(*args).returncode == 5
    shown = json.loads(ldpt("ledger", "show", "--ledger", tmp_path / "ledger.sqlite3", "--format", "json").stdout)
    assert shown["releases"] == 1


def test_a_stopped_night_ends_its_log_with_an_interrupted_record(tmp_path: Path, private_dir: Path) -> None:
    """SIGTERM (a scheduler's timeout) in the middle of a release: exit 130, the log's last line is an
    error record of kind interrupted, every line before it a record, and nothing at the destination."""
    import signal
    import subprocess
    import sys

    from conftest import cli_env, partials

    key = write_fixed_key(tmp_path / "release.key")
    pol = write_policy(tmp_path / "nightly.yaml", _policy())
    raw = tmp_path / "big.csv"
    one = pd.read_csv(_raw(tmp_path / "raw.csv", 5))
    pd.DataFrame({"person": [f"p{i:06d}" for i in range(200_000)],
                  "colour": np.resize(one["colour"].to_numpy(), 200_000),
                  "satisfaction": np.resize(one["satisfaction"].to_numpy(), 200_000)}).to_csv(raw, index=False)
    out = tmp_path / "night" / "extract.parquet"
    out.parent.mkdir()
    p = subprocess.Popen([sys.executable, "-m", "ldptransform", "privatize", str(raw), "--policy", str(pol), "--key",
                          str(key), "--out", str(out), "--ledger", str(tmp_path / "ledger.sqlite3"), "--batch-rows",
                          "500", "--log-format", "json"], env=cli_env(private_dir), stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True)
    assert p.stderr is not None
    lines = [p.stderr.readline()]
    assert json.loads(lines[0])["event"] == "start"
    while True:  # wait until the release is under way
        line = p.stderr.readline()
        assert line, "the run ended before it could be stopped: " + "".join(lines)
        lines.append(line)
        if json.loads(line)["event"] == "progress":
            break
    p.send_signal(signal.SIGTERM)
    _, rest = p.communicate(timeout=120)
    assert p.returncode == 130, "".join(lines) + rest
    recs = [json.loads(x) for x in [*lines, *rest.splitlines()]]
    assert recs[-1]["event"] == "error" and recs[-1]["exit_code"] == 130 and recs[-1]["kind"] == "interrupted"
    assert not any(r["event"] == "result" for r in recs)
    assert listing(out.parent) == [] and partials(out.parent) == []
    led = tmp_path / "ledger.sqlite3"
    if led.exists():  # a ledger made for this release holds no release
        shown = subprocess.run([sys.executable, "-m", "ldptransform", "ledger", "show", "--ledger", str(led),
                                "--format", "json"], env=cli_env(private_dir), capture_output=True, text=True)
        assert json.loads(shown.stdout)["releases"] == 0
