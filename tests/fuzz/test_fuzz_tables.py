"""The promise (tests/fuzz/fuzz_promise.py) for `privatize` on generated raw tables
(tests/fuzz/fuzz_tables.py), and for the steward's `validate --raw --key` and the partner's
`estimate` on every release that succeeds: a fresh release re-derives from its raw data."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fuzz_promise import note, Workspace, fuzz_settings, promise_run, workspace
from fuzz_tables import TableCase, table_cases

pytestmark = pytest.mark.fuzz


def release_table(ws: Workspace, case: TableCase, out_name: str) -> tuple[Path, list[Path], int]:
    """Privatize the case's table under its policy; the table, every input (the extract and
    manifest too after a success) and the exit code."""
    table = case.write(ws.inp)
    policy = ws.inp / "policy.yaml"
    policy.write_text(case.policy_text(), encoding="utf-8")
    inputs = [table, policy, ws.key]
    out = ws.out / out_name
    manifest = out.with_name(out.stem + ".manifest.json")
    res = promise_run(ws, ["privatize", table, "--policy", policy, "--key", ws.key, "--out", out], inputs=inputs,
                      may_add=[out, manifest])
    note(f"{case.fmt} privatize exit {res.returncode}")
    if res.returncode == 0:
        assert out.is_file() and manifest.is_file()
        inputs += [out, manifest]
    return table, inputs, res.returncode


def check_table(case: TableCase, out_name: str, fmt: str) -> None:
    with workspace() as ws:
        table, inputs, code = release_table(ws, case, out_name)
        if code != 0:
            return
        out = ws.out / out_name
        res = promise_run(ws, ["validate", out, "--raw", table, "--key", ws.key, "--format", "json"],
                          inputs=inputs, check_codes=[1], json_stdout=True)
        note(f"steward validate exit {res.returncode}")
        if res.returncode in (0, 1):
            checks = {c["check"]: c["status"] for c in json.loads(res.stdout)["checks"]}
            assert checks.get("reproduced") != "fail", f"a fresh release does not re-derive:\n{res.stdout}"
        promise_run(ws, ["estimate", out, "--format", fmt], inputs=inputs, json_stdout=fmt == "json",
                    csv_stdout=fmt == "csv")


@fuzz_settings(max_examples=120)
@given(case=table_cases(), out_name=st.sampled_from(["extract.parquet", "extract.csv"]),
       fmt=st.sampled_from(["table", "json", "csv"]))
def test_privatize_keeps_the_promise_on_any_table(case: TableCase, out_name: str, fmt: str) -> None:
    check_table(case, out_name, fmt)
