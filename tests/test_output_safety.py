"""Output that never attacks its reader, and messages that never mislead.

A release whose categories, column names and paths are hostile text (spreadsheet formulas,
terminal escape sequences, bidi overrides) is decoded and shown: CSV cells that a spreadsheet
would run as a formula get a leading apostrophe (numbers stay numbers), every text shown on a
terminal has its control characters made visible, and JSON output is strict and exact.  Usage
errors, operating-system errors and upstream messages are one paragraph in plain words (no
"[Errno 28]", no box), and SIGTERM at any point of a command ends with the one-line
interrupted message and exit code 130.
"""

from __future__ import annotations

import csv
import errno
import io
import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import typer

from conftest import FIXED_NONCE, assert_user_error, cli_env, module_private_dir, run_cli, write_fixed_key, \
    write_policy
from ldptransform import cli
from ldptransform.errors import DataError, one_paragraph, terminal_safe
from ldptransform.results import spreadsheet_safe

FORMULAS = ['=HYPERLINK("http://example.invalid","open")', "+cmd|' /C calc'!A0", "-1+1", "@SUM(1,2)"]
ESCAPES = ["\x1b]0;owned\x07title", "\x1b[2Jclear", "left\u202eright", "c1\x9b31m"]
DEPT = [*FORMULAS, *ESCAPES, "plain", "-5"]
GRADE = ["=1+1", "B"]
PAY = "pay\x1b[31m"          # a column name with an escape sequence
NOTE = "note\x1b]0;t\x07"    # a public column's name with one
# what a terminal acts on: C0 controls but newline, DEL, C1 controls, bidi embeddings/overrides/isolates
CONTROL = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")
ROWS = 3000


def _policy() -> dict[str, Any]:
    return {"budget": {"epsilon_per_row": 7.0}, "columns": {
        "dept": {"type": "categorical", "categories": list(DEPT), "epsilon": 2.0},
        "grade": {"type": "categorical", "categories": list(GRADE), "epsilon": 1.0},
        PAY: {"type": "numeric", "bounds": [0, 100], "epsilon": 2.0},
        "score": {"type": "numeric", "bounds": [0, 10], "epsilon": 2.0, "needs": ["quantiles"]},
        NOTE: {"type": "public"},
    }}


@pytest.fixture(scope="module")
def hostile(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """One release of invented data with hostile category labels and column names (Parquet
    input: column names may hold any text), made once per module."""
    d = tmp_path_factory.mktemp("hostile")
    rng = np.random.default_rng(15)  # synthetic input data only
    raw = d / "raw.parquet"
    pd.DataFrame({"dept": rng.choice(np.array(DEPT, dtype=object), ROWS),
                  "grade": rng.choice(np.array(GRADE, dtype=object), ROWS),
                  PAY: rng.uniform(0, 100, ROWS), "score": rng.uniform(0, 10, ROWS),
                  NOTE: rng.choice(np.array(["=2+2", "ok"], dtype=object), ROWS)}).to_parquet(raw, index=False)
    policy = write_policy(d / "hostile.yaml", _policy())
    key = write_fixed_key(d / "release.key")
    out = d / "extract\x1b[2J.parquet"  # the summary line names this path
    with module_private_dir(tmp_path_factory) as private:
        res = run_cli("privatize", raw, "--policy", policy, "--key", key, "--out", out, "--nonce", FIXED_NONCE,
                      private=private)
    assert res.returncode == 0, res.stderr
    return {"dir": d, "raw": raw, "policy": policy, "key": key, "out": out, "privatize": res}


def assert_terminal_safe(res: subprocess.CompletedProcess) -> None:
    for name, text in (("stdout", res.stdout), ("stderr", res.stderr)):
        m = CONTROL.search(text)
        assert m is None, f"{name} holds {m.group()!r} at {m.start()}: {text[max(0, m.start() - 60):m.end() + 60]!r}"
    assert "Traceback" not in res.stderr


def strict_json(text: str) -> Any:
    def refuse(name: str) -> None:
        raise AssertionError(f"not strict JSON: {name}")
    return json.loads(text, parse_constant=refuse)


# -- spreadsheet formulas in CSV output ----------------------------------------------------

@pytest.mark.parametrize("text,expected", [
    ("=SUM(A1)", "'=SUM(A1)"), ("+cmd|x", "'+cmd|x"), ("-1+1", "'-1+1"), ("@SUM(1)", "'@SUM(1)"),
    ("\tx", "'\tx"), ("\rx", "'\\x0dx"), ("-", "'-"), ("-10..5", "'-10..5"),
    ("-1", "-1"), ("+2.5", "+2.5"), ("-3e-4", "-3e-4"), ("-.5", "-.5"),
    ("plain", "plain"), ("a=b", "a=b"), ("", ""), ("'=x", "'=x")])
def test_spreadsheet_safe_neutralizes_formula_text_only(text: str, expected: str) -> None:
    assert spreadsheet_safe(text) == expected


def _csv_rows(text: str) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(text)))


