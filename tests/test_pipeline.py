"""End to end through the Python API: privatize -> estimate -> validate.

Checks the whole path (encoding, PRF, mechanism, writer, reader, decoder) rather than
one mechanism: unbiasedness across repeated releases, calibration on an open dataset,
batch-size invariance and reproduction.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml

from ldptransform.estimate import estimate
from ldptransform.keys import SecretKey
from ldptransform.policy import load_policy
from ldptransform.release import privatize
from ldptransform.results import EstimateResult
from ldptransform.validate import validate

KEY = SecretKey(bytes(range(100, 132)))


def nonce(i: int) -> str:
    return f"{i:032x}"


@pytest.fixture(autouse=True)
def _private_dir(tmp_path, monkeypatch):
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(tmp_path / "private"))


def _write_policy(path: Path, policy: dict) -> Path:
    path.write_text(yaml.safe_dump(policy, sort_keys=False))
    return path


def _synthetic(n: int, seed: int = 7) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # synthetic input data only
    return pd.DataFrame({
        "team": rng.choice(["a", "b", "c", "d", "e", "f", "g", "h", "i", "j", "k", "l"], size=n,
                           p=[.3, .2, .1, .1, .05, .05, .05, .05, .04, .03, .02, .01]),
        "grade": rng.choice(["x", "y", "z"], size=n, p=[.6, .3, .1]),
        "office": rng.choice(["n", "s", "e", "w", "c"], size=n),
        "level": rng.choice(["1", "2", "3", "4", "5", "6"], size=n),
        "salary": np.round(rng.lognormal(10.8, 0.35, n), 0),
        "hours": rng.uniform(10, 60, n),
        "score": rng.beta(2, 5, n) * 100,
        "years": rng.gamma(2.0, 4.0, n),
    })


POLICY: dict[str, Any] = {
    "budget": {"epsilon_per_row": 12.0},
    "columns": {
        "team": {"type": "categorical", "categories": list("abcdefghijkl"), "epsilon": 1.0, "mechanism": "oue"},
        "grade": {"type": "categorical", "categories": ["x", "y", "z"], "epsilon": 1.0, "mechanism": "grr"},
        "office": {"type": "categorical", "categories": ["n", "s", "e", "w", "c"], "epsilon": 2.0,
                   "mechanism": "olh"},
        "level": {"type": "categorical", "categories": ["1", "2", "3", "4", "5", "6"], "epsilon": 1.5,
                  "mechanism": "sue"},
        "salary": {"type": "numeric", "bounds": [10000, 150000], "epsilon": 1.0, "mechanism": "piecewise"},
        "hours": {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "mechanism": "two-point"},
        "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 2.0, "mechanism": "hybrid"},
        "years": {"type": "numeric", "bins": [0, 2, 5, 10, 20, 80], "epsilon": 1.0},
    },
}


def _truth(df: pd.DataFrame, policy: dict) -> dict[str, np.ndarray | float]:
    out: dict[str, np.ndarray | float] = {}
    for name, col in policy["columns"].items():
        if col["type"] == "categorical":
            out[name] = np.array([(df[name].astype(str) == c).mean() for c in col["categories"]])
        elif "bins" in col:
            e = np.asarray(col["bins"], float)
            x = np.clip(df[name].to_numpy(), e[0], e[-1])
            codes = np.clip(np.searchsorted(e, x, side="right") - 1, 0, len(e) - 2)
            out[name] = np.bincount(codes, minlength=len(e) - 1) / len(df)
        else:
            lo, hi = col["bounds"]
            out[name] = float(np.clip(df[name].to_numpy(), lo, hi).mean())
    return out


def _vector(result: EstimateResult, name: str) -> tuple[np.ndarray, np.ndarray]:
    col = result["columns"][name]
    if "frequencies" in col:
        return (np.array([f["estimate"] for f in col["frequencies"]]), np.array([f["se"] for f in col["frequencies"]]))
    return np.array([col["mean"]["estimate"]]), np.array([col["mean"]["se"]])


@pytest.mark.slow
def test_unbiased_over_repeated_releases(tmp_path):
    """20 releases of one fixed table (different nonces): the average of each estimate is
    within 5 standard errors of the truth (SE of the average = RMS per-release SE / sqrt(20)),
    and the spread of the 20 estimates agrees with the reported SE within a factor of 1.5
    (a chi-square with 19 df lies in [0.44, 1.8] x its mean with probability > 0.999)."""
    df = _synthetic(20000)
    raw = tmp_path / "raw.parquet"
    df.to_parquet(raw, index=False)
    lp = load_policy(_write_policy(tmp_path / "p.yaml", POLICY))
    truth = _truth(df, POLICY)
    runs: dict[str, list] = {n: [] for n in POLICY["columns"]}
    ses: dict[str, list] = {n: [] for n in POLICY["columns"]}
    R = 20
    for r in range(R):
        out = tmp_path / f"e{r}.parquet"
        privatize(raw, lp, KEY, out, nonce=nonce(r))
        res = estimate(out)
        for name in POLICY["columns"]:
            est, se = _vector(res, name)
            runs[name].append(est)
            ses[name].append(se)
    for name in POLICY["columns"]:
        est = np.array(runs[name])
        se = np.sqrt((np.array(ses[name]) ** 2).mean(axis=0))
        t = np.atleast_1d(truth[name])
        z = (est.mean(axis=0) - t) / (se / np.sqrt(R))
        assert np.all(np.abs(z) < 5), (name, z)
        ratio = est.std(axis=0, ddof=1) / se
        assert np.all((ratio > 0.6) & (ratio < 1.5)), (name, ratio)


def test_open_dataset_calibration(tmp_path):
    """Outside data: the Fair (1978) extramarital-affairs survey data ("A Theory of
    Extramarital Affairs", Journal of Political Economy 86(1)), as shipped with
    statsmodels (6366 rows).  Privatize with every mechanism, decode, and check every
    true frequency and mean against its interval: all |z| below the Bonferroni limit for
    a family-wise error of 0.001 (fixed key and nonce: deterministic), and between 85%
    and 100% of the 95% intervals cover the truth."""
    sm = pytest.importorskip("statsmodels.api")
    df = sm.datasets.fair.load_pandas().data
    raw = tmp_path / "fair.parquet"
    df.to_parquet(raw, index=False)
    policy = {
        "budget": {"epsilon_per_row": 20.0},
        "unlisted": "drop",
        "columns": {
            "rate_marriage": {"type": "categorical", "categories": [1, 2, 3, 4, 5], "epsilon": 2.0, "mechanism": "oue"},
            "religious": {"type": "categorical", "categories": [1, 2, 3, 4], "epsilon": 2.0, "mechanism": "olh"},
            "occupation": {"type": "categorical", "categories": [1, 2, 3, 4, 5, 6], "epsilon": 2.0,
                           "mechanism": "sue"},
            "occupation_husb": {"type": "categorical", "categories": [1, 2, 3, 4, 5, 6], "epsilon": 2.0,
                                "mechanism": "grr"},
            "age": {"type": "numeric", "bounds": [17.5, 42], "epsilon": 2.0, "mechanism": "piecewise"},
            "yrs_married": {"type": "numeric", "bounds": [0.5, 23], "epsilon": 2.0, "mechanism": "two-point"},
            "educ": {"type": "numeric", "bounds": [9, 20], "epsilon": 2.0, "mechanism": "hybrid"},
            "children": {"type": "numeric", "bins": [0, 1, 2, 3, 6], "epsilon": 2.0},
        },
    }
    lp = load_policy(_write_policy(tmp_path / "fair.yaml", policy))
    out = tmp_path / "fair_extract.parquet"
    privatize(raw, lp, KEY, out, nonce=nonce(2026))
    rep = validate(out, raw=raw, key=KEY)
    assert rep.ok, [c.as_dict() for c in rep.checks if c.status == "fail"]
    cal = rep.calibration
    # frequencies 5 + 4 + 6 + 6, means 3, and the binned column: 4 frequencies, 3 quantiles, 4 range shares
    assert cal is not None and cal["statistics"] == 5 + 4 + 6 + 6 + 3 + 4 + 3 + 4
    assert cal["max_abs_z"] < cal["z_limit"]
    assert 0.85 <= cal["share_inside"] <= 1.0
    # and by hand against pandas, for the means
    res = estimate(out)
    for name in ("age", "yrs_married", "educ"):
        m = res["columns"][name]["mean"]
        assert abs(m["estimate"] - df[name].mean()) < 5 * m["se"]


def test_batch_size_invariance_and_reproduction(tmp_path):
    df = _synthetic(3000)
    raw = tmp_path / "raw.csv"
    df.to_csv(raw, index=False)
    lp = load_policy(_write_policy(tmp_path / "p.yaml", POLICY))
    outs = []
    for i, b in enumerate((1, 7, 1000, 65536)):
        out = tmp_path / f"x{i}.parquet"
        res = privatize(raw, lp, KEY, out, nonce=nonce(5), batch_rows=b)
        outs.append(res.manifest.extract.sha256)
    assert len(set(outs)) == 1
    res2 = privatize(raw, lp, KEY, tmp_path / "again.parquet", nonce=nonce(5))
    assert res2.manifest.extract.sha256 == outs[0]
    res3 = privatize(raw, lp, KEY, tmp_path / "other.parquet", nonce=nonce(6))
    assert res3.manifest.extract.sha256 != outs[0]


def test_row_order_matters_only_through_row_index(tmp_path):
    """Each row's noise is keyed by its global index: rows 0..n-1 of a file and the same rows
    followed by more rows give the same first n reports (rows kept in input order)."""
    df = _synthetic(500)
    a, b = tmp_path / "a.parquet", tmp_path / "b.parquet"
    df.iloc[:300].to_parquet(a, index=False)
    df.to_parquet(b, index=False)
    lp = load_policy(_write_policy(tmp_path / "p.yaml", {**POLICY, "output": {"row_order": "as-input"}}))
    privatize(a, lp, KEY, tmp_path / "ea.parquet", nonce=nonce(9))
    with pytest.MonkeyPatch.context() as mp:  # one nonce on other data: refused in one steward state
        mp.setenv("LDPT_PRIVATE_DIR", str(tmp_path / "other-steward"))
        privatize(b, lp, KEY, tmp_path / "eb.parquet", nonce=nonce(9))
    ea = pd.read_parquet(tmp_path / "ea.parquet")
    eb = pd.read_parquet(tmp_path / "eb.parquet").iloc[:300]
    pd.testing.assert_frame_equal(ea.astype(str), eb.astype(str))


def test_manifest_has_no_data_dependent_values(tmp_path):
    """Two different tables of equal size: manifests equal but for time, nonce and the
    extract's own hash/size; the diagnostics (private) do differ."""
    lp = load_policy(_write_policy(tmp_path / "p.yaml", POLICY))
    m = []
    for i, seed in enumerate((1, 2)):
        raw = tmp_path / f"r{i}.parquet"
        _synthetic(1000, seed).to_parquet(raw, index=False)
        res = privatize(raw, lp, KEY, tmp_path / f"out{i}" / "x.parquet" if False else tmp_path / f"x{i}.parquet")
        d = json.loads(res.manifest_path.read_text())
        for k in ("created_utc", "nonce", "extract"):
            d.pop(k)
        m.append(d)
        assert res.diagnostics_path.parent == tmp_path / "private"
    assert m[0] == m[1]


def test_manifest_records_auto_choice(tmp_path):
    policy = {"budget": {"epsilon_per_row": 2}, "columns": {
        "team": {"type": "categorical", "categories": list("abcdefghijkl"), "epsilon": 1.0},
        "hours": {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0}}}
    df = _synthetic(200)[["team", "hours"]]
    raw = tmp_path / "r.csv"
    df.to_csv(raw, index=False)
    res = privatize(raw, load_policy(_write_policy(tmp_path / "p.yaml", policy)), KEY, tmp_path / "x.csv")
    cols = {c.name: c for c in res.manifest.columns}
    team, hours = cols["team"].mechanism, cols["hours"].mechanism
    # k=12 at eps 1: subset selection with m = 3 (Ye and Barg 2018) beats GRR, OLH and OUE
    assert team is not None and team["mechanism"] == "subset" and team["subset_size"] == 3
    why = cols["team"].chosen_because
    assert why is not None and "lowest total variance" in why and "efficiency 1.000" in why and "lower bound" in why
    assert hours is not None and hours["mechanism"] == "hybrid"
    # CSV extract decodes the same way
    est = estimate(tmp_path / "x.csv")
    assert set(est["columns"]) == {"team", "hours"}


def test_estimate_and_validate_tell_their_progress(tmp_path):
    """``on_progress`` of estimate and validate is told the rows of every batch decoded: the counts
    add up to the extract's rows, batch by batch, and the results are those without it."""
    df = _synthetic(5000)
    raw = tmp_path / "raw.parquet"
    df.to_parquet(raw, index=False)
    lp = load_policy(_write_policy(tmp_path / "p.yaml", POLICY))
    out = tmp_path / "e.parquet"
    privatize(raw, lp, KEY, out, nonce=nonce(1))
    seen: list[int] = []
    res = estimate(out, batch_rows=1000, on_progress=seen.append)
    assert seen == [1000] * 5 and res.to_dict() == estimate(out, batch_rows=1000).to_dict()
    told: list[int] = []
    rep = validate(out, on_progress=told.append)
    assert rep.ok and sum(told) == 5000 and all(n > 0 for n in told)
