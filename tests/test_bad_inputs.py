"""Every input a user can get wrong ends with exit code 2 and a one-paragraph message that
names the file, column or field concerned, without a traceback, without echoing raw data
or key material, without leaving anything at the destination (extract, manifest, hidden
partial files, steward diagnostics), and without touching the input.
"""

from __future__ import annotations

import csv
import os
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from conftest import DEMO_CSV, assert_user_error, listing, partials, sha256, survey_policy, write_policy

Mutation = Callable[[dict[str, Any]], None]


# -- the common assertions -------------------------------------------------------------------

class Release:
    """A privatize run's paths, with the checks that nothing was written."""

    def __init__(self, survey: dict[str, Path], private_dir: Path, out_name: str = "extract.parquet") -> None:
        self.dir = survey["dir"]
        self.csv = survey["csv"]
        self.policy = survey["policy"]
        self.key = survey["key"]
        self.private = private_dir
        self.out = self.dir / out_name
        self.manifest = self.out.with_name(self.out.stem + ".manifest.json")
        self._hashes: dict[Path, str] = {}

    def remember(self, *paths: Path) -> None:
        for p in paths:
            self._hashes[p] = sha256(p)

    def args(self, input: Path | None = None, **override: Any) -> list[str]:
        opts: dict[str, Any] = {"--policy": self.policy, "--key": self.key, "--out": self.out}
        opts.update({f"--{k.replace('_', '-')}": v for k, v in override.items()})
        args = ["privatize", input or self.csv]
        for k, v in opts.items():
            args += [k] if v is True else [k, v]
        return [str(a) for a in args]

    def assert_nothing_written(self, before: list[str]) -> None:
        after = listing(self.dir)
        assert not self.out.exists(), after
        assert not self.manifest.exists(), after
        assert partials(self.dir) == [], after
        assert after == before, f"the folder changed: {before} -> {after}"
        assert listing(self.private) == [], "steward diagnostics were written for a failed run"
        for p, h in self._hashes.items():
            assert sha256(p) == h, f"{p} was modified"


@pytest.fixture
def release(survey: dict[str, Path], private_dir: Path) -> Release:
    r = Release(survey, private_dir)
    r.remember(r.csv, r.policy, r.key)
    return r


def rewrite_csv(path: Path, edit: Callable[[list[list[str]]], None]) -> None:
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    edit(rows)
    with open(path, "w", newline="", encoding="utf-8") as f:
        csv.writer(f, lineterminator="\n").writerows(rows)


def set_cell(rows: list[list[str]], data_row: int, column: str, value: str) -> None:
    """Set the cell of 1-based data row ``data_row`` (the header is row 0 of ``rows``)."""
    rows[data_row][rows[0].index(column)] = value


# -- policy errors: through privatize and through `policy check` ------------------------------

def _set(column: str, **fields: Any) -> Mutation:
    def m(p: dict[str, Any]) -> None:
        p["columns"][column].update(fields)
    return m


def _budget(p: dict[str, Any]) -> None:
    used = sum(c.get("epsilon", 0) for c in p["columns"].values())
    p["budget"]["epsilon_per_row"] = used - 0.5


POLICY_CASES: dict[str, tuple[Mutation, list[str]]] = {
    "eps zero": (_set("role", epsilon=0), ["role", "epsilon"]),
    "eps negative": (_set("pay", epsilon=-0.5), ["pay", "epsilon"]),
    "eps not a number": (_set("role", epsilon="plenty"), ["role", "epsilon"]),
    "eps as a quoted number": (_set("would_recommend", epsilon="1.0"), ["would_recommend", "epsilon"]),
    "unknown mechanism (numeric)": (_set("pay", mechanism="blur"), ["pay", "mechanism"]),
    "unknown mechanism (categorical)": (_set("site", mechanism="blur"), ["site", "mechanism"]),
    "grr on numeric without bins": (_set("pay", mechanism="grr"), ["pay", "mechanism"]),
    "oue on numeric without bins": (_set("weekly_hours", mechanism="oue"), ["weekly_hours", "mechanism"]),
    "piecewise on categorical": (_set("role", mechanism="piecewise"), ["role", "mechanism"]),
    "hybrid on binned": (_set("tenure_years", mechanism="hybrid"), ["tenure_years", "mechanism"]),
    "empty categories": (_set("role", categories=[]), ["role", "categories"]),
    "duplicate categories": (_set("site", categories=["North Works", "Riverside", "North Works"]),
                             ["site", "categories"]),
    "bounds low == high": (_set("weekly_hours", bounds=[70, 70]), ["weekly_hours", "bounds"]),
    "bounds low > high": (_set("pay", bounds=[140000, 24000]), ["pay", "bounds"]),
    "budget exceeded": (_budget, ["epsilon_per_row"]),
}


