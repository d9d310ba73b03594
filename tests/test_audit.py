"""The empirical audit (ldptransform/audit.py, ``ldpt audit``).

* The exact binomial bounds are those of scipy's ``binomtest(...).proportion_ci(method='exact')``
  (to 1e-12), and the ratio bound is their quotient.
* Every registered mechanism passes the audit at its declared eps through the real release path,
  with a fixed key and fixed nonces (deterministic), and the bound is informative: above half the
  eps at 20,000 rows per side (an audit that saw nothing would report 0).
* A mechanism that randomizes at 1.05 times its declared eps is caught (lower bound above the
  declared eps, exit 1 from the command line).
* The command: JSON shape, exit codes (2 for bad options, no traceback), the manifest's embedded
  policy, the temporary folder removed afterwards.
The long sweep over every mechanism at the default 200,000 rows per side is marked slow.
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import FIXED_KEY_BYTES, assert_user_error, write_fixed_key, write_policy
from scipy.stats import binomtest

import ldptransform.audit as audit_mod
from ldptransform.audit import AuditResult, audit, clopper_pearson, ratio_lower_bound
from ldptransform.keys import SecretKey
from ldptransform.mechanisms import registry
from ldptransform.policy import parse_policy

KEY = SecretKey(FIXED_KEY_BYTES)
CATS = ["c0", "c1", "c2", "c3", "c4"]


def distance_matrix(eps: float, k: int) -> list[list[float]]:
    """P[x, y] proportional to exp(-eps |x - y| / (k - 1)): an uneven channel whose worst pair is
    the two end categories (ratio e^eps on the corner columns)."""
    d = np.abs(np.arange(k)[:, None] - np.arange(k)[None, :])
    P = np.exp(-eps / (k - 1) * d)
    return (P / P.sum(axis=1, keepdims=True)).tolist()


def column_of(name: str, eps: float = 1.0) -> dict[str, Any]:
    """A policy column released by mechanism ``name`` at ``eps``."""
    cls = registry()[name]
    if cls.family == "frequency":
        col: dict[str, Any] = {"type": "categorical", "categories": list(CATS), "epsilon": eps, "mechanism": name}
        if name == "matrix":
            col["matrix"] = distance_matrix(eps, len(CATS))
        return col
    return {"type": "numeric", "bounds": [0, 100], "epsilon": eps, "mechanism": name}


def policy_of(columns: dict[str, dict[str, Any]], **top: Any) -> Any:
    eps = sum(c.get("epsilon", 0) for c in columns.values())
    return parse_policy({"budget": {"epsilon_per_row": max(eps, 1.0)}, "columns": columns, **top}, "audit-test")


# -- the exact bounds -------------------------------------------------------------------------------

@pytest.mark.parametrize("k,n,conf", [(0, 50, 0.95), (50, 50, 0.95), (7, 50, 0.99), (4012, 10000, 0.999),
                                      (1, 3, 0.9), (123456, 200000, 0.9999)])
def test_clopper_pearson_is_scipys_exact_interval(k: int, n: int, conf: float) -> None:
    ci = binomtest(k, n).proportion_ci(confidence_level=conf, method="exact")
    lo, hi = clopper_pearson(k, n, conf)
    assert lo == pytest.approx(ci.low, abs=1e-12)
    assert hi == pytest.approx(ci.high, abs=1e-12)


def test_ratio_bound_is_the_quotient_of_the_exact_ends() -> None:
    ka, na, kb, nb, conf = 4020, 10000, 1475, 10000, 0.9975
    lo = binomtest(ka, na).proportion_ci(confidence_level=conf, method="exact").low
    hi = binomtest(kb, nb).proportion_ci(confidence_level=conf, method="exact").high
    assert ratio_lower_bound(ka, na, kb, nb, conf) == pytest.approx(lo / hi, rel=1e-12)
    # below the point estimate, and it tightens with more rows
    assert ratio_lower_bound(ka, na, kb, nb, conf) < (ka / na) / (kb / nb)
    assert ratio_lower_bound(10 * ka, 10 * na, 10 * kb, 10 * nb, conf) > ratio_lower_bound(ka, na, kb, nb, conf)
    assert ratio_lower_bound(0, na, kb, nb, conf) == 0.0


# -- every mechanism at its declared eps --------------------------------------------------------------

@pytest.mark.parametrize("name", sorted(registry()))
def test_every_mechanism_passes_at_its_declared_eps(name: str) -> None:
    eps = 1.0
    lp = policy_of({"x": column_of(name, eps), "note": {"type": "public"}})
    t0 = time.perf_counter()
    res = audit(lp, rows=20_000, key=KEY, seed=f"every/{name}")
    seconds = time.perf_counter() - t0
    col = res.column("x")
    assert res.ok and col.ok, col.to_dict()
    assert col.mechanism == name and col.epsilon == eps
    # informative: the release path's reports are seen to differ between the pair (half of eps at least)
    assert 0.5 * eps < col.epsilon_lower <= eps, col.to_dict()
    assert all(t.first_rows > 9_000 and t.second_rows > 9_000 for t in col.tests)
    print(f"audit {name}: {seconds:.2f} s, largest lower bound {col.epsilon_lower:.4f} (eps {eps})")


def test_memoized_columns_and_sampled_reports() -> None:
    """A subject key, memoized columns and strategy sample (each row reports one column): the audit
    counts only the rows that report the column, and still passes and sees the mechanism."""
    lp = parse_policy({"budget": {"epsilon_per_row": 1.0, "strategy": "sample", "sample_columns": 1},
                       "subject_key": "person",
                       "columns": {"person": {"type": "drop"},
                                   "team": {"type": "categorical", "categories": ["A", "B", "C"], "memoize": True},
                                   "hours": {"type": "numeric", "bounds": [0, 60], "mechanism": "hybrid",
                                             "memoize": True},
                                   "tenure": {"type": "numeric", "bins": [0, 2, 5, 10]}}},
                      "audit-test")
    res = audit(lp, rows=30_000, key=KEY, seed="memo")
    assert res.ok
    for c in res.columns:
        assert c.epsilon == pytest.approx(1.0)
        assert 0.4 < c.epsilon_lower <= 1.0, c.to_dict()
        for t in c.tests:   # about a third of the rows report each column, half of them in the test half
            assert 4_000 < t.first_rows < 6_000, t


# -- a mechanism 5% too generous is caught ---------------------------------------------------------------

def _randomize_at(monkeypatch: pytest.MonkeyPatch, name: str, factor: float) -> None:
    """Make mechanism ``name`` randomize as if its eps were ``factor`` times the declared one (its spec,
    manifest and declared eps unchanged): a mechanism whose declared eps is too low."""
    cls = registry()[name]
    plain = cls.randomize

    def generous(self: Any, x: np.ndarray, words: np.ndarray) -> list[pa.Array]:
        return plain(type(self).from_spec({**self.to_spec(), "epsilon": self.epsilon * factor}), x, words)

    monkeypatch.setattr(cls, "randomize", generous)


@pytest.mark.parametrize("name,rows", [("grr", 150_000), ("two-point", 200_000), ("piecewise", 300_000)])
def test_declared_eps_five_percent_too_low_is_caught(monkeypatch: pytest.MonkeyPatch, name: str, rows: int) -> None:
    """Rows chosen so that the expected bound is at least 4 standard errors above eps 1 (binary grr)."""
    spec = column_of(name, 1.0)
    if name == "grr":
        spec["categories"] = ["c0", "c1"]
    lp = policy_of({"x": spec})
    honest = audit(lp, rows=rows, key=KEY, seed=f"caught/{name}")
    _randomize_at(monkeypatch, name, 1.05)
    res = audit(lp, rows=rows, key=KEY, seed=f"caught/{name}")
    col = res.column("x")
    assert honest.ok and not res.ok and not col.ok
    assert col.epsilon_lower > 1.0 > honest.column("x").epsilon_lower
    assert col.epsilon_lower <= 1.05 * (1 + 1e-9) or col.epsilon_lower <= col.channel_epsilon * 1.05
    print(f"audit {name} at 1.05 eps, {rows} rows per side: lower bound {col.epsilon_lower:.4f} "
          f"(honest {honest.column('x').epsilon_lower:.4f})")


def test_cli_exit_1_on_a_violation(monkeypatch: pytest.MonkeyPatch, tmp_path: Path, ldpt: Any) -> None:
    _randomize_at(monkeypatch, "two-point", 1.05)
    pol = write_policy(tmp_path / "p.yaml", {"budget": {"epsilon_per_row": 1},
                                             "columns": {"x": column_of("two-point")}})
    res = ldpt("audit", "--policy", pol, "--rows", 200_000, "--format", "json")
    assert res.returncode == 1, res.stderr
    out = json.loads(res.stdout)
    assert out["ok"] is False and out["columns"][0]["status"] == "fail"
    assert out["columns"][0]["epsilon_lower"] > 1.0


# -- the command ------------------------------------------------------------------------------------

def test_cli_json_shape_and_table(tmp_path: Path, ldpt: Any) -> None:
    pol = write_policy(tmp_path / "p.yaml", {"budget": {"epsilon_per_row": 2},
                                             "columns": {"g": column_of("grr"), "x": column_of("piecewise"),
                                                         "w": {"type": "public"}}})
    res = ldpt("audit", "--policy", pol, "--rows", 2000, "--format", "json")
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    assert list(out) == ["policy", "rows_per_side", "confidence", "tests", "test_confidence", "ok", "columns",
                         "seconds"]
    assert out["rows_per_side"] == 2000 and out["confidence"] == 0.99 and out["tests"] == 4
    assert out["test_confidence"] == pytest.approx(1 - 0.01 / 4)
    assert [c["column"] for c in out["columns"]] == ["g", "x"]
    c = out["columns"][0]
    assert list(c) == ["column", "mechanism", "epsilon", "channel_epsilon", "epsilon_lower", "status", "worst",
                       "tests", "seconds"]
    assert list(c["worst"]) == ["first", "second", "event", "first_in_event", "first_rows", "second_in_event",
                                "second_rows", "ratio_lower", "epsilon_lower"]
    assert c["worst"]["epsilon_lower"] == c["epsilon_lower"] and len(c["tests"]) == 2
    assert {c["worst"]["first"], c["worst"]["second"]} == {"c0", "c1"}
    table = ldpt("audit", "--policy", pol, "--rows", 2000)
    assert table.returncode == 0 and "no violation found" in table.stdout and "piecewise" in table.stdout


def test_cli_bad_options_exit_2(tmp_path: Path, ldpt: Any) -> None:
    pol = write_policy(tmp_path / "p.yaml", {"budget": {"epsilon_per_row": 1}, "columns": {"g": column_of("grr")}})
    assert_user_error(ldpt("audit", "--policy", pol, "--rows", 5), ["--rows"])
    assert_user_error(ldpt("audit", "--policy", pol, "--confidence", 1.5), ["--confidence"])
    assert_user_error(ldpt("audit", "--rows", 1000), ["--policy", "--manifest"])
    assert_user_error(ldpt("audit", "--policy", tmp_path / "missing.yaml"), ["missing.yaml"])
    only_public = write_policy(tmp_path / "q.yaml", {"budget": {"epsilon_per_row": 1},
                                                     "columns": {"w": {"type": "public"}}})
    assert_user_error(ldpt("audit", "--policy", only_public), ["q.yaml", "nothing to audit"])


def test_cli_audits_the_policy_embedded_in_a_manifest(tmp_path: Path, ldpt: Any) -> None:
    pol = {"budget": {"epsilon_per_row": 2}, "columns": {"g": column_of("oue"), "x": column_of("hybrid")}}
    policy_file = write_policy(tmp_path / "p.yaml", pol)
    raw = tmp_path / "raw.parquet"
    pq.write_table(pa.table({"g": ["c0", "c1", "c2"] * 10, "x": np.linspace(0, 100, 30)}), raw)
    key = write_fixed_key(tmp_path / "k.key")
    (tmp_path / "out").mkdir()
    rel = ldpt("privatize", raw, "--policy", policy_file, "--key", key, "--out", tmp_path / "out" / "e.parquet")
    assert rel.returncode == 0, rel.stderr
    manifest = tmp_path / "out" / "e.manifest.json"
    res = ldpt("audit", "--manifest", manifest, "--rows", 2000, "--format", "json")
    assert res.returncode == 0, res.stderr
    out = json.loads(res.stdout)
    assert [(c["column"], c["mechanism"]) for c in out["columns"]] == [("g", "oue"), ("x", "hybrid")]
    assert "embedded in manifest" in out["policy"]
    # a manifest whose recorded mechanism differs from what its policy resolves to is refused
    man = json.loads(manifest.read_text())
    for c in man["columns"]:
        if c["name"] == "x":
            c["mechanism"]["grid"] = 64
    manifest.write_text(json.dumps(man))
    assert_user_error(ldpt("audit", "--manifest", manifest, "--rows", 2000), ["'x'", "--policy"])


def test_temporary_folder_is_private_and_removed(monkeypatch: pytest.MonkeyPatch, private_dir: Path) -> None:
    """The releases run in a fresh 0700 folder (key, inputs, extracts, diagnostics) removed afterwards;
    the steward's own private folder is neither written nor left pointed elsewhere."""
    import os

    seen: list[tuple[Path, int, list[str]]] = []
    plain = audit_mod._release

    def spy(lp: Any, key: Any, table: Any, folder: Path, label: str, nonce: Any) -> Path:
        out = plain(lp, key, table, folder, label, nonce)
        seen.append((folder, folder.stat().st_mode & 0o777, sorted(p.name for p in folder.rglob("*"))))
        return out

    monkeypatch.setattr(audit_mod, "_release", spy)
    res = audit(policy_of({"g": column_of("grr")}), rows=500)     # a fresh key in the folder
    assert isinstance(res, AuditResult) and len(seen) == 2
    folder = seen[0][0]
    assert all(mode == 0o700 for _, mode, _ in seen)
    assert "audit.key" in seen[0][2]
    assert not folder.exists()
    assert list(private_dir.iterdir()) == [] and os.environ["LDPT_PRIVATE_DIR"] == str(private_dir)


