"""Every example policy in policies/ is valid and releases the demo data end to end."""

from __future__ import annotations

from pathlib import Path

import pytest

from ldptransform import estimate, load_policy, privatize, validate
from ldptransform.keys import SecretKey

ROOT = Path(__file__).resolve().parent.parent
POLICIES = sorted((ROOT / "policies").glob("*.y*ml")) + sorted((ROOT / "policies").glob("*.json"))
DEMO_CSV = ROOT / "demo_data" / "staff_survey.csv"


def test_there_are_example_policies():
    assert len(POLICIES) >= 2


@pytest.mark.parametrize("path", POLICIES, ids=lambda p: p.name)
def test_example_policy_runs_on_demo_data(path, tmp_path, private_dir):
    lp = load_policy(path)
    assert lp.epsilon_total <= lp.policy.budget.epsilon_per_row + 1e-9
    out = tmp_path / "extract.parquet"
    res = privatize(DEMO_CSV, lp, SecretKey(bytes(range(32))), out, nonce="0" * 32)
    if lp.policy.budget.lifetime_epsilon is not None:  # recorded in the default ledger
        assert res.ledger_release_id == 1 and res.ledger_path == private_dir / "ledger.sqlite3"
    est = estimate(out)
    privatized = {rc.name for rc in lp.columns if rc.mechanism is not None}
    assert set(est["columns"]) == privatized
    rep = validate(out)
    assert rep.ok, [c.as_dict() for c in rep.checks if c.status == "fail"]
