"""The four newer mechanisms (hadamard, subset, matrix, discrete-laplace) through the whole
pipeline: a policy file and a raw CSV/Parquet file -> privatize -> estimate -> validate.

Data: an invented staff survey of the Alderbank Water Cooperative, a fictional organisation
(the same fiction as conftest.py), drawn with numpy's seeded generator (input data only;
all release noise comes from the tool's keyed PRF).  Keys and nonces are fixed, so every
statistical check below is deterministic; the tolerances are stated where they are used
(estimates within 5 standard errors of the truth, decoder SEs within 10% of the exact SE).

Also: `mechanism: auto` picking subset for a medium domain, slicing invariance of the
randomization (``release.MAX_WORDS_PER_CALL``), and policy mistakes about the new fields
refused through the command line (exit 2, one paragraph, nothing written).
"""

from __future__ import annotations

import hashlib
import json
import math
import subprocess
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml

import ldptransform.release.kernel as release_mod
from conftest import assert_user_error, listing, partials, write_fixed_key
from ldptransform import mechanisms as mech
from ldptransform.estimate import estimate
from ldptransform.keys import SecretKey
from ldptransform.random import KeyedStream
from ldptransform.policy import load_policy
from ldptransform.release import DEFAULT_BATCH_ROWS, privatize
from ldptransform.validate import validate

KEY = SecretKey(bytes(range(60, 92)))   # fixed key: the statistical checks cannot flake
NONCE = "5eed0000000000000000000000000a11"
ROWS = 30_000
Z_LIMIT = 5.0          # every estimate within 5 standard errors of the true value
SE_TOLERANCE = 0.10    # the decoder's SE within 10% of the exact SE for these data

SITES = ["North Works", "Riverside", "Old Mill", "Harbour Lab", "Head Office"]
TEAMS = ["Meter reading", "Mains repair", "Treatment", "Sampling", "Laboratory", "Billing",
         "Customer desk", "Planning", "Fleet", "IT", "Finance", "People"]
BANDS = [f"B{i}" for i in range(1, 9)]
MISSING, OTHER = "<missing>", "<other>"


# -- invented data ---------------------------------------------------------------------------

def survey(n: int, seed: int = 2031) -> pd.DataFrame:
    """n invented survey rows.  site has 5% missing and 2% answers outside the declared sites;
    weekly_hours has 3% missing and 2% above the policy's upper bound of 70 (clipped)."""
    rng = np.random.default_rng(seed)  # invented input data only, never release noise
    team_p = np.arange(len(TEAMS), 0, -1, dtype=float)
    site = rng.choice(SITES, size=n, p=[.34, .26, .18, .14, .08]).astype(object)
    u = rng.random(n)
    site[u < 0.05] = None
    site[(u >= 0.05) & (u < 0.07)] = "Dockside Depot"
    hours = np.round(rng.normal(37.0, 9.0, n), 1)
    v = rng.random(n)
    hours[v < 0.02] = 84.0
    hours[(v >= 0.02) & (v < 0.05)] = np.nan
    return pd.DataFrame({
        "staff_id": [f"AWC-{i:06d}" for i in range(n)],
        "site": site,
        "team": rng.choice(TEAMS, size=n, p=team_p / team_p.sum()),
        "band": rng.choice(BANDS, size=n, p=[.05, .1, .2, .25, .2, .1, .06, .04]),
        "weekly_hours": hours,
        "pay": np.round(rng.lognormal(10.75, 0.35, n), 0),
    })


def known_sites(df: pd.DataFrame) -> pd.DataFrame:
    """The survey with the answers outside the declared sites recoded to 'Old Mill'."""
    return df.assign(site=df["site"].where(df["site"] != "Dockside Depot", "Old Mill"))


def write_raw(df: pd.DataFrame, path: Path) -> Path:
    if path.suffix == ".csv":
        df.to_csv(path, index=False)
    else:
        df.to_parquet(path, index=False)
    return path


def write_policy(path: Path, policy: dict[str, Any]) -> Path:
    path.write_text(yaml.safe_dump(policy, sort_keys=False), encoding="utf-8")
    return path