def test_same_key_and_seed_give_the_same_audit() -> None:
    lp = policy_of({"x": column_of("square-wave")})
    a = audit(lp, rows=4000, key=KEY, seed="repeat")
    b = audit(lp, rows=4000, key=KEY, seed="repeat")
    assert [t.to_dict() for t in a.columns[0].tests] == [t.to_dict() for t in b.columns[0].tests]
    frame = a.to_frame()
    assert len(frame) == 2 and set(frame["status"]) == {"pass"}


# -- the long sweep ---------------------------------------------------------------------------------

@pytest.mark.slow
def test_every_mechanism_at_the_default_rows() -> None:
    """All mechanisms in one policy at the default 200,000 rows per side (every test shares the
    confidence): no violation, and the bounds come within 6% of eps."""
    cols = {name.replace("-", "_"): column_of(name, 1.0) for name in sorted(registry())}
    res = audit(policy_of(cols), key=KEY, seed="sweep")
    for c in res.columns:
        print(f"sweep {c.mechanism}: largest lower bound {c.epsilon_lower:.4f} (eps {c.epsilon})")
    assert res.ok, [c.to_dict() for c in res.columns if not c.ok]
    assert all(c.epsilon_lower > 0.94 for c in res.columns), {c.mechanism: c.epsilon_lower for c in res.columns}
    assert math.isfinite(res.seconds)
