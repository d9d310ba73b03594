"""The central guarantee a shuffled release states (amplification by shuffling), and its conditions.

The figure is checked against the closed form of Feldman, McMillan, Talwar, "Hiding Among the
Clones: A Simple and Nearly Optimal Analysis of Privacy Amplification by Shuffling" (FOCS 2021),
Theorem 3.1, computed here from its statement; the statement appears only when every condition
holds (shuffled rows, one row per person, no column in the clear, no memoized column, no
placeholder rows), else the manifest says which fails.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ldptransform.errors import DataError
from ldptransform.keys import SecretKey
from ldptransform.policy import parse_policy
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(7, 39)))
NONCE = "c3" * 16
N = 20000


def table(n: int = N, repeat_one: bool = False) -> pd.DataFrame:
    rng = np.random.default_rng(8)  # synthetic test data only
    ids = [f"s{i:06d}" for i in range(n)]
    if repeat_one:
        ids[5] = ids[4]
    return pd.DataFrame({"sid": ids, "band": rng.choice(["a", "b", "c", "d"], size=n),
                         "hours": np.round(rng.uniform(0, 60, size=n), 1), "wave": "w1"})


def policy(**out: Any) -> dict[str, Any]:
    return {"budget": {"epsilon_per_row": 1.0}, "output": {"one_row_per_person": True, **out},
            "columns": {"sid": {"type": "drop"}, "wave": {"type": "drop"},
                        "band": {"type": "categorical", "categories": ["a", "b", "c", "d"], "epsilon": 0.5},
                        "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 0.5, "mechanism": "piecewise"}}}


def release(tmp: Path, pol: dict[str, Any], df: pd.DataFrame | None = None, name: str = "x", **kw: Any) -> Any:
    raw = tmp / f"{name}.parquet"
    (df if df is not None else table()).to_parquet(raw, index=False)
    return privatize(raw, parse_policy(pol, f"{name}.yaml"), KEY, tmp / f"{name}-out.parquet", nonce=NONCE, **kw)


def paper_epsilon(eps0: float, n: int, delta: float) -> float:
    """Theorem 3.1 of Feldman, McMillan, Talwar (FOCS 2021), as stated there."""
    e = math.exp(eps0)
    return math.log(1 + (e - 1) / (e + 1) * (8 * math.sqrt(e * math.log(4 / delta)) / math.sqrt(n) + 8 * e / n))


def test_a_shuffled_one_row_per_person_release_states_the_central_guarantee(tmp_path: Path) -> None:
    res = release(tmp_path, policy())
    c = res.manifest.privacy.central
    assert c is not None and c["applies"] is True
    delta = min(1e-6, 0.1 / N)
    assert c["delta"] == pytest.approx(delta)
    assert c["epsilon"] == pytest.approx(paper_epsilon(1.0, N, delta), rel=1e-12)
    assert c["epsilon"] < 1.0 and c["improves"] is True  # 20000 rows at eps 1: amplified below 1
    assert "declared by the data steward, not checked" in c["statement"]
    assert "Feldman" in c["source"]
    # the statement is what the manifest file carries
    man = json.loads((tmp_path / "x-out.manifest.json").read_text())
    assert man["privacy"]["central"]["epsilon"] == c["epsilon"]


@pytest.mark.parametrize("case, change, words", [
    ("as-input", lambda p: p["output"].update(row_order="as-input"), "input's order"),
    ("not declared", lambda p: p["output"].update(one_row_per_person=False), "does not declare"),
    ("public column", lambda p: p["columns"].update(wave={"type": "public"}), "wave"),
    ("memoized", lambda p: (p.update(subject_key="sid"), p["columns"]["band"].update(memoize=True)), "memoized"),
])
def test_the_statement_says_which_condition_fails(case: str, change: Any, words: str, tmp_path: Path) -> None:
    pol = policy()
    change(pol)
    pol["columns"] = {k: v for k, v in pol["columns"].items() if not (k == "sid" and pol.get("subject_key"))}
    c = release(tmp_path, pol).manifest.privacy.central
    assert c is not None and c["applies"] is False
    assert words in c["reason"] and "Only the local guarantee" in c["reason"], c["reason"]
    assert "epsilon" not in c


def test_too_few_rows_for_the_theorem(tmp_path: Path) -> None:
    c = release(tmp_path, policy(), table(100)).manifest.privacy.central
    assert c is not None and c["applies"] is False and "too few rows" in c["reason"]


def test_with_a_subject_key_one_row_per_person_is_checked(tmp_path: Path, ldpt: Any) -> None:
    pol = policy()
    pol["subject_key"] = "sid"
    del pol["columns"]["sid"]
    c = release(tmp_path, pol).manifest.privacy.central
    assert c is not None and c["applies"] and "checked: every subject_key value occurs once" in c["statement"]
    with pytest.raises(DataError, match=r"1 row\(s\) repeat a subject_key"):
        release(tmp_path, pol, table(repeat_one=True), name="dup")
    assert not (tmp_path / "dup-out.parquet").exists()
    # the command line: exit 2, one paragraph, no traceback, nothing written
    raw = tmp_path / "dup.parquet"
    pfile = tmp_path / "dup.json"
    pfile.write_text(json.dumps(pol))
    key = tmp_path / "k.key"
    assert ldpt("key", "new", key).returncode == 0
    r = ldpt("privatize", raw, "--policy", pfile, "--key", key, "--out", tmp_path / "cli.parquet")
    assert r.returncode == 2 and "repeat a subject_key" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "cli.parquet").exists()
