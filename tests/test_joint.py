"""Cross-tabs, grouped means, consistency and merged extracts (issue 3).

The joint estimators rest on one fact: two columns of a row are randomized
independently given the row, so the product of their per-row unbiased estimates is
unbiased for the joint indicator (docs/formulas.md section 12, [D]; the product form of
the Kronecker estimator discussed by Vinterbo, "A Simple Algorithm for Estimating
Distribution Parameters from n-Dimensional Randomized Binary Responses", ISC 2018).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ldptransform import estimate, parse_policy, privatize
from ldptransform.errors import UsageError
from ldptransform.estimate import norm_additive, norm_mul, norm_sub
from ldptransform.io import sha256_file
from ldptransform.keys import SecretKey

KEY = SecretKey(bytes(range(50, 82)))
A = ["north", "south", "east"]
B = ["w", "x", "y", "z"]


def _data(n: int, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # synthetic input data only
    a = rng.choice(3, size=n, p=[0.5, 0.3, 0.2])
    pb = np.array([[0.6, 0.2, 0.15, 0.05], [0.1, 0.5, 0.3, 0.1], [0.25, 0.25, 0.25, 0.25]])
    b = np.minimum((rng.random(n)[:, None] > np.cumsum(pb[a], axis=1)).sum(axis=1), 3)
    pay = np.clip(30000 + 15000 * a + rng.gamma(2, 6000, n), 20000, 120000)
    return pd.DataFrame({"area": np.array(A)[a], "band": np.array(B)[b], "pay": pay})


def _policy(mech_a: str = "grr", mech_b: str = "oue", mech_y: str = "hybrid") -> dict:
    return {"budget": {"epsilon_per_row": 6.0}, "columns": {
        "area": {"type": "categorical", "categories": A, "epsilon": 2.0, "mechanism": mech_a},
        "band": {"type": "categorical", "categories": B, "epsilon": 2.0, "mechanism": mech_b},
        "pay": {"type": "numeric", "bounds": [20000, 120000], "epsilon": 2.0, "mechanism": mech_y}}}


def _truth(df: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    joint = np.array([[((df.area == a) & (df.band == b)).mean() for b in B] for a in A])
    within = joint / joint.sum(axis=1, keepdims=True)
    means = np.array([df.pay[df.area == a].mean() for a in A])
    return joint, within, means


@pytest.mark.slow
@pytest.mark.parametrize("mechs", [("grr", "oue", "hybrid"), ("olh", "grr", "piecewise")], ids=str)
def test_crosstab_and_grouped_mean_unbiased_and_covered(tmp_path, mechs):
    """Over 40 releases (fixed key, nonces 0..39) of one fixed table: the average joint share,
    share within a row and grouped mean lie within 5 SE (of the average) of the truth, and the
    95% intervals cover the truth in 90-99% of the 40 x (12 + 12 + 3) cases."""
    df = _data(4000)
    raw = tmp_path / "raw.parquet"
    df.to_parquet(raw, index=False)
    lp = parse_policy(_policy(*mechs), "test")
    joint_t, within_t, means_t = _truth(df)
    J: list[np.ndarray] = []
    W: list[np.ndarray] = []
    M: list[np.ndarray] = []
    seJ: list[np.ndarray] = []
    seW: list[np.ndarray] = []
    seM: list[np.ndarray] = []
    cover, total = 0, 0
    for r in range(40):
        out = tmp_path / f"e{r}.parquet"
        privatize(raw, lp, KEY, out, nonce=f"{r:032x}")
        res = estimate(out, crosstabs=[("area", "band")], mean_by=[("pay", "area")])
        x = res["crosstabs"][0]
        j = np.array([c["estimate"] for c in x["cells"]]).reshape(3, 4)
        js = np.array([c["se"] for c in x["cells"]]).reshape(3, 4)
        w = np.array([c["estimate"] for c in x["row_shares"]]).reshape(3, 4)
        ws = np.array([c["se"] for c in x["row_shares"]]).reshape(3, 4)
        g = res["grouped_means"][0]["groups"]
        m = np.array([row["mean"]["estimate"] for row in g])
        ms = np.array([row["mean"]["se"] for row in g])
        J.append(j)
        W.append(w)
        M.append(m)
        seJ.append(js)
        seW.append(ws)
        seM.append(ms)
        for est, se, t in ((j, js, joint_t), (w, ws, within_t), (m, ms, means_t)):
            cover += int((np.abs(est - t) <= 1.959964 * se).sum())
            total += t.size
    for ests, ses, t in ((J, seJ, joint_t), (W, seW, within_t), (M, seM, means_t)):
        avg = np.mean(ests, axis=0)
        se_avg = np.sqrt(np.mean(np.square(ses), axis=0) / len(ests))
        assert np.all(np.abs(avg - t) < 5 * se_avg), (avg, t)
    share = cover / total
    assert 0.90 <= share <= 0.99, share


def test_joint_shares_are_the_product_of_row_estimates(tmp_path):
    """Independent check of the decoder: the cross-tab equals the average of outer products of
    the mechanisms' own per-row estimates, computed here from the extract with pandas."""
    from ldptransform import mechanisms as mech

    df = _data(3000, seed=11)
    raw = tmp_path / "raw.csv"
    df.to_csv(raw, index=False)
    res = privatize(raw, parse_policy(_policy("grr", "sue"), "t"), KEY, tmp_path / "x.parquet", nonce="1" * 32)
    ext = pd.read_parquet(tmp_path / "x.parquet")
    spec_a, spec_b = res.manifest.column("area").mechanism, res.manifest.column("band").mechanism
    assert spec_a is not None and spec_b is not None
    ma, mb = mech.build(spec_a), mech.build(spec_b)
    assert isinstance(ma, mech.FrequencyOracle) and isinstance(mb, mech.FrequencyOracle)
    import pyarrow as pa

    ua = ma.row_estimates([pa.array(ext["area"].astype(str))])
    ub = mb.row_estimates([pa.array(ext["band"].astype(str))])
    got = estimate(tmp_path / "x.parquet", crosstabs=[("area", "band")])["crosstabs"][0]["cells"]
    assert np.allclose([c["estimate"] for c in got], (ua.T @ ub / len(ext)).ravel(), atol=1e-12)