def _bad_policy(release: Release, case: str) -> None:
    mutate, _ = POLICY_CASES[case]
    p = survey_policy()
    mutate(p)
    write_policy(release.policy, p)
    release.remember(release.policy)


@pytest.mark.parametrize("case", list(POLICY_CASES))
def test_policy_error_in_privatize(case: str, release: Release, ldpt) -> None:
    _bad_policy(release, case)
    before = listing(release.dir)
    res = ldpt(*release.args())
    assert_user_error(res, [release.policy.name, *POLICY_CASES[case][1]])
    release.assert_nothing_written(before)


@pytest.mark.parametrize("case", list(POLICY_CASES))
def test_policy_error_in_policy_check(case: str, release: Release, ldpt) -> None:
    _bad_policy(release, case)
    before = listing(release.dir)
    res = ldpt("policy", "check", release.policy)
    assert_user_error(res, [release.policy.name, *POLICY_CASES[case][1]])
    assert res.stdout == ""
    release.assert_nothing_written(before)


def test_budget_message_names_the_columns_spending_it(release: Release, ldpt) -> None:
    _bad_policy(release, "budget exceeded")
    res = ldpt("policy", "check", release.policy)
    assert_user_error(res, ["epsilon_per_row", "site", "role", "pay", "tenure_years"])


YAML_ERRORS = {
    "unclosed flow mapping": "budget:\n  epsilon_per_row: 7\ncolumns:\n  site: {type: categorical\n",
    "bad indentation": "budget:\n  epsilon_per_row: 7\n columns:\n  site: {type: drop}\n",
    "tab indentation": "budget:\n\tepsilon_per_row: 7\n",
    "duplicate key": "budget:\n  epsilon_per_row: 7\ncolumns:\n  site: {type: drop}\n  site: {type: drop}\n",
}


@pytest.mark.parametrize("case", list(YAML_ERRORS))
@pytest.mark.parametrize("command", ["privatize", "policy check"])
def test_yaml_syntax_error(case: str, command: str, release: Release, ldpt) -> None:
    release.policy.write_text(YAML_ERRORS[case], encoding="utf-8")
    release.remember(release.policy)
    before = listing(release.dir)
    res = ldpt(*release.args()) if command == "privatize" else ldpt("policy", "check", release.policy)
    assert_user_error(res, [release.policy.name, "line"])
    release.assert_nothing_written(before)


def test_policy_json_syntax_error(release: Release, ldpt) -> None:
    bad = release.dir / "policy.json"
    bad.write_text('{"budget": {"epsilon_per_row": 7}, "columns": {', encoding="utf-8")
    release.policy = bad
    release.remember(bad)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), [bad.name, "line"])
    release.assert_nothing_written(before)


def test_policy_file_missing(release: Release, ldpt_process) -> None:
    """In a real process (the others run in this one): the program's own exit code 2."""
    release.policy = release.dir / "no_such_policy.yaml"
    before = listing(release.dir)
    assert_user_error(ldpt_process(*release.args()), ["no_such_policy.yaml"])
    assert_user_error(ldpt_process("policy", "check", release.policy), ["no_such_policy.yaml"])
    release.assert_nothing_written(before)


def test_policy_unknown_field(release: Release, ldpt) -> None:
    p = survey_policy()
    p["columns"]["pay"]["bonds"] = [0, 1]
    write_policy(release.policy, p)
    release.remember(release.policy)
    before = listing(release.dir)
    assert_user_error(ldpt("policy", "check", release.policy), ["pay", "bonds"])
    assert_user_error(ldpt(*release.args()), ["pay", "bonds"])
    release.assert_nothing_written(before)


# -- input files ----------------------------------------------------------------------------

def test_input_missing(release: Release, ldpt) -> None:
    before = listing(release.dir)
    res = ldpt(*release.args(input=release.dir / "survey_2025.csv"))
    assert_user_error(res, ["survey_2025.csv"])
    release.assert_nothing_written(before)


def test_input_is_a_folder(release: Release, ldpt) -> None:
    folder = release.dir / "parts.parquet"
    folder.mkdir()
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(input=folder)), ["parts.parquet"])
    release.assert_nothing_written(before)


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="root reads any file")
def test_input_unreadable(release: Release, ldpt) -> None:
    release.csv.chmod(0)
    try:
        before = listing(release.dir)
        assert_user_error(ldpt(*release.args()), [release.csv.name])
        release.assert_nothing_written(before)
    finally:
        release.csv.chmod(0o644)


