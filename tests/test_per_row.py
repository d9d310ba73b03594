"""The partner's per-row reader ``ldptransform.read_estimates`` (ldptransform/perrow.py).

Checked: the mean of every frame column equals ``estimate``'s point estimate (relative 1e-9) on a
release with every kind of column (categorical, binned, numeric, missing-as-answer, a distribution
mechanism left out with a note, public passed through), from one file, from dataset parts and from
CSV; the same frame from the field metadata alone; ``budget.strategy: sample`` (unreported cells 0,
reported ones divided by the share reported, means still ``estimate``'s); the caution's claims by
Monte Carlo on one fixed-key release (group means over a public column and the mean of a product
of two privatized columns unbiased within 5 SE; a square and a product of two categories of one
column biased by more than 10 SE); refusals (no description, altered extract, clashing names).
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import ldptransform
from conftest import DEMO_CSV, survey_policy
from ldptransform.errors import DataError, ManifestError
from ldptransform.estimate import estimate
from ldptransform.keys import SecretKey
from ldptransform.perrow import CAUTION, read_estimates
from ldptransform.policy import parse_policy
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(130, 162)))
NONCES = [f"{0xC0 + i:032x}" for i in range(12)]
REL = 1e-9
MC_SE = 5.0


def _policy(distribution: str = "hierarchy") -> Any:
    pol = survey_policy()
    pol["budget"]["epsilon_per_row"] = 9.0
    pol["columns"]["weekly_hours"] = {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "missing": "as-answer"}
    pol["columns"]["pay"] = {"type": "numeric", "bounds": [24000, 140000], "epsilon": 1.0, "mechanism": distribution}
    pol["columns"]["satisfaction"]["mechanism"] = "matrix"
    pol["columns"]["satisfaction"]["matrix"] = (np.full((6, 6), 0.13) + np.eye(6) * 0.22).tolist()
    pol["columns"]["site"]["mechanism"] = "hadamard"
    return parse_policy(pol, "test")


def _assert_means_are_estimates(frame: pd.DataFrame, extract: Path, manifest: Path | None = None) -> None:
    res = estimate(extract, manifest)
    checked = 0
    for name, col in res.columns.items():
        if col.family == "frequency":
            for f in col.frequencies:
                assert frame[f"{name}={f.value}"].mean() == pytest.approx(f.estimate, rel=REL, abs=1e-12)
                checked += 1
        elif col.family == "mean" and col.frequencies:          # missing: as-answer
            assert col.mean is not None
            share = frame[f"{name}=<missing>"].mean()
            assert share == pytest.approx(col.frequencies[0].estimate, rel=REL, abs=1e-12)
            assert frame[f"{name}*present"].mean() / (1 - share) == pytest.approx(col.mean.estimate, rel=REL)
            checked += 2
        elif col.family == "mean":
            assert col.mean is not None
            assert frame[name].mean() == pytest.approx(col.mean.estimate, rel=REL)
            checked += 1
        else:
            assert name in frame.attrs["left_out"] and not any(c.startswith(name) for c in frame.columns)
    assert checked > 10


@pytest.mark.parametrize("layout", ["file", "dataset", "csv"])
def test_frame_means_are_the_estimates(layout: str, tmp_path: Path) -> None:
    out = tmp_path / {"file": "e.parquet", "dataset": "parts", "csv": "e.csv"}[layout]
    # a CSV extract: square-wave (estimate reads hierarchy's int8 level column of a CSV extract as text)
    distribution = "square-wave" if layout == "csv" else "hierarchy"
    res = privatize(DEMO_CSV, _policy(distribution), KEY, out, nonce=NONCES[0],
                    fragment_rows=2500 if layout == "dataset" else None)
    frame = read_estimates(res.extract_path)
    _assert_means_are_estimates(frame, res.extract_path)
    raw = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False)
    assert len(frame) == len(raw) and isinstance(frame.index, pd.RangeIndex)
    # public: passed through as released (rows shuffled, so compare as multisets)
    assert sorted(frame["survey_wave"]) == sorted(raw["survey_wave"])
    assert frame.attrs["caution"] == CAUTION
    assert set(frame.attrs["columns"]) == set(frame.columns)
    assert "NOT protected" in frame.attrs["columns"]["survey_wave"]
    assert frame.attrs["left_out"] == ["pay"]
    assert any(n.startswith("pay: ") and distribution in n for n in frame.attrs["notes"])
    assert [c for c in frame.columns if c.startswith("weekly_hours")] == ["weekly_hours=<missing>",
                                                                          "weekly_hours*present"]
    assert {f"site={s}" for s in ["North Works", "Riverside", "<other>"]} <= set(frame.columns)
    assert ldptransform.read_estimates is read_estimates


def test_the_field_metadata_alone_gives_the_same_frame(tmp_path: Path) -> None:
    res = privatize(DEMO_CSV, _policy(), KEY, tmp_path / "e.parquet", nonce=NONCES[1])
    with_manifest = read_estimates(res.extract_path, res.manifest_path)
    alone = tmp_path / "alone"
    alone.mkdir()
    shutil.copy(res.extract_path, alone / "e.parquet")
    frame = read_estimates(alone / "e.parquet")
    pd.testing.assert_frame_equal(frame, with_manifest)
    assert frame.attrs == with_manifest.attrs
    _assert_means_are_estimates(frame, res.extract_path)


def test_budget_strategy_sample(tmp_path: Path) -> None:
    """Unreported cells are 0, reported ones divided by the share of rows that reported the column;
    every mean is still estimate's (its average over the reporting rows)."""
    pol = survey_policy()
    pol["budget"] = {"epsilon_per_row": 6.0, "strategy": "sample", "sample_columns": 2}
    for c in pol["columns"].values():
        c.pop("epsilon", None)
    res = privatize(DEMO_CSV, parse_policy(pol, "test"), KEY, tmp_path / "s.parquet", nonce=NONCES[2])
    frame = read_estimates(res.extract_path)
    _assert_means_are_estimates(frame, res.extract_path)
    table = pq.read_table(res.extract_path)
    n = table.num_rows
    reported = np.asarray(table.column("pay").is_valid())
    share = reported.mean()
    assert 0.1 < share < 0.6
    assert (frame.loc[~reported, "pay"] == 0).all()
    written = table.column("pay").to_numpy(zero_copy_only=False)[reported]
    np.testing.assert_allclose(frame.loc[reported, "pay"], written * n / reported.sum(), rtol=1e-12)
    assert any("budget.strategy sample" in note for note in frame.attrs["notes"])


