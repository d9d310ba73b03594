"""The promise (tests/fuzz/fuzz_promise.py) for `policy check`, `plan` and `privatize` under
generated policies (tests/fuzz/fuzz_policies.py); a policy that is certainly invalid is refused
by all three (exit 2), never half accepted."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fuzz_policies import TABLE, PolicyCase, policy_cases
from fuzz_promise import note, Workspace, fuzz_settings, promise_run, workspace

pytestmark = pytest.mark.fuzz


def write_case(ws: Workspace, case: PolicyCase) -> tuple:
    policy = ws.inp / f"policy{case.suffix}"
    policy.write_bytes(case.data)
    table = ws.inp / "table.csv"
    table.write_text(TABLE, encoding="utf-8")
    return policy, table


def check_policy_commands(case: PolicyCase, fmt: str, suggest: bool) -> None:
    with workspace() as ws:
        policy, table = write_case(ws, case)
        inputs = [policy, table, ws.key]
        res = promise_run(ws, ["policy", "check", policy], inputs=inputs)
        assert not (case.invalid and res.returncode == 0), f"an invalid policy passed `policy check`: {case!r}"
        checked = res.returncode
        note(f"policy check exit {checked}")
        args = ["plan", "--policy", policy, "--rows", "1000", "--format", "json" if fmt == "json" else "table"]
        args += ["--suggest"] if suggest else []
        res = promise_run(ws, args, inputs=inputs, json_stdout=fmt == "json")
        assert not (case.invalid and res.returncode == 0), f"an invalid policy passed `plan`: {case!r}"
        assert not (checked == 2 and res.returncode == 0), f"`plan` took a policy `policy check` refused: {case!r}"
        out = ws.out / "extract.parquet"
        res = promise_run(ws, ["privatize", table, "--policy", policy, "--key", ws.key, "--out", out],
                          inputs=inputs, may_add=[out, ws.out / "extract.manifest.json"])
        assert not (case.invalid and res.returncode == 0), f"an invalid policy was used for a release: {case!r}"
        assert not (checked == 2 and res.returncode == 0), f"privatize took a policy `policy check` refused: {case!r}"
        note(f"privatize exit {res.returncode}")
        if res.returncode == 0:
            manifest = ws.out / "extract.manifest.json"
            assert out.is_file() and manifest.is_file()
            released = [*inputs, out, manifest]
            res = promise_run(ws, ["estimate", out, "--format", fmt], inputs=released, json_stdout=fmt == "json",
                              csv_stdout=fmt == "csv")
            assert res.returncode == 0, f"estimate refused a fresh release:\n{res.stderr}"
            res = promise_run(ws, ["validate", out, "--format", "json" if fmt == "json" else "table"],
                              inputs=released, check_codes=[1],
                              json_stdout=fmt == "json")
            note(f"validate exit {res.returncode}")


@fuzz_settings(max_examples=80)
@given(case=policy_cases(), fmt=st.sampled_from(["table", "json", "csv"]),
       suggest=st.integers(0, 9).map(lambda i: i == 0))
def test_policy_commands_keep_the_promise(case: PolicyCase, fmt: str, suggest: bool) -> None:
    check_policy_commands(case, fmt, suggest)
