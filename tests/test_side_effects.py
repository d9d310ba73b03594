"""The steward's checks have no side effects: ``validate`` (with ``--raw --key``, which re-derives
the release), ``plan`` and ``estimate`` never write to the ledger, the record of release nonces,
the private folder or any release destination, and a release re-checks the same at any later
time (after later releases of the same people, whose nonces and charges are recorded).

The scenario is a ledger-limited nightly pipeline: a lifetime budget that allows exactly three
nights.  Audited after every night, the third night is still released (the audits charged
nobody) and the fourth is refused (the budget is real, so the first part can fail).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import listing, write_fixed_key, write_policy

PEOPLE = 400


def _policy() -> dict[str, Any]:
    # nights cost 2 (colour's first report, satisfaction), then 1 (colour unchanged: memoized, free)
    return {"budget": {"epsilon_per_row": 2.0, "lifetime_epsilon": 4.0}, "subject_key": "person",
            "columns": {"person": {"type": "drop"},
                        "colour": {"type": "categorical", "categories": ["red", "blue", "green"], "epsilon": 1.0,
                                   "memoize": True},
                        "satisfaction": {"type": "categorical", "categories": [1, 2, 3, 4, 5], "epsilon": 1.0}}}


def _raw(path: Path) -> Path:
    rng = np.random.default_rng(5)  # invented test data
    pd.DataFrame({"person": [f"p{i:04d}" for i in range(PEOPLE)],
                  "colour": rng.choice(["red", "blue", "green"], PEOPLE, p=[0.5, 0.3, 0.2]),
                  "satisfaction": rng.integers(1, 6, PEOPLE)}).to_csv(path, index=False)
    return path


def _state(private_dir: Path, *folders: Path) -> dict[str, Any]:
    """Everything a side effect could change: the bytes of every file in the private folder
    (ledger, nonce record, diagnostics) and the listings of the release folders."""
    files = {p.name: p.read_bytes() for p in sorted(private_dir.iterdir()) if p.is_file()}
    return {"private": listing(private_dir), "files": files, **{str(f): listing(f) for f in folders}}


def _reproduced(rep: Any) -> Any:
    check = rep.check("reproduced")
    assert check is not None, [c.to_dict() for c in rep.checks]
    return check


def _checks(res: Any) -> dict[str, str]:
    assert res.returncode in (0, 1), res.stdout + res.stderr
    return {c["check"]: c["status"] for c in json.loads(res.stdout)["checks"]}


def test_audits_of_a_ledger_limited_pipeline_charge_nobody(tmp_path: Path, private_dir: Path, ldpt) -> None:
    key = write_fixed_key(tmp_path / "k.key")
    raw = _raw(tmp_path / "raw.csv")
    pol = write_policy(tmp_path / "p.yaml", _policy())
    ledger = private_dir / "ledger.sqlite3"
    nights = []
    for night in range(1, 5):
        folder = tmp_path / f"night{night}"
        folder.mkdir()
        res = ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", folder / "x.parquet")
        if night == 4:
            # the budget allows three nights: the fourth is refused, with nothing written or charged
            assert res.returncode == 4 and "lifetime budget" in res.stderr, res.stdout + res.stderr
            assert listing(folder) == []
            break
        assert res.returncode == 0, res.stdout + res.stderr
        assert ledger.exists()
        nights.append(folder / "x.parquet")
        # the steward's checks after every night: the release re-derived (validate --raw --key),
        # planned and estimated; not one byte of the steward's state or the releases changes
        before = _state(private_dir, tmp_path, *(p.parent for p in nights))
        for extract in nights:  # every release so far, the old ones included
            status = _checks(ldpt("validate", extract, "--raw", raw, "--key", key, "--format", "json"))
            assert status["reproduced"] == "pass" and status["calibration"] != "fail", status
            assert all(s != "fail" for s in status.values()), status
            est = ldpt("estimate", extract, "--format", "json")
            assert est.returncode == 0, est.stdout + est.stderr
        planned = ldpt("plan", "--policy", pol, "--rows", PEOPLE, "--format", "json")
        assert planned.returncode == 0, planned.stdout + planned.stderr
        assert _state(private_dir, tmp_path, *(p.parent for p in nights)) == before
    from ldptransform.ledger import Ledger

    with Ledger.open(ledger, create=False) as led:
        assert led.verify().releases == 3  # the three nights, no audit


def test_an_old_release_rechecks_after_two_later_ones(tmp_path: Path, private_dir: Path) -> None:
    """Night 1 re-checked after nights 2 and 3 (its nonce recorded, the ledger moved on): the
    re-derivation is neither refused as a nonce reuse nor charged, and reproduces bit for bit."""
    from ldptransform import load_policy, privatize, validate
    from ldptransform.keys import load_key
    from ldptransform.ledger import Ledger

    key = load_key(write_fixed_key(tmp_path / "k.key"))
    raw = _raw(tmp_path / "raw.csv")
    lp = load_policy(write_policy(tmp_path / "p.yaml", _policy()))
    outs = []
    for night in range(3):
        (tmp_path / f"n{night}").mkdir()
        outs.append(privatize(raw, lp, key, tmp_path / f"n{night}" / "x.parquet").extract_path)
    before = _state(private_dir)
    rep = validate(outs[0], raw=raw, key=key)
    assert rep.ok and _reproduced(rep).ok is True, [c.to_dict() for c in rep.checks if c.ok is not True]
    assert _state(private_dir) == before
    with Ledger.open(private_dir / "ledger.sqlite3", create=False) as led:
        assert led.verify().releases == 3
    # other raw data under the old nonce is not refused either: it simply does not reproduce
    changed = pd.read_csv(raw)
    changed["satisfaction"] = changed["satisfaction"] % 5 + 1  # every row's value moved
    other = tmp_path / "other.csv"
    changed.to_csv(other, index=False)
    rep = validate(outs[0], raw=other, key=key)
    assert _reproduced(rep).ok is False
    # raw data whose rows alone take people past the lifetime budget (each person three times):
    # the re-derivation is refused by its own empty ledger, which validate reports, not raises
    tripled = tmp_path / "tripled.csv"
    pd.concat([changed] * 3).to_csv(tripled, index=False)
    rep = validate(outs[0], raw=tripled, key=key)
    reproduced = _reproduced(rep)
    assert reproduced.ok is None and "lifetime_epsilon" in reproduced.detail
    assert _state(private_dir) == before


def test_validate_creates_no_private_folder(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A steward re-checking a release on a machine (or account) without a private folder yet:
    the re-derivation's scratch goes to a fresh 0700 temporary folder, and no private folder,
    ledger or nonce record is created."""
    from ldptransform import load_policy, privatize, validate
    from ldptransform.keys import load_key

    key = load_key(write_fixed_key(tmp_path / "k.key"))
    raw = _raw(tmp_path / "raw.csv")
    lp = load_policy(write_policy(tmp_path / "p.yaml", _policy()))
    (tmp_path / "pub").mkdir()
    out = privatize(raw, lp, key, tmp_path / "pub" / "x.parquet").extract_path
    elsewhere = tmp_path / "not-yet"
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(elsewhere))
    rep = validate(out, raw=raw, key=key)
    assert rep.ok and _reproduced(rep).ok is True
    assert not elsewhere.exists()
    assert listing(tmp_path / "pub") == ["x.manifest.json", "x.parquet"]


def test_estimate_out_never_replaces_the_stewards_state(tmp_path: Path, private_dir: Path, ldpt) -> None:
    """``estimate --out`` (even with --overwrite) refuses the steward's default ledger and nonce
    record, with exit 2 and the file untouched."""
    key = write_fixed_key(tmp_path / "k.key")
    raw = _raw(tmp_path / "raw.csv")
    pol = write_policy(tmp_path / "p.yaml", _policy())
    (tmp_path / "pub").mkdir()
    out = tmp_path / "pub" / "x.parquet"
    assert ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", out).returncode == 0
    before = _state(private_dir)
    for name, role in (("ledger.sqlite3", "ledger"), ("nonces.jsonl", "nonce record")):
        res = ldpt("estimate", out, "--out", private_dir / name, "--overwrite")
        assert res.returncode == 2 and f"is the {role}" in res.stderr and "Traceback" not in res.stderr, res.stderr
    assert _state(private_dir) == before