@pytest.mark.parametrize("name", ["staff_survey.txt", "staff_survey.xlsx", "staff_survey"])
def test_input_unsupported_extension(name: str, release: Release, ldpt) -> None:
    other = release.dir / name
    shutil.copyfile(release.csv, other)
    release.remember(other)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(input=other)), [name, ".csv", ".parquet"])
    release.assert_nothing_written(before)


def test_output_unsupported_extension(release: Release, ldpt) -> None:
    release.out = release.dir / "extract.json"
    release.manifest = release.dir / "extract.manifest.json"
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["extract.json"])
    release.assert_nothing_written(before)


def test_input_not_really_parquet(release: Release, ldpt) -> None:
    fake = release.dir / "staff_survey.parquet"
    shutil.copyfile(release.csv, fake)
    release.remember(fake)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(input=fake)), [fake.name], forbidden=["AWC-", "Harbour Lab"])
    release.assert_nothing_written(before)


def test_input_truncated_parquet(release: Release, ldpt) -> None:
    whole = release.dir / "whole.parquet"
    pq.write_table(pacsv.read_csv(release.csv), whole)
    cut = release.dir / "cut.parquet"
    cut.write_bytes(whole.read_bytes()[: whole.stat().st_size // 2])
    release.remember(cut)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(input=cut)), [cut.name])
    release.assert_nothing_written(before)


def test_input_empty_csv(release: Release, ldpt) -> None:
    release.csv.write_bytes(b"")
    release.remember(release.csv)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), [release.csv.name])
    release.assert_nothing_written(before)


def test_csv_row_with_too_many_fields(release: Release, ldpt) -> None:
    secret = "Lent-a-ladder-to-Mrs-Quill"
    rewrite_csv(release.csv, lambda rows: rows[40].append(secret))
    release.remember(release.csv)
    row_id = release.csv.read_text().splitlines()[40].split(",")[0]
    before = listing(release.dir)
    res = ldpt(*release.args())
    assert_user_error(res, [release.csv.name], forbidden=[secret, row_id])
    release.assert_nothing_written(before)


def test_csv_row_with_too_few_fields(release: Release, ldpt) -> None:
    rewrite_csv(release.csv, lambda rows: rows.__setitem__(77, rows[77][:4]))
    release.remember(release.csv)
    row_id = release.csv.read_text().splitlines()[77].split(",")[0]
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), [release.csv.name], forbidden=[row_id])
    release.assert_nothing_written(before)


def _long_csv(path: Path, copies: int) -> list[str]:
    """The survey's data rows repeated ``copies`` times (more than one CSV read block)."""
    lines = DEMO_CSV.read_text(encoding="utf-8").splitlines()
    body = lines[1:]
    out = [lines[0]] + body * copies
    path.write_text("\n".join(out) + "\n", encoding="utf-8")
    return out


@pytest.mark.slow
def test_csv_bad_row_deep_in_a_large_file(release: Release, ldpt) -> None:
    """The bad row is found while the extract is being written: the partial file goes away."""
    lines = _long_csv(release.csv, 10)
    assert release.csv.stat().st_size > 3 * (1 << 22) / 2  # beyond the reader's first block
    bad = len(lines) - 500
    secret = "Borrowed-the-pump-keys"
    lines[bad] = lines[bad] + "," + secret
    release.csv.write_text("\n".join(lines) + "\n", encoding="utf-8")
    release.remember(release.csv)
    before = listing(release.dir)
    res = ldpt(*release.args(batch_rows=4096))
    assert_user_error(res, [release.csv.name], forbidden=[secret, lines[bad].split(",")[0]])
    release.assert_nothing_written(before)


# -- data that does not fit the policy --------------------------------------------------------

def test_policy_column_absent_from_data(release: Release, ldpt) -> None:
    p = survey_policy()
    p["columns"]["shift_pattern"] = {"type": "categorical", "categories": ["day", "night"], "epsilon": 0.0001}
    p["budget"]["epsilon_per_row"] += 0.0001
    write_policy(release.policy, p)
    release.remember(release.policy)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["shift_pattern", release.csv.name])
    release.assert_nothing_written(before)


def test_data_column_absent_from_policy(release: Release, ldpt) -> None:
    p = survey_policy()
    del p["columns"]["survey_wave"]
    assert p["unlisted"] == "error"
    write_policy(release.policy, p)
    release.remember(release.policy)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["survey_wave", release.csv.name])
    release.assert_nothing_written(before)