def grr_like(eps: float, k: int) -> list[list[float]]:
    """e^eps/(e^eps+k-1) on the diagonal, 1/(e^eps+k-1) elsewhere: every column ratio is e^eps."""
    e = math.exp(eps)
    return [[e / (e + k - 1) if i == j else 1.0 / (e + k - 1) for j in range(k)] for i in range(k)]


def cyclic(k: int) -> list[list[float]]:
    """A custom (non-GRR) matrix: 0.4 on the diagonal, 0.2 on the next category (cyclically),
    0.1 elsewhere (k = 6: rows sum to 1).  Each column holds 0.4, 0.2 and 0.1s, so the eps it
    gives is ln 4 = 1.386."""
    assert k == 6
    return [[0.4 if j == i else 0.2 if j == (i + 1) % k else 0.1 for j in range(k)] for i in range(k)]


# -- the truth, computed from the invented data without the tool ----------------------------

def true_shares(df: pd.DataFrame, column: str, labels: list[str], missing: bool, other: bool) -> np.ndarray:
    s = df[column]
    vals = s.where(s.notna(), MISSING if missing else None)
    if other:
        vals = vals.where(vals.isin(labels), OTHER)
    return np.array([(vals == lab).mean() for lab in labels])


def true_values(df: pd.DataFrame, column: str, lo: float, hi: float, fill: float) -> np.ndarray:
    return np.clip(df[column].fillna(fill).to_numpy(dtype=float), lo, hi)


# -- the single-mechanism cases --------------------------------------------------------------

CASES: dict[str, dict[str, Any]] = {
    "hadamard": dict(
        column="team", raw="raw.csv", out="extract.parquet",
        policy={"type": "categorical", "categories": TEAMS, "epsilon": 1.0, "mechanism": "hadamard",
                "quality": {"max_se": 0.05}},
        spec={"mechanism": "hadamard", "epsilon": 1.0, "categories": TEAMS}),
    "subset (default size)": dict(
        column="team", raw="raw.parquet", out="extract.csv",
        policy={"type": "categorical", "categories": TEAMS, "epsilon": 1.0, "mechanism": "subset",
                "quality": {"max_se": 0.05}},
        spec={"mechanism": "subset", "epsilon": 1.0, "categories": TEAMS, "subset_size": 3}),
    "subset (subset_size 8, more than half of k)": dict(
        column="team", raw="raw.csv", out="extract.csv",
        policy={"type": "categorical", "categories": TEAMS, "epsilon": 2.0, "mechanism": "subset",
                "subset_size": 8},
        spec={"mechanism": "subset", "epsilon": 2.0, "categories": TEAMS, "subset_size": 8}),
    "matrix (custom, missing as a category)": dict(
        column="site", raw="raw.parquet", out="extract.parquet", known_sites_only=True,
        policy={"type": "categorical", "categories": SITES, "epsilon": 1.5, "mechanism": "matrix",
                "missing": "as-category", "matrix": cyclic(6), "quality": {"max_se": 0.05}},
        spec={"mechanism": "matrix", "epsilon": 1.5, "categories": SITES + [MISSING], "matrix": cyclic(6)}),
    "matrix (GRR-like at exactly the column's eps, missing and unknown)": dict(
        column="site", raw="raw.csv", out="extract.csv",
        policy={"type": "categorical", "categories": SITES, "epsilon": 1.0, "mechanism": "matrix",
                "missing": "as-category", "unknown": "as-category", "matrix": grr_like(1.0, 7)},
        spec={"mechanism": "matrix", "epsilon": 1.0, "categories": SITES + [MISSING, OTHER],
              "matrix": grr_like(1.0, 7)}),
    "discrete-laplace (grid 28)": dict(
        column="weekly_hours", raw="raw.csv", out="extract.parquet",
        policy={"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "mechanism": "discrete-laplace",
                "grid": 28, "missing": {"fill": 37.5}, "quality": {"max_relative_se": 0.05}},
        spec={"mechanism": "discrete-laplace", "epsilon": 1.0, "bounds": [0.0, 70.0], "grid": 28}),
    "discrete-laplace (grid 7, a step that is no short decimal)": dict(
        column="pay", raw="raw.parquet", out="extract.csv",
        policy={"type": "numeric", "bounds": [24000, 140000], "epsilon": 0.7, "mechanism": "discrete-laplace",
                "grid": 7},
        spec={"mechanism": "discrete-laplace", "epsilon": 0.7, "bounds": [24000.0, 140000.0], "grid": 7}),
}


