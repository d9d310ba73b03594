"""Every failing example the fuzz properties found, kept as a plain test of the same property on
that one input (tests/fuzz/test_fuzz_*.py hold the properties).  An example whose class is still
being fixed under issue 15 is marked xfail (not strict) with the class; it passes as soon as the
fix lands, and the mark is then removed."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator

import pytest

import fuzz_promise
from fuzz_policies import PolicyCase
from fuzz_promise import promise_run, workspace
from fuzz_release import MANIFEST, LedgerCase, ManifestCase, Release, make_release
from fuzz_tables import TableCase
from test_fuzz_ledgers import check_ledger
from test_fuzz_manifests import check_manifest
from test_fuzz_policies import check_policy_commands
from test_fuzz_tables import check_table

pytestmark = pytest.mark.fuzz


@pytest.fixture(scope="module")
def release() -> Iterator[Release]:
    with workspace() as ws:
        yield make_release(ws)


def _being_fixed(kind: str) -> pytest.MarkDecorator:
    return pytest.mark.xfail(strict=False, reason=f"issue 15: {kind}, being fixed")


Case = Callable[[Release], None]
V5 = {"budget": {"epsilon_per_row": 5}}

REGRESSIONS: list[tuple[str, Case, list[pytest.MarkDecorator]]] = [
    # deep nesting in a YAML policy: a RecursionError in the YAML parser (exit 3)
    ("policy nested 100000 deep",
     lambda r: check_policy_commands(PolicyCase(
         b"quality: " + b"[" * 100_000 + b"]" * 100_000 + b"\nbudget: {epsilon_per_row: 2}\n"
         b"columns: {c: {type: drop}}\n",
         ".yaml", True, ("nested 100000 deep",)), "table", False), []),
    # a Parquet binary column (invalid UTF-8) released in the clear into a CSV extract: ArrowInvalid (exit 3)
    ("binary public column into a CSV extract",
     lambda r: check_table(TableCase(
         {"x": ("binary", [b"\xff", b"a", b"\xc3"]), "y": ("text", ["a", "b", "a"])},
         {**V5, "columns": {"x": {"type": "public"},
                            "y": {"type": "categorical", "categories": ["a", "b"], "epsilon": 1}}},
         "parquet", "utf-8", "plain", 3), "extract.csv", "json"), []),
    # a manifest bound given as text: estimate formats it as a number (ValueError, exit 3)
    ("manifest bound as text, estimate",
     lambda r: check_manifest(r, ManifestCase("number to text", ("columns", 1, "mechanism", "bounds", 1)),
                              "json", True), []),
    # a manifest eps replaced by an integer beyond any float: OverflowError in the manifest's checks (exit 3)
    ("manifest eps 10**400, estimate and validate",
     lambda r: check_manifest(r, ManifestCase("replace", ("columns", 3, "mechanism", "epsilon"), 10**400), "json",
                              True),
     []),
    # privatize on a ledger whose arrays were zeroed: refused, but the nonce record was written (exit 2)
    ("ledger arrays zeroed, privatize",
     lambda r: check_ledger(r, LedgerCase("sql", "UPDATE arrays SET data = X'00';", True, True), "table",
                             strict_nonce=True),
     []),
    # privatize on a ledger whose registry, totals and memo state were all deleted: released and recorded
    # (exit 0) as if nobody had spent anything, while `ledger verify` reports it broken
    ("ledger arrays deleted, privatize",
     lambda r: check_ledger(r, LedgerCase("sql", "DELETE FROM arrays;", True, True), "json"),
     []),
    # junk bytes inside a text cell of the ledger: `ledger verify` fails to decode it (UnicodeDecodeError, exit 3)
    ("ledger text cell with invalid UTF-8, verify",
     lambda r: check_ledger(r, LedgerCase("garbage", (3391, b"\xeb\xba%\xa5\x1b"), False, False), "table"),
     []),
]


@pytest.mark.parametrize("run", [pytest.param(run, id=name, marks=marks) for name, run, marks in REGRESSIONS])
def test_regression(run: Case, release: Release) -> None:
    run(release)


def test_regression_csv_output_holds_no_control_characters(monkeypatch: pytest.MonkeyPatch) -> None:
    """A category with an escape sequence, decoded with `estimate --format csv` to stdout: the
    terminal check of the promise, also on CSV (fuzz_promise.CHECK_CSV_CONTROLS)."""
    monkeypatch.setattr(fuzz_promise, "CHECK_CSV_CONTROLS", True)
    policy = {"budget": {"epsilon_per_row": 5}, "unlisted": "drop",
              "columns": {"cat": {"type": "categorical", "categories": ["a", "b", "\x1b[2J", "\x9b"], "epsilon": 1.0,
                                  "unknown": "as-category"}}}
    check_policy_commands(PolicyCase(json.dumps(policy).encode(), ".json", False, ()), "csv", False)


@pytest.mark.parametrize("case", [ManifestCase("replace", ("privacy", "public_columns"), []),
                                  ManifestCase("replace", ("cautions",), [])], ids=["public columns", "cautions"])
@pytest.mark.parametrize("steward", [False, True], ids=["partner", "steward"])
def test_regression_manifest_hiding_a_clear_column_fails_validate(release: Release, case: ManifestCase,
                                                                   steward: bool) -> None:
    """Issue 15: a manifest whose list of columns in the clear, or its cautions, were emptied
    passed validate on both sides; it must fail a check (exit 1), as it keeps the promise."""
    with workspace() as ws:
        paths = release.copy_into(ws)
        manifest = ws.out / MANIFEST
        manifest.write_bytes(case.render(release.manifest.read_text(encoding="utf-8")))
        args = ["validate", paths["extract"]] + (["--raw", paths["raw"], "--key", ws.key] if steward else [])
        res = promise_run(ws, args, inputs=[paths["raw"], paths["extract"], manifest], check_codes=[1])
        assert res.returncode == 1, f"validate passed a manifest that hides a column in the clear:\n{res.stdout}"


# -- the same promise from a real process (main()'s own exit codes, not the in-process runner's) --

def _deep_policy(ws: fuzz_promise.Workspace, r: Release) -> tuple[list, list]:
    policy = ws.inp / "policy.json"
    policy.write_text('{"quality": ' + "[" * 5000 + "]" * 5000 + ', "budget": {"epsilon_per_row": 1}, "columns": {}}')
    return ["policy", "check", policy], [policy]


def _cut_manifest(ws: fuzz_promise.Workspace, r: Release) -> tuple[list, list]:
    paths = r.copy_into(ws)
    manifest = ws.out / MANIFEST
    manifest.write_bytes(r.manifest.read_bytes()[:700])
    return ["estimate", paths["extract"], "--format", "json"], [paths["extract"], manifest]


def _empty_ledger(ws: fuzz_promise.Workspace, r: Release) -> tuple[list, list]:
    paths = r.copy_into(ws, extract=False)
    paths["ledger"].write_bytes(b"")
    return ["ledger", "verify", "--ledger", paths["ledger"]], [paths["ledger"]]


@pytest.mark.parametrize("build", [_deep_policy, _cut_manifest, _empty_ledger],
                         ids=["policy nested 5000 deep", "manifest cut short", "ledger of 0 bytes"])
def test_promise_in_a_real_process(build: Callable, release: Release) -> None:
    with workspace() as ws:
        args, inputs = build(ws, release)
        res = promise_run(ws, args, inputs=inputs, check_codes=[1], real_process=True)
        assert res.returncode in (1, 2), f"exit {res.returncode}: hostile input accepted\n{res.stdout}{res.stderr}"