@pytest.mark.parametrize("text", ["£41,200", "forty thousand", "3.5.1", "41 200", "0x1F", "37,5"])
def test_text_in_numeric_column(text: str, release: Release, ldpt) -> None:
    rewrite_csv(release.csv, lambda rows: set_cell(rows, 50, "pay", text))
    release.remember(release.csv)
    before = listing(release.dir)
    res = ldpt(*release.args())
    assert_user_error(res, ["pay", "50"], forbidden=[text])
    release.assert_nothing_written(before)


def test_text_in_numeric_column_deep_in_the_file(release: Release, ldpt) -> None:
    """Found after many batches were written: the partial extract must go away."""
    rewrite_csv(release.csv, lambda rows: set_cell(rows, 11500, "weekly_hours", "about-forty"))
    release.remember(release.csv)
    before = listing(release.dir)
    res = ldpt(*release.args(batch_rows=500))
    assert_user_error(res, ["weekly_hours", "11500"], forbidden=["about-forty"])
    release.assert_nothing_written(before)


def test_missing_value_categorical_under_missing_error(release: Release, ldpt) -> None:
    assert "missing" not in survey_policy()["columns"]["site"]  # default: error
    rewrite_csv(release.csv, lambda rows: set_cell(rows, 3000, "site", ""))
    release.remember(release.csv)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(batch_rows=1000)), ["site", "missing", "3000"])
    release.assert_nothing_written(before)


def test_missing_value_numeric_under_missing_error(release: Release, ldpt) -> None:
    assert "missing" not in survey_policy()["columns"]["pay"]  # default: error
    rewrite_csv(release.csv, lambda rows: set_cell(rows, 9000, "pay", "NA"))
    release.remember(release.csv)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(batch_rows=1000)), ["pay", "missing", "9000"])
    release.assert_nothing_written(before)


def test_missing_value_binned_under_missing_error(release: Release, ldpt) -> None:
    rewrite_csv(release.csv, lambda rows: set_cell(rows, 12, "tenure_years", ""))
    release.remember(release.csv)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["tenure_years", "missing"])
    release.assert_nothing_written(before)


def test_unknown_category_under_unknown_error(release: Release, ldpt) -> None:
    assert "unknown" not in survey_policy()["columns"]["role"]  # default: error
    value = "Lighthouse keeper"
    rewrite_csv(release.csv, lambda rows: set_cell(rows, 70, "role", value))
    release.remember(release.csv)
    before = listing(release.dir)
    res = ldpt(*release.args())
    assert_user_error(res, ["role", "70"], forbidden=[value, "Lighthouse"])
    release.assert_nothing_written(before)


def test_column_names_with_brackets_are_named_verbatim(release: Release, ldpt) -> None:
    """Column names are user text: they must reach the message as written, whatever they contain."""
    for name in ("wave[week]", "wave[/]"):
        lines = release.csv.read_text(encoding="utf-8").splitlines()
        lines[0] = lines[0].rsplit(",", 1)[0] + "," + name
        release.csv.write_text("\n".join(lines) + "\n", encoding="utf-8")
        release.remember(release.csv)
        before = listing(release.dir)
        assert_user_error(ldpt(*release.args()), [repr(name), "'survey_wave'"])
        release.assert_nothing_written(before)


# -- keys -------------------------------------------------------------------------------------

def test_key_file_missing(release: Release, ldpt) -> None:
    release.key = release.dir / "release.key"
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["release.key"])
    release.assert_nothing_written(before)


def _key_variants(key_hex: str) -> dict[str, bytes]:
    header = b"ldptransform secret key v1\n"
    return {
        "empty": b"",
        "no header": key_hex.encode() + b"\n",
        "short hex": header + key_hex[:-2].encode() + b"\n",
        "not hex": header + b"z" * 64 + b"\n",
        "extra line": header + key_hex.encode() + b"\n" + key_hex.encode() + b"\n",
        "binary": bytes(range(256)),
    }


@pytest.mark.parametrize("case", ["empty", "no header", "short hex", "not hex", "extra line", "binary"])
def test_key_file_malformed(case: str, release: Release, ldpt, key_hex: str) -> None:
    bad = release.dir / "bad.key"
    fd = os.open(bad, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    os.write(fd, _key_variants(key_hex)[case])
    os.close(fd)
    release.key = bad
    release.remember(bad)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["bad.key"], forbidden=[key_hex, key_hex[:-2], key_hex[:16]])
    release.assert_nothing_written(before)