@pytest.fixture(scope="module")
def data() -> pd.DataFrame:
    return survey(ROWS)


def _release(tmp_path: Path, df: pd.DataFrame, raw_name: str, out_name: str, columns: dict[str, Any],
             eps_row: float) -> tuple[Path, Path, Any]:
    raw = write_raw(df, tmp_path / raw_name)
    policy = {"budget": {"epsilon_per_row": eps_row}, "unlisted": "drop", "columns": columns}
    lp = load_policy(write_policy(tmp_path / "policy.yaml", policy))
    res = privatize(raw, lp, KEY, tmp_path / out_name, nonce=NONCE)
    return raw, tmp_path / out_name, res


def _check_frequencies(col: dict[str, Any], labels: list[str], truth: np.ndarray, m: Any, n: int) -> None:
    assert [f["value"] for f in col["frequencies"]] == labels
    est = np.array([f["estimate"] for f in col["frequencies"]])
    se = np.array([f["se"] for f in col["frequencies"]])
    assert np.all(se > 0)
    z = (est - truth) / se
    assert np.all(np.abs(z) < Z_LIMIT), dict(zip(labels, np.round(z, 2)))
    # exact SE for these data: the spread of the per-row estimates is the mechanism's exact
    # variance (averaged over the rows) plus the spread of the true indicators f(1 - f)
    exact = np.sqrt((m.variance(truth) + truth * (1 - truth)) / n)
    ratio = se / exact
    assert np.all(np.abs(ratio - 1) < SE_TOLERANCE), dict(zip(labels, np.round(ratio, 3)))
    if m.name in ("subset", "matrix"):
        # every report supports exactly m values (subset), or W = P^-1 has rows summing to 1
        # (matrix): each per-row estimate then sums to 1 over the values, and so does the total
        assert abs(est.sum() - 1.0) < 1e-9, est.sum()


def _check_mean(col: dict[str, Any], x: np.ndarray, m: Any) -> None:
    mean = col["mean"]
    z = (mean["estimate"] - x.mean()) / mean["se"]
    assert abs(z) < Z_LIMIT, z
    exact = math.sqrt((float(np.mean(m.variance(x))) + float(x.var())) / x.size)
    assert abs(mean["se"] / exact - 1) < SE_TOLERANCE, (mean["se"], exact)


def _assert_validates(extract: Path, raw: Path) -> Any:
    rep = validate(extract, raw=raw, key=KEY)
    statuses = {c.name: c.status for c in rep.checks}
    # without a public key the signature is not checked (a warn, by design); everything else passes
    assert statuses.pop("signature") == "warn", statuses
    assert rep.ok and set(statuses.values()) == {"pass"}, [c.as_dict() for c in rep.checks if c.status != "pass"]
    for name in ("extract hash", "privacy budget", "no key material", "key matches", "columns", "row count",
                 "output alphabet", "fit", "quality", "reproduced", "calibration"):
        assert statuses.get(name) == "pass", (name, statuses)
    assert rep.calibration is not None and rep.calibration["max_abs_z"] < rep.calibration["z_limit"]
    return rep


@pytest.mark.parametrize("case", list(CASES))
def test_new_mechanism_through_the_pipeline(case: str, tmp_path: Path, data: pd.DataFrame) -> None:
    c = CASES[case]
    name, pol, spec = c["column"], c["policy"], c["spec"]
    if c.get("known_sites_only"):
        data = known_sites(data)
    raw, extract, res = _release(tmp_path, data, c["raw"], c["out"], {name: pol}, eps_row=pol["epsilon"])

    # the manifest records the exact mechanism spec, and it rebuilds to the same spec
    manifest = json.loads(res.manifest_path.read_text(encoding="utf-8"))
    entry = next(e for e in manifest["columns"] if e["name"] == name)
    assert entry["mechanism"] == spec
    assert entry["chosen_because"] is None  # named in the policy, not chosen by auto
    assert mech.build(entry["mechanism"]).to_spec() == spec
    assert manifest["rows"] == ROWS and manifest["extract"]["columns"] == [name]
    assert manifest["privacy"]["epsilon_per_row_used"] == pol["epsilon"]
    assert [o["meaning"] for o in entry["outputs"]] and all(o["meaning"] for o in entry["outputs"])

    # estimate: every frequency / the mean within 5 SE of the truth, SEs as the exact variance says
    m = mech.build(spec)
    result = estimate(extract)
    col = result["columns"][name]
    assert result["rows"] == ROWS and col["mechanism"] == spec["mechanism"]
    if pol["type"] == "categorical":
        labels = spec["categories"]
        truth = true_shares(data, name, labels, MISSING in labels, OTHER in labels)
        _check_frequencies(col, labels, truth, m, ROWS)
    else:
        lo, hi = pol["bounds"]
        fill = pol.get("missing", {}).get("fill", 0.0)
        assert data[name].notna().all() or "missing" in pol
        _check_mean(col, true_values(data, name, lo, hi, fill), m)

    # validate: every check passes, bit-for-bit reproduction and calibration included
    _assert_validates(extract, raw)


