"""Exit codes (errors.ExitCode): every error class carries its code and a stable kind, the
command line exits with them and names them in the JSON log's error record, and README.md and
docs/pipelines.md list exactly these codes."""

from __future__ import annotations

import errno
import importlib
import json
import pkgutil
import re
from pathlib import Path
from typing import Any

import pytest
import typer

import ldptransform
from ldptransform import cli
from ldptransform.errors import (EXIT_CODE_MEANINGS, DataError, ExitCode, LdptError, NonceReusedError, OptionError,
                                 OutputError, OutputExistsError, PolicyError, UsageError)
from ldptransform.ledger import BudgetExhaustedError, LedgerDamagedError, LedgerError

ROOT = Path(__file__).resolve().parents[1]
EXPECTED = {"OK": 0, "CHECK_FAILED": 1, "BAD_INPUT": 2, "INTERNAL": 3, "PRIVACY_REFUSED": 4, "OUTPUT_EXISTS": 5,
            "ENVIRONMENT": 6, "INTERRUPTED": 130}


def _all_error_classes() -> list[type[LdptError]]:
    for mod in pkgutil.walk_packages(ldptransform.__path__, "ldptransform."):
        if "dask" not in mod.name and not mod.name.endswith("__main__"):  # the extra need not be installed
            importlib.import_module(mod.name)
    seen: list[type[LdptError]] = []
    todo: list[type[LdptError]] = [LdptError]
    while todo:
        c = todo.pop()
        seen.append(c)
        todo.extend(c.__subclasses__())
    return seen


def test_the_codes_are_the_documented_ones() -> None:
    assert {c.name: int(c) for c in ExitCode} == EXPECTED
    assert set(EXIT_CODE_MEANINGS) == set(ExitCode)


@pytest.mark.parametrize("cls,code,kind", [
    (LdptError, 2, "bad_input"), (PolicyError, 2, "bad_policy"), (DataError, 2, "bad_data"),
    (UsageError, 2, "bad_usage"), (OptionError, 2, "bad_option"), (LedgerError, 2, "bad_ledger"),
    (LedgerDamagedError, 2, "ledger_damaged"), (BudgetExhaustedError, 4, "budget_refused"),
    (NonceReusedError, 4, "nonce_refused"), (OutputExistsError, 5, "output_exists"), (OutputError, 6, "environment"),
])
def test_each_class_carries_its_code_and_kind(cls: type[LdptError], code: int, kind: str) -> None:
    assert cls.exit_code == code and cls.kind == kind


def test_every_error_class_has_a_known_code_and_a_plain_kind() -> None:
    classes = _all_error_classes()
    assert len(classes) >= 15
    for c in classes:
        assert c.exit_code in set(ExitCode) - {ExitCode.OK, ExitCode.CHECK_FAILED, ExitCode.INTERNAL}, c
        assert re.fullmatch(r"[a-z]+(_[a-z]+)*", c.kind), c
        assert c.__name__ not in c.kind  # never a Python name


def test_a_reused_nonce_names_the_flag_as_an_option_error_does() -> None:
    err = NonceReusedError("privatize(nonce='ab')", "{nonce} ab was already used")
    assert isinstance(err, OptionError)
    assert err.message_for({"nonce": "--nonce"}) == "--nonce ab was already used"
    assert str(err) == "privatize(nonce='ab'): nonce ab was already used"


