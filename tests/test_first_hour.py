"""A steward's first hour, from the command line only: a starter policy drafted from the table,
checked against the data, planned, the release, its report, the partner's estimates and the
steward's validation.  Each step's exit code and what it leaves behind are checked, and the
partner's folder ends up holding only what partners may receive.

Data: an invented table (numpy's seeded generator) with an identifier, a rare category, a skewed
numeric column with an extreme value, and a few missing cells; a fixed nonce.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from conftest import FIXED_NONCE


def table(n: int = 4000) -> pd.DataFrame:
    rng = np.random.default_rng(17)  # invented input data only, never release noise
    unit = rng.choice(["Pumps", "Meters", "Billing", "Depot"], size=n, p=[0.4, 0.3, 0.2, 0.1]).astype(object)
    unit[:3] = "Night shift"  # a category only three people belong to
    pay = np.round(rng.lognormal(np.log(42_000), 0.35, size=n), 0)
    pay[7] = 510_000.0  # one extreme value: someone's
    hours = np.round(rng.uniform(20, 48, size=n), 1)
    hours[rng.choice(n, 40, replace=False)] = np.nan
    return pd.DataFrame({"member_id": [f"M{i:06d}" for i in rng.permutation(n)], "unit": unit, "pay": pay,
                         "weekly_hours": hours, "rating": rng.integers(1, 6, size=n)})


def test_a_first_release_from_the_command_line(tmp_path: Path, ldpt, private_dir: Path) -> None:
    steward, partner = tmp_path / "steward", tmp_path / "partner"
    steward.mkdir(mode=0o700)
    partner.mkdir()
    raw = steward / "members.csv"
    table().to_csv(raw, index=False)
    raw_bytes = raw.read_bytes()
    policy = steward / "members-policy.yaml"

    # 1. a starter policy from the table
    r = ldpt("policy", "draft", str(raw), "--out", str(policy))
    assert r.returncode == 0, r.stderr
    draft = policy.read_text()
    assert "REVIEW" in draft and "Night shift" not in draft and "510000" not in draft and "510,000" not in draft
    assert "Night shift" not in r.stdout and "510000" not in r.stdout
    assert "member_id" in draft and "type: drop" in draft

    # 2. the draft checked against the data: nothing a release would refuse; the values its
    # rounded bounds clip are told (the steward decides), with the rare unit mapped to <other>
    r = ldpt("policy", "check", str(policy), "--data", str(raw), "--format", "json")
    assert r.returncode in (0, 1), r.stderr
    report = json.loads(r.stdout)
    assert report["steward_only"] is True
    assert not [p for p in report["problems"] if p["severity"] == "error"], report["problems"]
    assert r.returncode == (1 if [p for p in report["problems"] if p["severity"] == "warning"] else 0)

    # 3. the plan at this many rows
    r = ldpt("plan", "--policy", str(policy), "--rows", "4000", "--format", "json")
    assert r.returncode == 0, r.stderr

    # 4. a key and the release
    key = steward / "release.key"
    assert ldpt("key", "new", str(key)).returncode == 0
    extract = partner / "members.parquet"
    r = ldpt("privatize", str(raw), "--policy", str(policy), "--key", str(key), "--out", str(extract),
             "--nonce", FIXED_NONCE)
    assert r.returncode == 0, r.stderr

    # 5. the partner's report, the partner's estimates, the steward's validation and report
    r = ldpt("report", str(extract), "--out", str(partner / "members-report.html"))
    assert r.returncode == 0, r.stdout + r.stderr
    r = ldpt("estimate", str(extract), "--format", "json")
    assert r.returncode == 0, r.stderr
    est = json.loads(r.stdout)
    assert set(est["columns"]) == {"unit", "pay", "weekly_hours", "rating"} and est["rows"] == 4000
    r = ldpt("validate", str(extract), "--raw", str(raw), "--key", str(key))
    assert r.returncode == 0, r.stdout
    r = ldpt("report", str(extract), "--out", str(steward / "members-steward.html"), "--raw", str(raw), "--key",
             str(key))
    assert r.returncode == 0, r.stdout + r.stderr
    assert "STEWARD ONLY" in (steward / "members-steward.html").read_text()

    # what partners receive: the extract, its manifest and the report, nothing of the steward's
    assert sorted(p.name for p in partner.iterdir()) == ["members-report.html", "members.manifest.json",
                                                         "members.parquet"]
    assert raw.read_bytes() == raw_bytes
    shared = (partner / "members-report.html").read_text() + (partner / "members.manifest.json").read_text()
    assert "Night shift" not in shared and "M000" not in shared