def test_discrete_laplace_reports_lie_on_the_grid_and_beyond_the_bounds(tmp_path: Path, data: pd.DataFrame) -> None:
    """The written values are lo + j * step for integers j, and (to stay unbiased) many fall
    outside the bounds; a value moved off the lattice is caught by validate's alphabet check."""
    c = CASES["discrete-laplace (grid 28)"]
    raw, extract, _ = _release(tmp_path, data, c["raw"], "dl.csv", {c["column"]: c["policy"]}, eps_row=1.0)
    vals = pd.read_csv(extract)["weekly_hours"].to_numpy()
    j = vals / 2.5
    assert np.all(np.abs(j - np.round(j)) < 1e-9)
    assert (vals < 0).mean() > 0.1 and (vals > 70).mean() > 0.1
    # move one value off the lattice
    text = extract.read_text(encoding="utf-8").splitlines()
    text[1] = str(float(text[1]) + 0.3)
    extract.write_text("\n".join(text) + "\n", encoding="utf-8")
    rep = validate(extract)
    status = {ch.name: ch for ch in rep.checks}
    assert status["output alphabet"].status == "fail" and "weekly_hours 1" in status["output alphabet"].detail
    assert status["extract hash"].status == "fail"


# -- all four together through the command line -----------------------------------------------

COMBINED = {
    "budget": {"epsilon_per_row": 4.5},
    "columns": {
        "staff_id": {"type": "drop"},
        "site": {"type": "categorical", "categories": SITES, "epsilon": 1.5, "mechanism": "matrix",
                 "missing": "as-category", "unknown": "as-category", "matrix": grr_like(1.2, 7)},
        "team": {"type": "categorical", "categories": TEAMS, "epsilon": 1.0, "mechanism": "subset"},
        "band": {"type": "categorical", "categories": BANDS, "epsilon": 1.0, "mechanism": "hadamard"},
        "weekly_hours": {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "mechanism": "discrete-laplace",
                         "grid": 14, "missing": {"fill": 37.5}},
        "pay": {"type": "drop"},
    },
}


def test_cli_privatize_estimate_validate_all_four(tmp_path: Path, data: pd.DataFrame, ldpt) -> None:
    df = data.iloc[:12_000]
    raw = write_raw(df, tmp_path / "survey.csv")
    pol = write_policy(tmp_path / "policy.yaml", COMBINED)
    key = write_fixed_key(tmp_path / "release.key")
    out = tmp_path / "extract.parquet"
    res = ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", out, "--nonce", NONCE, "--quiet")
    assert res.returncode == 0, res.stderr
    manifest = json.loads(out.with_name("extract.manifest.json").read_text(encoding="utf-8"))
    assert [e["mechanism"]["mechanism"] for e in manifest["columns"]] == ["matrix", "subset", "hadamard",
                                                                         "discrete-laplace"]
    assert manifest["privacy"]["epsilon_per_row_used"] == pytest.approx(4.5, abs=1e-12)

    res = ldpt("estimate", out, "--format", "json")
    assert res.returncode == 0, res.stderr
    cols = json.loads(res.stdout)["columns"]
    n = len(df)
    for name, spec_cats in (("site", SITES + [MISSING, OTHER]), ("team", TEAMS), ("band", BANDS)):
        truth = true_shares(df, name, spec_cats, MISSING in spec_cats, OTHER in spec_cats)
        entry = next(e for e in manifest["columns"] if e["name"] == name)
        _check_frequencies(cols[name], spec_cats, truth, mech.build(entry["mechanism"]), n)
    entry = next(e for e in manifest["columns"] if e["name"] == "weekly_hours")
    _check_mean(cols["weekly_hours"], true_values(df, "weekly_hours", 0, 70, 37.5), mech.build(entry["mechanism"]))

    res = ldpt("validate", out, "--raw", raw, "--key", key, "--format", "json")
    assert res.returncode == 0, res.stdout + res.stderr
    rep = json.loads(res.stdout)
    assert rep["ok"] and {c["status"] for c in rep["checks"] if c["check"] != "signature"} == {"pass"}, rep["checks"]
    assert [c["status"] for c in rep["checks"] if c["check"] == "signature"] == ["warn"]  # no public key given
    assert {"reproduced", "calibration", "output alphabet"} <= {c["check"] for c in rep["checks"]}