# -- the caution's claims, by Monte Carlo on one fixed-key release ----------------------------------

N_MC = 40_000


@pytest.fixture
def synthetic(tmp_path: Path) -> dict[str, Any]:
    rng = np.random.default_rng(2026)
    group = rng.choice(["east", "west", "north"], size=N_MC, p=[0.5, 0.3, 0.2])
    score = np.clip(rng.normal(np.where(group == "east", 40.0, 65.0), 12.0), 0, 100).round(2)
    kind = np.where(rng.random(N_MC) < np.where(score > 50, 0.7, 0.2), "a", np.where(rng.random(N_MC) < 0.5, "b", "c"))
    df = pd.DataFrame({"group": group, "score": score, "kind": kind})
    raw = tmp_path / "raw.parquet"
    df.to_parquet(raw, index=False)
    pol = {"budget": {"epsilon_per_row": 4.0}, "columns": {
        "group": {"type": "public"},
        "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 2.0, "mechanism": "piecewise"},
        "kind": {"type": "categorical", "categories": ["a", "b", "c"], "epsilon": 2.0, "mechanism": "grr"}}}
    res = privatize(raw, parse_policy(pol, "test"), KEY, tmp_path / "e.parquet", nonce=NONCES[3])
    frame = read_estimates(res.extract_path)
    return {"df": df, "frame": frame}


def _z(est: pd.Series, truth: float) -> float:
    return abs(float(est.mean()) - truth) / (float(est.std(ddof=1)) / np.sqrt(len(est)))