def test_estimate_csv_neutralizes_formulas(hostile: dict[str, Any], ldpt) -> None:
    res = ldpt("estimate", hostile["out"], "--crosstab", "dept:grade", "--mean-by", f"{PAY}:dept", "--format", "csv")
    assert res.returncode == 0, res.stderr
    rows = _csv_rows(res.stdout)
    values = [r["value"] for r in rows if r["column"] == "dept" and r["statistic"] == "frequency"]
    # control characters written as visible escapes (errors.terminal_safe), also in CSV
    assert values == ["'" + v for v in FORMULAS] + [terminal_safe(v) for v in ESCAPES] + ["plain", "-5"]
    for r in rows:
        for k, v in r.items():
            assert not v.startswith(("=", "+", "@", "\t", "\r")), (k, v)
            if v.startswith("-"):  # only numbers (estimates, bounds, the category -5) start with a minus
                float(v)
    joint = [r["value"] for r in rows if r["statistic"] == "joint share"]
    assert len(joint) == len(DEPT) * len(GRADE)
    assert '\'=HYPERLINK("http://example.invalid","open")|=1+1' in joint and "plain|=1+1" in joint
    grouped = [r for r in rows if r["type"] == "grouped mean"]
    assert {r["value"] for r in grouped} == {spreadsheet_safe(v) for v in DEPT}
    for r in rows:  # the figures are numbers, not text
        for k in ("estimate", "se", "ci_low", "ci_high", "epsilon"):
            if r[k]:
                float(r[k])


def test_estimate_csv_file_is_neutralized_too(hostile: dict[str, Any], ldpt, tmp_path: Path) -> None:
    dest = tmp_path / "estimates.csv"
    res = ldpt("estimate", hostile["out"], "--format", "csv", "--out", dest)
    assert res.returncode == 0, res.stderr
    text = dest.read_text(encoding="utf-8")
    assert "'=HYPERLINK" in text and "\n=HYPERLINK" not in text and ",=HYPERLINK" not in text
    assert text == ldpt("estimate", hostile["out"], "--format", "csv").stdout


def test_estimate_json_keeps_the_labels_exact(hostile: dict[str, Any], ldpt) -> None:
    res = ldpt("estimate", hostile["out"], "--format", "json")
    assert res.returncode == 0, res.stderr
    assert "\x1b" not in res.stdout  # JSON escapes control characters itself
    data = strict_json(res.stdout)
    assert [f["value"] for f in data["columns"]["dept"]["frequencies"]] == DEPT
    assert PAY in data["columns"] and data["public_columns"] == [NOTE]


# -- control characters on the terminal -----------------------------------------------------

def test_terminal_safe_makes_control_characters_visible() -> None:
    assert terminal_safe("a\x1b[2Jb") == "a\\x1b[2Jb"
    assert terminal_safe("x\u202ey\x9b\x07") == "x\\u202ey\\x9b\\x07"
    assert terminal_safe("tab\there\nline") == "tab\\x09here\\x0aline"
    assert terminal_safe("tab\there\nline", keep_layout=True) == "tab\there\nline"
    assert terminal_safe("é 日本 🙂 C:\\data") == "é 日本 🙂 C:\\data"
    assert one_paragraph("first line\n\n   second\tline \x1b]0;t\x07") == "first line second line \\x1b]0;t\\x07"


def test_privatize_summary_escapes_paths_and_column_names(hostile: dict[str, Any]) -> None:
    res = hostile["privatize"]
    assert_terminal_safe(res)
    assert "extract\\x1b[2J.parquet" in res.stderr and terminal_safe(NOTE) in res.stderr