def test_strategy_sample_with_the_new_mechanisms(tmp_path: Path, data: pd.DataFrame) -> None:
    """budget.strategy sample, 2 of 4 columns per row at eps 1 each (2.0 / 2): unreported cells
    are empty in every output type (int32 index, subset string, dictionary label, float), the
    reporting rows decode within 5 SE of the whole table's truth, and validate passes."""
    cols = {
        "site": {"type": "categorical", "categories": SITES, "mechanism": "matrix", "missing": "as-category",
                 "unknown": "as-category", "matrix": grr_like(0.9, 7)},
        "team": {"type": "categorical", "categories": TEAMS, "mechanism": "subset"},
        "band": {"type": "categorical", "categories": BANDS, "mechanism": "hadamard"},
        "weekly_hours": {"type": "numeric", "bounds": [0, 70], "mechanism": "discrete-laplace", "grid": 10,
                         "missing": {"fill": 37.5}},
    }
    raw = write_raw(data, tmp_path / "raw.parquet")
    policy = {"budget": {"epsilon_per_row": 2.0, "strategy": "sample", "sample_columns": 2}, "unlisted": "drop",
              "columns": cols}
    lp = load_policy(write_policy(tmp_path / "policy.yaml", policy))
    res = privatize(raw, lp, KEY, tmp_path / "extract.csv", nonce=NONCE)
    assert all(e.mechanism is not None and e.mechanism["epsilon"] == 1.0 for e in res.manifest.columns)
    ext = pd.read_csv(tmp_path / "extract.csv", dtype=str, keep_default_na=False)
    reported = (ext != "").to_numpy()
    assert np.all(reported.sum(axis=1) == 2)
    assert np.all(np.abs(reported.mean(axis=0) - 0.5) < 0.02)

    result = estimate(tmp_path / "extract.csv")
    specs = {e.name: e.mechanism for e in res.manifest.columns if e.mechanism is not None}
    for name in ("site", "team", "band"):
        col = result["columns"][name]
        labels = specs[name]["categories"]
        truth = true_shares(data, name, labels, MISSING in labels, OTHER in labels)
        _check_frequencies(col, labels, truth, mech.build(specs[name]), col["rows_reported"])
    col = result["columns"]["weekly_hours"]
    x = true_values(data, "weekly_hours", 0, 70, 37.5)
    mean = col["mean"]
    assert abs(mean["estimate"] - x.mean()) < Z_LIMIT * mean["se"]
    assert 0.45 * ROWS < col["rows_reported"] < 0.55 * ROWS
    _assert_validates(tmp_path / "extract.csv", raw)


# -- mechanism: auto ------------------------------------------------------------------------------