def test_what_the_caution_says_is_valid_is_unbiased(synthetic: dict[str, Any]) -> None:
    df, frame = synthetic["df"], synthetic["frame"]
    assert sorted(frame["group"]) == sorted(df["group"])
    for g in ("east", "west", "north"):        # means over groups of a PUBLIC column
        rows, true_rows = frame["group"] == g, df["group"] == g
        assert _z(frame.loc[rows, "score"], df.loc[true_rows, "score"].mean()) <= MC_SE
        assert _z(frame.loc[rows, "kind=a"], (df.loc[true_rows, "kind"] == "a").mean()) <= MC_SE
    # the difference of two group means: its SE from the two groups' spreads
    e, w = frame.loc[frame["group"] == "east", "score"], frame.loc[frame["group"] == "west", "score"]
    diff = e.mean() - w.mean()
    truth = df.loc[df["group"] == "east", "score"].mean() - df.loc[df["group"] == "west", "score"].mean()
    assert abs(diff - truth) <= MC_SE * np.sqrt(e.var() / len(e) + w.var() / len(w))
    # the product of two different privatized input columns: independent noise, unbiased mean
    product = frame["score"] * frame["kind=a"]
    assert _z(product, float((df["score"] * (df["kind"] == "a")).mean())) <= MC_SE


def test_what_the_caution_says_is_not_valid_is_biased(synthetic: dict[str, Any]) -> None:
    df, frame = synthetic["df"], synthetic["frame"]
    assert _z(frame["score"] ** 2, float((df["score"] ** 2).mean())) > 10 * MC_SE   # a square: noise variance added
    assert _z(frame["kind=a"] * frame["kind=b"], 0.0) > 10 * MC_SE                  # two categories of one column
    assert frame["score"].var() > 4 * df["score"].var()                            # the spread is mostly noise
    assert abs(frame["score"].quantile(0.1) - df["score"].quantile(0.1)) > 10.0   # quantiles are not estimates
    assert frame["score"].min() < df["score"].min() - 10.0                         # nor are minima


# -- refusals ---------------------------------------------------------------------------------------

def test_a_csv_extract_needs_its_manifest(tmp_path: Path) -> None:
    res = privatize(DEMO_CSV, _policy("square-wave"), KEY, tmp_path / "e.csv", nonce=NONCES[4])
    alone = tmp_path / "alone"
    alone.mkdir()
    shutil.copy(res.extract_path, alone / "e.csv")
    with pytest.raises(ManifestError, match="CSV extract carries no column metadata") as err:
        read_estimates(alone / "e.csv")
    assert err.value.exit_code == 2 and "manifest=" in str(err.value)
    frame = read_estimates(alone / "e.csv", res.manifest_path)
    _assert_means_are_estimates(frame, res.extract_path)


def test_an_altered_extract_is_refused(tmp_path: Path) -> None:
    res = privatize(DEMO_CSV, _policy(), KEY, tmp_path / "e.parquet", nonce=NONCES[5])
    table = pq.read_table(res.extract_path)
    pq.write_table(table.slice(0, table.num_rows - 1), res.extract_path)
    with pytest.raises(ManifestError, match="does not match manifest") as err:
        read_estimates(res.extract_path)
    assert err.value.exit_code == 2


def test_a_public_column_named_like_a_category_column_is_refused(tmp_path: Path) -> None:
    df = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False)
    df["role=Laboratory"] = "x"
    raw = tmp_path / "raw.csv"
    df.to_csv(raw, index=False)
    pol = survey_policy()
    pol["columns"]["role=Laboratory"] = {"type": "public"}
    res = privatize(raw, parse_policy(pol, "test"), KEY, tmp_path / "e.parquet", nonce=NONCES[6])
    with pytest.raises(DataError, match="'role=Laboratory'") as err:
        read_estimates(res.extract_path)
    assert err.value.exit_code == 2


def test_a_public_parquet_column_keeps_its_type(tmp_path: Path) -> None:
    df = pd.read_csv(DEMO_CSV)
    df["year"] = np.int64(2026)
    df["satisfaction"] = df["satisfaction"].astype("Int64")
    raw = tmp_path / "raw.parquet"
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), raw)
    pol = survey_policy()
    pol["columns"]["year"] = {"type": "public"}
    res = privatize(raw, parse_policy(pol, "test"), KEY, tmp_path / "e.parquet", nonce=NONCES[7])
    frame = read_estimates(res.extract_path)
    assert frame["year"].dtype == np.int64 and (frame["year"] == 2026).all()
    _assert_means_are_estimates(frame, res.extract_path)