@pytest.mark.parametrize("mode", [0o644, 0o640, 0o604, 0o660])
def test_key_file_readable_by_others(mode: int, release: Release, ldpt, key_hex: str) -> None:
    shared = release.dir / "shared.key"
    shutil.copyfile(release.key, shared)
    shared.chmod(mode)
    release.key = shared
    release.remember(shared)
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["shared.key", "chmod 600"], forbidden=[key_hex, key_hex[:16]])
    release.assert_nothing_written(before)
    assert (shared.stat().st_mode & 0o777) == mode  # ldpt reports; it does not silently fix


def test_key_file_is_a_folder(release: Release, ldpt) -> None:
    folder = release.dir / "keys"
    folder.mkdir()
    release.key = folder
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args()), ["keys"])
    release.assert_nothing_written(before)


# -- destinations -------------------------------------------------------------------------------

def test_output_exists_without_overwrite(release: Release, ldpt) -> None:
    release.out.write_bytes(b"an earlier extract, not to be lost\n")
    release.remember(release.out)
    before = listing(release.dir)
    res = ldpt(*release.args())
    assert_user_error(res, [release.out.name, "--overwrite"], code=5)
    assert listing(release.dir) == before
    assert not release.manifest.exists()
    assert partials(release.dir) == []
    assert listing(release.private) == []
    for p, h in release._hashes.items():
        assert sha256(p) == h


def test_manifest_exists_without_overwrite(release: Release, ldpt) -> None:
    release.manifest.write_text('{"earlier": true}\n')
    release.remember(release.manifest)
    before = listing(release.dir)
    res = ldpt(*release.args())
    assert_user_error(res, [release.manifest.name, "--overwrite"], code=5)
    assert listing(release.dir) == before
    assert not release.out.exists()
    assert listing(release.private) == []
    for p, h in release._hashes.items():
        assert sha256(p) == h


@pytest.mark.parametrize("option,target", [
    ("manifest", "key"), ("manifest", "csv"), ("manifest", "policy"),
    ("diagnostics", "key"), ("diagnostics", "csv"), ("diagnostics", "policy"), ("diagnostics", "out-file"),
    ("diagnostics", "key-link"),
])
def test_no_output_replaces_a_source_or_secret_even_with_overwrite(option: str, target: str, release: Release,
                                                                     ldpt, key_hex: str) -> None:
    """--manifest or --diagnostics pointed at the key file, the raw input, the policy or the extract
    (also through a symlink) is refused with exit 2 even with --overwrite, and nothing changes."""
    if target == "key-link":
        link = release.dir / "innocent.json"
        link.symlink_to(release.key)
        path = link
    elif target == "out-file":
        path = release.out
    else:
        path = {"key": release.key, "csv": release.csv, "policy": release.policy}[target]
    before = listing(release.dir)
    res = ldpt(*release.args(None, **{option: path, "overwrite": True}))
    assert_user_error(res, [path.name, "destroy"], forbidden=[key_hex, key_hex[:16]])
    release.assert_nothing_written(before)


def test_output_folder_missing(release: Release, ldpt) -> None:
    """A missing output folder is created (tests/test_input_conveniences.py: modes, refusals)."""
    release.out = release.dir / "for-partner" / "extract.parquet"
    res = ldpt(*release.args())
    assert res.returncode == 0, res.stderr
    assert sorted(listing(release.dir / "for-partner")) == ["extract.manifest.json", "extract.parquet"]


def test_output_is_the_input(release: Release, ldpt) -> None:
    release.out = release.csv
    release.manifest = release.dir / "staff_survey.manifest.json"
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(overwrite=True)), [release.csv.name])
    assert listing(release.dir) == before
    assert sha256(release.csv) == release._hashes[release.csv]


def test_bad_nonce(release: Release, ldpt) -> None:
    before = listing(release.dir)
    assert_user_error(ldpt(*release.args(nonce="not-a-nonce")), ["--nonce", "manifest"])
    release.assert_nothing_written(before)


@pytest.mark.parametrize("command", ["estimate", "validate"])
def test_a_missing_extract_is_named_as_the_extract(command: str, ldpt: Any, tmp_path: Path) -> None:
    """`estimate nothere.parquet` (and validate, when its manifest is missing too) names the
    extract that does not exist, not only the manifest beside it."""
    res = ldpt(command, tmp_path / "nothere.parquet")
    assert_user_error(res, ["extract", "nothere.parquet", "does not exist"])