def test_auto_picks_subset_for_a_medium_domain(tmp_path: Path, data: pd.DataFrame) -> None:
    """k = 12 at eps 1: subset selection (m = 3) has the lowest exact total variance of the
    candidates, and the manifest's reason quotes every candidate's efficiency against the
    lower bound.  A small domain (k = 3 at eps 1) stays with GRR."""
    df = data.iloc[:20_000]
    cols = {"team": {"type": "categorical", "categories": TEAMS, "epsilon": 1.0},
            "grade": {"type": "categorical", "categories": ["A", "B", "C"], "epsilon": 1.0}}
    df = df.assign(grade=np.where(df["band"].isin(BANDS[:3]), "A", np.where(df["band"].isin(BANDS[3:6]), "B", "C")))
    raw, extract, res = _release(tmp_path, df, "raw.parquet", "extract.parquet", cols, eps_row=2.0)
    entries = {e.name: e for e in res.manifest.columns}

    team = entries["team"]
    # the size with the lowest total variance, found here from the generic p*, q* formula
    by_size = {s: mech.SubsetSelection(1.0, TEAMS, s).total_variance() for s in range(1, 12)}
    best = min(by_size, key=lambda s: by_size[s])
    assert best == 3
    assert team.mechanism == {"mechanism": "subset", "epsilon": 1.0, "categories": TEAMS, "subset_size": best}
    why = team.chosen_because
    assert why is not None and "lowest total variance" in why and "lower bound" in why
    bound = mech.bounds.frequency_lower_bound(1.0, 12)
    assert f"subset {by_size[best]:.4g} (efficiency {bound / by_size[best]:.3f})" in why, why
    for name in ("grr", "hadamard", "olh", "subset", "oue"):
        assert f"{name} " in why and "efficiency" in why.split(f"{name} ", 1)[1].split(")")[0], (name, why)
    # every other candidate is strictly worse
    others = {m.name: m.total_variance() for m in (mech.GRR(1.0, TEAMS), mech.HadamardResponse(1.0, TEAMS),
                                                   mech.OLH(1.0, TEAMS), mech.OUE(1.0, TEAMS))}
    assert all(v > by_size[best] * 1.05 for v in others.values()), others
    assert entries["grade"].mechanism["mechanism"] == "grr"

    result = estimate(extract)
    truth = true_shares(df, "team", TEAMS, False, False)
    _check_frequencies(result["columns"]["team"], TEAMS, truth, mech.build(team.mechanism), len(df))
    _assert_validates(extract, raw)


# -- slicing invariance ------------------------------------------------------------------------