def test_csv_extract_with_formula_text_is_cautioned(hostile: dict[str, Any], tmp_path: Path,
                                                    private_dir: Path) -> None:
    """A CSV extract whose policy labels start like a formula, or that holds public columns (their
    cells are written as they are), gets a caution on the steward's summary; a Parquet one does not."""
    out = tmp_path / "extract.csv"
    res = run_cli("privatize", hostile["raw"], "--policy", hostile["policy"], "--key", hostile["key"], "--out", out,
                  private=private_dir)
    assert res.returncode == 0, res.stderr
    assert_terminal_safe(res)
    text = " ".join(res.stderr.split())
    assert "CAUTION: the CSV extract holds labels that start like a formula" in text
    assert "dept ('=HYPERLINK" in text and "grade ('=1+1')" in text
    assert "'-5'" not in text  # a number is read as a number, never as a formula
    assert f"public column(s) written as they are, so any of their cells may: {terminal_safe(NOTE)}" in text
    assert "import it as text" in text
    assert "CSV extract holds" not in hostile["privatize"].stderr


@pytest.mark.parametrize("args", [
    ["estimate", "{out}"],
    ["estimate", "{out}", "--crosstab", "dept:grade", "--mean-by", PAY + ":dept", "--range", "score:2..5",
     "--quantiles", "0.25,0.5"],
    ["validate", "{out}"],
    ["validate", "{out}", "--raw", "{raw}", "--key", "{key}"],
    ["policy", "check", "{policy}"],
    ["plan", "--policy", "{policy}", "--rows", "5000", "--suggest"],
], ids=["estimate", "estimate-analyses", "validate", "validate-raw", "policy-check", "plan"])
def test_tables_escape_control_characters(args: list[str], hostile: dict[str, Any], ldpt) -> None:
    res = ldpt(*[a.format(**{k: str(v) for k, v in hostile.items() if isinstance(v, Path)}) for a in args])
    assert res.returncode in (0, 1), res.stderr
    assert_terminal_safe(res)
    if args[0] in ("estimate", "policy"):
        assert "pay\\x1b[31m" in res.stdout
    if args[0] == "estimate":
        assert "\\x1b[2Jclear" in res.stdout and "left\\u202eright" in res.stdout


def test_estimate_table_into_a_file_escapes_control_characters(hostile: dict[str, Any], ldpt,
                                                               tmp_path: Path) -> None:
    dest = tmp_path / "estimates.txt"
    res = ldpt("estimate", hostile["out"], "--out", dest)
    assert res.returncode == 0, res.stderr
    text = dest.read_text(encoding="utf-8")
    assert CONTROL.search(text) is None and "\\x1b]0;owned\\x07title" in text


def test_csv_on_a_terminal_escapes_control_characters(hostile: dict[str, Any], private_dir: Path) -> None:
    import pty

    leader, follower = pty.openpty()
    try:
        p = subprocess.Popen([sys.executable, "-m", "ldptransform", "estimate", str(hostile["out"]), "--format",
                              "csv"], stdin=subprocess.DEVNULL, stdout=follower, stderr=subprocess.PIPE,
                             env=cli_env(private_dir))
        os.close(follower)
        follower = -1
        chunks = []
        while True:
            try:
                chunk = os.read(leader, 65536)
            except OSError:  # the other side closed
                break
            if not chunk:
                break
            chunks.append(chunk)
        _, err = p.communicate(timeout=180)
    finally:
        os.close(leader)
        if follower >= 0:
            os.close(follower)
    assert p.returncode == 0, err
    shown = b"".join(chunks).decode("utf-8")
    assert "\x1b" not in shown and "\\x1b[2Jclear" in shown and "'=HYPERLINK" in shown


def test_safe_console_keeps_its_own_styles_only() -> None:
    buf = io.StringIO()
    console = cli.SafeConsole(file=buf, force_terminal=True, color_system="standard", width=80, highlight=False)
    console.print("[red]alert[/] " + cli.escape("\x1b[2J\x1b]0;t\x07"))
    console.print("raw \x1b]0;title\x07 \u202e text", markup=False)
    out = buf.getvalue()
    assert "\x1b[31m" in out  # rich's own colour
    assert "\x1b[2J" not in out and "\x1b]0" not in out and "\u202e" not in out
    assert "\\x1b[2J" in out and "\\x1b]0;title" in out and "\\u202e" in out