def test_consistency_methods_give_valid_distributions_and_help_on_skewed_data(tmp_path):
    """Norm-Sub and Norm-Mul (Wang, Lopuhaä-Zwakenberg, Li, Škorić, Li, NDSS 2020) return
    non-negative vectors summing to 1; on skewed data (many rare values) their total squared
    error over 30 releases is below that of the raw unbiased estimates; Norm keeps the sum."""
    rng = np.random.default_rng(5)  # synthetic input data only
    cats = [f"c{i}" for i in range(20)]
    p = 0.6 ** np.arange(20)
    p /= p.sum()
    df = pd.DataFrame({"item": np.array(cats)[rng.choice(20, size=3000, p=p)]})
    truth = np.array([(df.item == c).mean() for c in cats])
    raw = tmp_path / "raw.parquet"
    df.to_parquet(raw, index=False)
    lp = parse_policy({"budget": {"epsilon_per_row": 1}, "columns": {
        "item": {"type": "categorical", "categories": cats, "epsilon": 1.0, "mechanism": "oue"}}}, "t")
    err = {"raw": 0.0, "norm-sub": 0.0, "norm-mul": 0.0}
    for r in range(30):
        out = tmp_path / f"e{r}.parquet"
        privatize(raw, lp, KEY, out, nonce=f"{1000 + r:032x}")
        est = np.array([f["estimate"] for f in estimate(out)["columns"]["item"]["frequencies"]])
        for name, v in (("raw", est), ("norm-sub", norm_sub(est)), ("norm-mul", norm_mul(est))):
            if name != "raw":
                assert np.all(v >= 0) and abs(v.sum() - 1) < 1e-12
            err[name] += float(((v - truth) ** 2).sum())
        assert abs(norm_additive(est).sum() - 1) < 1e-12
    assert err["norm-sub"] < err["raw"] and err["norm-mul"] < err["raw"], err


def _concat_release(tmp_path: Path, outs: list[Path]) -> Path:
    """The concatenation of two extracts as one extract, with a manifest edited to match."""
    cat = tmp_path / "concat.parquet"
    pd.concat([pd.read_parquet(o) for o in outs]).to_parquet(cat, index=False)
    m = json.loads((outs[0].with_name(outs[0].stem + ".manifest.json")).read_text())
    m["rows"] = sum(len(pd.read_parquet(o)) for o in outs)
    digest, size = sha256_file(cat)
    m["extract"].update(file=cat.name, sha256=digest, bytes=size)
    cat.with_name("concat.manifest.json").write_text(json.dumps(m))
    return cat


def test_merged_extracts_equal_their_concatenation(tmp_path):
    df1, df2 = _data(1500, seed=1), _data(2500, seed=2)
    lp = parse_policy(_policy("grr", "oue"), "t")
    outs = []
    for i, df in enumerate((df1, df2)):
        raw = tmp_path / f"r{i}.parquet"
        df.to_parquet(raw, index=False)
        out = tmp_path / f"part{i}.parquet"
        privatize(raw, lp, KEY, out, nonce=f"{77 + i:032x}")
        outs.append(out)
    kw: dict[str, Any] = dict(crosstabs=[("area", "band")], mean_by=[("pay", "area")])
    merged = estimate(outs, **kw).to_dict()
    whole = estimate(_concat_release(tmp_path, outs), **kw).to_dict()
    assert merged["rows"] == whole["rows"] == 4000
    merged.pop("extracts")
    assert _close(merged, whole)


def _close(a, b) -> bool:
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_close(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_close(x, y) for x, y in zip(a, b))
    if isinstance(a, float) and isinstance(b, float):
        return abs(a - b) <= 1e-9 * max(1.0, abs(a), abs(b))
    return a == b


def test_merge_refuses_different_specs_and_the_same_release_twice(tmp_path):
    df = _data(300)
    raw = tmp_path / "r.parquet"
    df.to_parquet(raw, index=False)
    a, b = tmp_path / "a.parquet", tmp_path / "b.parquet"
    privatize(raw, parse_policy(_policy("grr", "oue"), "t"), KEY, a)
    privatize(raw, parse_policy(_policy("grr", "sue"), "t"), KEY, b)
    with pytest.raises(UsageError, match="different columns or mechanism specs"):
        estimate([a, b])
    with pytest.raises(UsageError, match="same release"):
        estimate([a, a])


def test_analyses_refuse_unfit_columns(tmp_path):
    df = _data(200)
    raw = tmp_path / "r.parquet"
    df.to_parquet(raw, index=False)
    out = tmp_path / "a.parquet"
    privatize(raw, parse_policy(_policy(), "t"), KEY, out)
    with pytest.raises(UsageError, match="needs a categorical"):
        estimate(out, crosstabs=[("area", "pay")])
    with pytest.raises(UsageError, match="not a privatized column"):
        estimate(out, mean_by=[("pay", "nope")])
    with pytest.raises(UsageError, match="no distribution"):
        estimate(out, ranges=[("pay", 1.0, 2.0)])