SLICED = {
    "budget": {"epsilon_per_row": 6.0},
    "unlisted": "drop",
    "columns": {
        "team": {"type": "categorical", "categories": TEAMS, "epsilon": 1.0, "mechanism": "subset"},
        "skill": {"type": "categorical", "categories": [f"S{i:02d}" for i in range(40)], "epsilon": 1.0,
                  "mechanism": "subset", "subset_size": 25},
        "band": {"type": "categorical", "categories": BANDS, "epsilon": 1.0, "mechanism": "hadamard"},
        "site": {"type": "categorical", "categories": SITES, "epsilon": 1.0, "mechanism": "matrix",
                 "missing": "as-category", "unknown": "as-category", "matrix": grr_like(1.0, 7)},
        "weekly_hours": {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "mechanism": "discrete-laplace",
                         "grid": 70, "missing": {"fill": 37.5}},
        "pay": {"type": "numeric", "bounds": [24000, 140000], "epsilon": 1.0, "mechanism": "discrete-laplace",
                "grid": 3},
    },
}


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_slicing_does_not_change_the_extract(fmt: str, tmp_path: Path, data: pd.DataFrame,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    """Words are addressed by global row (and, for discrete-laplace, by (row, draw)), so
    randomizing in slices of 64 words instead of 2^22 gives a byte-identical extract, also
    with batches that end in the middle of a slice."""
    rng = np.random.default_rng(5)  # invented input data only
    df = data.iloc[:2000].assign(skill=rng.choice([f"S{i:02d}" for i in range(40)], size=2000))
    raw = write_raw(df, tmp_path / "raw.parquet")
    lp = load_policy(write_policy(tmp_path / "policy.yaml", SLICED))

    def run(tag: str, batch_rows: int = DEFAULT_BATCH_ROWS) -> str:  # the extract's sha256
        res = privatize(raw, lp, KEY, tmp_path / f"{tag}.{fmt}", nonce=NONCE, batch_rows=batch_rows)
        return res.manifest.extract.sha256

    whole = run("whole")
    assert hashlib.sha256((tmp_path / f"whole.{fmt}").read_bytes()).hexdigest() == whole

    calls: list[int] = []
    original = KeyedStream.words

    def counting(self, row0, n, width):
        if self.label.startswith("column"):  # the columns' words (not the row-order tags, drawn per batch)
            calls.append(n)
        return original(self, row0, n, width)

    monkeypatch.setattr(release_mod, "MAX_WORDS_PER_CALL", 64)
    monkeypatch.setattr(KeyedStream, "words", counting)
    assert run("sliced") == whole
    # the patch did slice: the 40-value subset column (16 words, 5 output words a row) goes
    # 4 rows at a time, discrete-laplace 32 rows at a time, so there were hundreds of calls
    assert len(calls) > 500 and max(calls) <= 32, (len(calls), max(calls))
    monkeypatch.setattr(release_mod, "MAX_WORDS_PER_CALL", 200)
    assert run("sliced-batched", batch_rows=777) == whole
    monkeypatch.undo()
    # and the comparison can fail: another nonce gives another extract
    other = privatize(raw, lp, KEY, tmp_path / f"other.{fmt}", nonce="0" * 31 + "1").manifest.extract.sha256
    assert other != whole


# -- policy mistakes, through the command line --------------------------------------------------

BASE_COLUMNS: dict[str, Any] = {
    "site": {"type": "categorical", "categories": SITES, "epsilon": 1.0, "mechanism": "matrix",
             "missing": "as-category", "matrix": grr_like(1.0, 6)},
    "team": {"type": "categorical", "categories": TEAMS, "epsilon": 1.0, "mechanism": "subset"},
    "weekly_hours": {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "mechanism": "discrete-laplace",
                     "grid": 28, "missing": {"fill": 37.5}},
}


def _column(name: str, **fields: Any) -> Callable[[dict[str, Any]], None]:
    def edit(p: dict[str, Any]) -> None:
        p["columns"][name].update(fields)
        for k, v in list(p["columns"][name].items()):
            if v is None:
                del p["columns"][name][k]
    return edit


def _sample_thirds(p: dict[str, Any]) -> None:
    """strategy sample, 3 of 3 columns per row at epsilon_per_row 2: each column gets
    2/3 = 0.6666666666666666 (a float whose decimal text is no short fraction)."""
    p["budget"] = {"epsilon_per_row": 2.0, "strategy": "sample", "sample_columns": 3}
    for c in p["columns"].values():
        c.pop("epsilon", None)
    p["columns"]["site"].update(matrix=grr_like(0.6, 6))


def _matrix_on_bins(p: dict[str, Any]) -> None:
    p["columns"]["pay"] = {"type": "numeric", "bins": [0, 30000, 60000, 1e6], "epsilon": 0.5, "mechanism": "matrix"}
    p["budget"]["epsilon_per_row"] = 3.5


def _five_by_five() -> list[list[float]]:
    return grr_like(1.0, 5)


def _eps_too_high() -> list[list[float]]:
    """GRR-like at eps ln 5 = 1.6094379...: 0.5 on the diagonal, 0.1 elsewhere; every column
    ratio is 5, above the column's e^1."""
    return [[0.5 if i == j else 0.1 for j in range(6)] for i in range(6)]


LN5 = f"{math.log(5.0):.10g}"

BAD_POLICIES: dict[str, tuple[Callable[[dict[str, Any]], None], list[str]]] = {
    "matrix 5x5 without <missing>": (_column("site", matrix=_five_by_five()),
                                     ["'site'", "matrix", "5 rows", "6 categories", "'<missing>'"]),
    "matrix row of the wrong length": (_column("site", matrix=grr_like(1.0, 6)[:5] + [[0.5, 0.5]]),
                                       ["'site'", "matrix", "2 entries", "6 x 6"]),
    "matrix eps above the column's": (_column("site", matrix=_eps_too_high()),
                                      ["'site'", "matrix", f"eps = {LN5}", "column's eps 1", "column 0",
                                       f"at least {math.ceil(math.log(5) * 1e6) / 1e6:.6f}"]),
    "matrix entry zero": (_column("site", matrix=[[1.0, 0, 0, 0, 0, 0]] + grr_like(1.0, 6)[1:]),
                          ["'site'", "matrix", "strictly positive"]),
    "matrix row not summing to 1": (_column("site", matrix=[[0.5] * 6] + grr_like(1.0, 6)[1:]),
                                    ["'site'", "matrix", "sums to 3", "not 1"]),
    "matrix entry quoted": (_column("site", matrix=[[str(v) for v in grr_like(1.0, 6)[0]]] + grr_like(1.0, 6)[1:]),
                            ["'site'", "matrix"]),
    "matrix mechanism without matrix": (_column("site", matrix=None),
                                        ["'site'", "matrix", "North Works", "<missing>"]),
    "matrix on grr": (_column("site", mechanism="grr"), ["'site'", "matrix", "mechanism matrix"]),
    "matrix on bins": (_matrix_on_bins, ["'pay'", "matrix", "bins"]),
    "subset_size k": (_column("team", subset_size=12), ["'team'", "subset_size", "1 to 11", "got 12"]),
    "subset_size zero": (_column("team", subset_size=0), ["'team'", "subset_size", "1 to 11", "got 0"]),
    "subset_size not whole": (_column("team", subset_size=2.5), ["'team'", "subset_size"]),
    "subset_size true": (_column("team", subset_size=True), ["'team'", "subset_size"]),
    "subset_size on oue": (_column("team", mechanism="oue", subset_size=3),
                           ["'team'", "subset_size", "mechanism subset"]),
    "subset_size with auto": (_column("team", mechanism=None, subset_size=3),
                              ["'team'", "subset_size", "mechanism subset"]),
    "subset_size on a numeric column": (_column("weekly_hours", subset_size=3), ["'weekly_hours'", "subset_size"]),
    "discrete-laplace eps not exact": (_column("weekly_hours", epsilon=0.30000000000000004),
                                       ["'weekly_hours'", "epsilon", "0.30000000000000004", "2^48"]),
    "discrete-laplace eps not exact under sample": (_sample_thirds,
                                                    ["'weekly_hours'", "epsilon_per_row", "sample_columns"]),
    "discrete-laplace grid zero": (_column("weekly_hours", grid=0), ["'weekly_hours'", "grid", "got 0"]),
    "discrete-laplace grid too large": (_column("weekly_hours", grid=5000), ["'weekly_hours'", "grid", "4096"]),
    "discrete-laplace grid not whole": (_column("weekly_hours", grid=2.5), ["'weekly_hours'", "grid"]),
    "discrete-laplace grid true": (_column("weekly_hours", grid=True), ["'weekly_hours'", "grid"]),
    "grid on a categorical column": (_column("team", grid=8), ["'team'", "grid"]),
}


@pytest.fixture(scope="module")
def small_raw(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("raw")
    return write_raw(known_sites(survey(60, seed=3))[["site", "team", "weekly_hours", "pay"]], d / "survey.csv")


@pytest.mark.parametrize("case", list(BAD_POLICIES))
def test_bad_policy_is_refused_by_privatize(case: str, tmp_path: Path, small_raw: Path, private_dir: Path,
                                           ldpt) -> None:
    edit, names = BAD_POLICIES[case]
    p = {"budget": {"epsilon_per_row": 3.0}, "unlisted": "drop", "columns": json.loads(json.dumps(BASE_COLUMNS))}
    edit(p)
    work = tmp_path / "work"
    work.mkdir()
    pol = write_policy(work / "bad_policy.yaml", p)
    key = write_fixed_key(tmp_path / "release.key")
    before = listing(work)
    raw_hash = hashlib.sha256(small_raw.read_bytes()).hexdigest()

    res: subprocess.CompletedProcess = ldpt("privatize", small_raw, "--policy", pol, "--key", key,
                                            "--out", work / "extract.parquet")
    assert_user_error(res, ["bad_policy.yaml", *names])
    # nothing written: no extract, manifest, partial file or steward diagnostics; input untouched
    assert listing(work) == before and partials(work) == []
    assert listing(private_dir) == []
    assert hashlib.sha256(small_raw.read_bytes()).hexdigest() == raw_hash


def test_the_base_policy_of_the_bad_cases_is_accepted(tmp_path: Path, small_raw: Path, ldpt) -> None:
    """The cases above fail because of their one edit, not because of the base policy."""
    p = {"budget": {"epsilon_per_row": 3.0}, "unlisted": "drop", "columns": BASE_COLUMNS}
    pol = write_policy(tmp_path / "policy.yaml", p)
    key = write_fixed_key(tmp_path / "release.key")
    res = ldpt("privatize", small_raw, "--policy", pol, "--key", key, "--out", tmp_path / "x.parquet", "--quiet")
    assert res.returncode == 0, res.stderr
    assert (tmp_path / "x.parquet").exists() and (tmp_path / "x.manifest.json").exists()