@pytest.mark.parametrize("err,code,kind", [
    (OSError(errno.ENOSPC, "No space left on device", "/out/x.csv"), 6, "environment"),
    (PermissionError(errno.EACCES, "Permission denied", "/out/x.csv"), 6, "environment"),
    (OSError(errno.EROFS, "Read-only file system", "/mnt/x.csv"), 6, "environment"),
    (FileNotFoundError(errno.ENOENT, "No such file or directory", "/nope.csv"), 2, "bad_path"),
    (IsADirectoryError(errno.EISDIR, "Is a directory", "/tmp"), 2, "bad_path"),
    (FileExistsError(errno.EEXIST, "File exists", "/out/x.csv"), 5, "output_exists"),
])
def test_operating_system_errors_by_what_failed(err: OSError, code: int, kind: str,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.os_error_code(err) == (code, kind)
    with pytest.raises(typer.Exit) as exc, cli._user_errors():
        raise err
    assert exc.value.exit_code == code
    assert capsys.readouterr().err.startswith("Error: ")


def _json_lines(text: str) -> list[dict[str, Any]]:
    recs = [json.loads(line) for line in text.splitlines()]
    assert recs and all(isinstance(r, dict) and {"event", "command", "time"} <= r.keys() for r in recs)
    return recs


@pytest.mark.parametrize("raised,code,kind", [
    (BudgetExhaustedError("this release would take 3 subject(s) past the lifetime budget."), 4, "budget_refused"),
    (OutputExistsError("output x.parquet already exists. Give --overwrite to replace it."), 5, "output_exists"),
    (OSError(errno.ENOSPC, "No space left on device", "/ledger/l.sqlite3"), 6, "environment"),
    (KeyboardInterrupt(), 130, "interrupted"),
    (RuntimeError("a bug"), 3, "internal"),
], ids=["budget", "exists", "disk-full", "interrupted", "internal"])
def test_the_json_log_ends_with_an_error_record_and_the_exit_code(raised: BaseException, code: int, kind: str,
                                                                    tmp_path: Path, ldpt,
                                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    import ldptransform.ledger.report as report

    def fail(path: Any) -> Any:
        raise raised

    monkeypatch.setattr(report, "ledger_summary", fail)
    res = ldpt("ledger", "show", "--ledger", tmp_path / "l.sqlite3", "--log-format", "json")
    assert res.returncode == code, res.stderr
    recs = _json_lines(res.stderr)  # nothing but JSON lines on stderr, even for a bug
    assert [r["event"] for r in recs] == ["start", "error"]
    assert recs[0]["command"] == "ledger show" and recs[0]["inputs"] == {"ledger": str(tmp_path / "l.sqlite3")}
    err = recs[1]
    assert err["exit_code"] == code and err["kind"] == kind and err["message"]
    assert ("traceback" in err) == (code == 3)
    if code == 6:
        assert "disk is full" in err["message"] and "Errno" not in err["message"]
    assert res.stdout == ""


def test_text_mode_keeps_the_usual_lines(tmp_path: Path, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    import ldptransform.ledger.report as report

    def fail(path: Any) -> Any:
        raise KeyboardInterrupt

    monkeypatch.setattr(report, "ledger_summary", fail)
    res = ldpt("ledger", "show", "--ledger", tmp_path / "l.sqlite3")
    assert res.returncode == 130 and res.stderr.startswith("interrupted: ") and len(res.stderr.splitlines()) == 1


def test_a_usage_error_in_json_mode_is_one_error_record(ldpt) -> None:
    res = ldpt("privatize", "in.csv", "--log-format", "json")  # --policy, --key and --out missing
    assert res.returncode == 2
    recs = _json_lines(res.stderr)
    assert len(recs) == 1 and recs[0]["event"] == "error" and recs[0]["kind"] == "bad_usage"
    assert "--policy" in recs[0]["message"] and "ldpt privatize --help" in recs[0]["message"]
    res = ldpt("privatize", "in.csv", "--log-format=json", "--no-such-option")
    assert res.returncode == 2 and _json_lines(res.stderr)[0]["kind"] == "bad_usage"


def test_exit_codes_command_lists_every_code(ldpt) -> None:
    res = ldpt("exit-codes", "--format", "json")
    assert res.returncode == 0
    listed = json.loads(res.stdout)
    assert [(c["code"], c["name"]) for c in listed] == [(v, k.lower()) for k, v in EXPECTED.items()]
    table = ldpt("exit-codes")
    for c in ExitCode:
        assert re.search(rf"^\W*{int(c)}\W", table.stdout, re.MULTILINE), table.stdout


@pytest.mark.parametrize("doc", ["README.md", "docs/pipelines.md"])
def test_the_docs_list_exactly_these_codes(doc: str) -> None:
    text = (ROOT / doc).read_text(encoding="utf-8")
    section = text[text.index("## Exit codes"):]
    section = section[:section.find("\n## ", 4)] if "\n## " in section[4:] else section
    codes = [int(m) for m in re.findall(r"^\| (\d+) \|", section, re.MULTILINE)]
    assert codes == [int(c) for c in ExitCode], codes


def test_a_reused_nonce_is_refused_for_privacy_in_the_log(survey: dict[str, Path], ldpt) -> None:
    import pandas as pd

    from conftest import FIXED_NONCE, listing

    def release(out: str) -> Any:
        return ldpt("privatize", survey["csv"], "--policy", survey["policy"], "--key", survey["key"], "--out",
                    survey["dir"] / out, "--nonce", FIXED_NONCE, "--log-format", "json")

    assert release("night1.parquet").returncode == 0
    df = pd.read_csv(survey["csv"], dtype=str, keep_default_na=False)
    df.loc[7, "role"] = "Management" if df.loc[7, "role"] != "Management" else "Laboratory"
    df.to_csv(survey["csv"], index=False)
    before = listing(survey["dir"])
    res = release("night2.parquet")
    assert res.returncode == 4
    err = _json_lines(res.stderr)[-1]
    assert err["event"] == "error" and err["exit_code"] == 4 and err["kind"] == "nonce_refused"
    assert f"--nonce {FIXED_NONCE} was already used" in err["message"] and "privatize(" not in err["message"]
    assert listing(survey["dir"]) == before