def test_error_messages_escape_control_characters(hostile: dict[str, Any], ldpt, tmp_path: Path) -> None:
    res = ldpt("policy", "check", tmp_path / "no\x1b[2Jsuch\u202e.yaml")
    assert_user_error(res, ["no\\x1b[2Jsuch\\u202e.yaml"])
    assert_terminal_safe(res)
    # a column of the data that the policy does not list, named in the message
    raw = tmp_path / "raw.parquet"
    frame = pd.read_parquet(hostile["raw"])
    frame["extra\x1b[2J"] = 1
    frame.to_parquet(raw, index=False)
    pol = _policy()
    pol["unlisted"] = "error"
    policy = write_policy(tmp_path / "p.yaml", pol)
    res = ldpt("privatize", raw, "--policy", policy, "--key", hostile["key"], "--out", tmp_path / "x.parquet")
    assert_user_error(res, ["extra"])
    assert_terminal_safe(res)


def test_user_error_messages_are_one_paragraph(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(typer.Exit) as exc, cli._user_errors():
        raise DataError("column 'a\x1b[2J' failed:\n\n  the library said\tthis.\n")
    assert exc.value.exit_code == 2
    err = capsys.readouterr().err
    assert err == "Error: column 'a\\x1b[2J' failed: the library said this.\n"


# -- strict JSON -----------------------------------------------------------------------------

def test_json_text_is_strict() -> None:
    text = cli.json_text({"a": float("inf"), "b": [float("-inf"), float("nan"), 1.5], "c": {"d": (2, None)}})
    assert strict_json(text) == {"a": None, "b": [None, None, 1.5], "c": {"d": [2, None]}}


@pytest.mark.parametrize("args", [
    ["estimate", "{out}", "--format", "json", "--range", "score:2..5", "--crosstab", "dept:grade"],
    ["validate", "{out}", "--format", "json"],
    ["validate", "{out}", "--raw", "{raw}", "--key", "{key}", "--format", "json"],
    ["plan", "--policy", "{policy}", "--rows", "5000", "--format", "json", "--suggest"],
    ["policy", "schema"],
], ids=["estimate", "validate", "validate-raw", "plan", "schema"])
def test_every_json_output_is_strict(args: list[str], hostile: dict[str, Any], ldpt) -> None:
    res = ldpt(*[a.format(**{k: str(v) for k, v in hostile.items() if isinstance(v, Path)}) for a in args])
    assert res.returncode in (0, 1), res.stderr
    strict_json(res.stdout)


@pytest.mark.parametrize("command", ["estimate", "validate"])
@pytest.mark.parametrize("value", ["score:-inf..inf", "score:0..inf", "score:nan..1", "score:2..NaN",
                                   "score:-Infinity..5"])
def test_range_with_a_non_finite_bound_is_a_usage_error(command: str, value: str, hostile: dict[str, Any],
                                                        ldpt) -> None:
    extra = ["--raw", hostile["raw"], "--key", hostile["key"]] if command == "validate" else []
    res = ldpt(command, hostile["out"], *extra, "--range", value, "--format", "json")
    text = assert_user_error(res, ["--range", value, "finite"])
    assert res.stdout == "" and "\n" not in text


# -- usage errors ----------------------------------------------------------------------------

@pytest.mark.parametrize("args,names", [
    (["estimate", "x.parquet", "--formt", "json"], ["--formt", "ldpt estimate --help"]),
    (["estimate"], ["EXTRACTS", "ldpt estimate --help"]),
    (["estimate", "x.parquet", "--format", "yaml"], ["--format", "yaml", "ldpt estimate --help"]),
    (["estimate", "x.parquet", "--format", "\x1b[2J"], ["--format", "\\x1b[2J", "ldpt estimate --help"]),
    (["privatize", "in.csv", "--policy", "p.yaml", "--key", "k", "--out", "o.csv", "--batch-rows", "0"],
     ["--batch-rows", "ldpt privatize --help"]),
    (["plan", "--policy", "p.yaml"], ["--rows", "ldpt plan --help"]),
    (["nosuch"], ["nosuch", "ldpt --help"]),
    (["key", "neww", "k.key"], ["neww", "ldpt key --help"]),
    (["estimate", "x.parquet", "--confidence", "high"], ["--confidence", "ldpt estimate --help"]),
], ids=["unknown-option", "missing-argument", "bad-choice", "escape-in-value", "out-of-range", "missing-option",
        "unknown-command", "unknown-subcommand", "not-a-number"])
def test_usage_errors_are_one_paragraph(args: list[str], names: list[str], ldpt) -> None:
    res = ldpt(*args)
    text = assert_user_error(res, [n for n in names if n != "EXTRACTS"])
    if "EXTRACTS" in names:
        assert "extracts" in text.lower()
    assert "\n" not in text and res.stdout == ""
    assert not re.search("[\u2500-\u257f]", res.stderr), "a box around the message"
    assert "Value error" not in text
    assert_terminal_safe(res)


def test_help_and_version_still_work(ldpt) -> None:
    for args in (["--help"], ["estimate", "--help"], ["key", "--help"]):
        res = ldpt(*args)
        assert res.returncode == 0 and "Usage" in res.stdout, res.stderr
    res = ldpt("--version")
    assert res.returncode == 0 and res.stdout.startswith("ldptransform ")
    res = ldpt()  # no command: the help, exit 2 (as click does)
    assert res.returncode == 2 and "Usage" in res.stdout + res.stderr and "Error" not in res.stderr


# -- operating-system errors in plain words ---------------------------------------------------

@pytest.mark.parametrize("err,words", [
    (OSError(errno.ENOSPC, "No space left on device", "/data/extract.parquet"), ["disk is full", "/data/extract"]),
    (OSError(28, "Error writing bytes to file. Detail: [errno 28] No space left on device"), ["disk is full"]),
    (PermissionError(errno.EACCES, "Permission denied", "/srv/x.csv"), ["permission denied", "/srv/x.csv"]),
    (OSError(errno.EROFS, "Read-only file system", "/mnt/ro/x.csv"), ["read-only", "/mnt/ro/x.csv"]),
    (FileNotFoundError(errno.ENOENT, "No such file or directory", "/nope.csv"), ["no such file or folder",
                                                                              "/nope.csv"]),
    (FileNotFoundError("/nonexistent.parquet"), ["no such file or folder", "/nonexistent.parquet"]),
    (IsADirectoryError(errno.EISDIR, "Is a directory", "/tmp"), ["is a folder", "/tmp"]),
    (OSError(errno.EMFILE, "Too many open files"), ["too many open files"]),
    (OSError(errno.ENAMETOOLONG, "File name too long", "/x/" + "a" * 300), ["too long"]),
    (OSError(errno.ENOSPC, "No space left on device", "/out/.extract.csv.ldpt-partial-12-ab12cd34"),
     ["disk is full", "/out/extract.csv"]),
    (OSError("Expected file path, but /root/ is a directory [errno 21]"), ["/root/ is a directory"]),
    (BrokenPipeError(errno.EPIPE, "Broken pipe"), ["output was closed"]),
], ids=["enospc", "enospc-library", "eacces", "erofs", "enoent", "enoent-library", "eisdir", "emfile",
        "enametoolong", "partial-file", "no-errno", "epipe"])
def test_os_errors_in_plain_words(err: OSError, words: list[str]) -> None:
    text = cli.os_error_message(err)
    for w in words:
        assert w in text, text
    assert not re.search(r"errno|\[Errno|ldpt-partial|No space left|OSError", text, re.IGNORECASE), text
    assert "\n" not in text


def test_os_error_from_a_command_is_one_paragraph(ldpt, tmp_path: Path) -> None:
    res = ldpt("key", "new", tmp_path / ("k" * 300))
    text = assert_user_error(res, ["too long", "k" * 40])
    assert "Errno" not in text and "errno" not in text
    assert os.listdir(tmp_path) == []


# -- interruption -----------------------------------------------------------------------------

def _sigterm_caught(pid: int) -> bool:
    """Whether process ``pid`` has a handler for SIGTERM (its SigCgt mask in /proc)."""
    with open(f"/proc/{pid}/status", encoding="ascii") as f:
        for line in f:
            if line.startswith("SigCgt:"):
                return bool(int(line.split()[1], 16) >> (signal.SIGTERM - 1) & 1)
    return False


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs /proc")
@pytest.mark.parametrize("delay", [0.0, 1.5])
def test_sigterm_at_any_point_ends_with_the_interrupted_message(delay: float, tmp_path: Path,
                                                               private_dir: Path) -> None:
    policy = write_policy(tmp_path / "audit.yaml", {"budget": {"epsilon_per_row": 2.0}, "columns": {
        "a": {"type": "categorical", "categories": ["x", "y", "z"], "epsilon": 1.0},
        "b": {"type": "numeric", "bounds": [0, 10], "epsilon": 1.0}}})
    p = subprocess.Popen([sys.executable, "-m", "ldptransform", "audit", "--policy", str(policy), "--rows",
                          "3000000"], stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         env=cli_env(private_dir), text=True)
    try:
        t0 = time.monotonic()
        while not _sigterm_caught(p.pid):  # the command line is up: it handles SIGTERM from now on
            assert p.poll() is None, f"ended (exit {p.returncode}) before it could be stopped: {p.communicate()}"
            assert time.monotonic() - t0 < 120, "the command never set a SIGTERM handler"
            time.sleep(0.01)
        time.sleep(delay)
        assert p.poll() is None, "the audit finished before it could be stopped"
        p.send_signal(signal.SIGTERM)
        out, err = p.communicate(timeout=120)
    finally:
        if p.poll() is None:
            p.kill()
            p.communicate()
    assert p.returncode == 130, f"exit {p.returncode}: {err}"
    assert "Traceback" not in err and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("interrupted: stopped before finishing"), err


def test_in_process_runs_restore_the_sigterm_handler(ldpt) -> None:
    before = signal.getsignal(signal.SIGTERM)
    assert ldpt("--version").returncode == 0
    assert ldpt("estimate", "--formt").returncode == 2
    assert signal.getsignal(signal.SIGTERM) is before


def test_internal_error_traceback_escapes_control_characters(monkeypatch: pytest.MonkeyPatch,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    def broken() -> None:
        raise RuntimeError("a bug naming column 'x\x1b]0;owned\x07'")

    monkeypatch.setattr(cli, "app", broken)
    with pytest.raises(SystemExit) as exc:
        cli.main()
    assert exc.value.code == 3
    err = capsys.readouterr().err
    assert "internal error" in err and "Traceback" in err and "x\\x1b]0;owned\\x07" in err
    assert CONTROL.search(err) is None


def test_option_errors_name_flags_never_a_python_call(ldpt, tmp_path: Path) -> None:
    res = ldpt("demo", "--dir", tmp_path / "demo", "--nonce", "zz")
    text = assert_user_error(res, ["--nonce", "32 hex"])
    assert "privatize(" not in text and "nonce=" not in text


@pytest.mark.parametrize("raise_it", [
    'exec("raise KeyboardInterrupt")',   # an interrupt escaping code run by exec of a string
    'exec("try:\\n    raise KeyboardInterrupt\\nexcept BaseException as e:\\n    '
    'raise RuntimeError(\'wrapped\') from e")',   # as Python wraps one raised in __set_name__
], ids=["escaped-exec", "wrapped"])
def test_an_interrupt_during_a_lazy_import_still_exits_130(raise_it: str, tmp_path: Path) -> None:
    """SIGTERM can land while a lazy import creates dataclasses (code run by ``exec`` of a string):
    CPython then marks the interrupt unhandled and, under ``python -m``, ends the process by SIGINT
    (exit -2) after ours; or it wraps the interrupt in a RuntimeError (``__set_name__``).  Both must
    end as the one-line interrupted message with exit 130, never -2 or an internal error."""
    pkg = tmp_path / "runner"
    pkg.mkdir()
    (pkg / "__main__.py").write_text(
        "import ldptransform.cli as cli\n\n\ndef boom():\n    " + raise_it + "\n\n\ncli.app = boom\ncli.main()\n",
        encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(Path(__file__).resolve().parent.parent),
                                                        os.environ.get("PYTHONPATH", "")])}
    res = subprocess.run([sys.executable, "-m", "runner"], cwd=tmp_path, env=env, capture_output=True, text=True,
                         timeout=120)
    assert res.returncode == 130, (res.returncode, res.stderr)
    assert res.stderr.strip() == "interrupted: stopped before finishing.", res.stderr
    assert res.stdout == ""
