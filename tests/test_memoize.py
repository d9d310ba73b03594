"""Memoized randomness ("permanent randomized response"): a column with ``memoize: true``
draws its words from a PRF keyed by (key, column, subject, value) instead of (nonce, row),
so a person whose value does not change gets the same report in every release.

The idea is the permanent randomized response of Erlingsson, Pihur and Korolova (ACM CCS
2014); numeric columns are
first rounded to a coarse grid with a per-person random offset (alpha-point rounding: Ding,
Kulkarni, Yekhanin, "Collecting Telemetry Data Privately", NeurIPS 2017).

Data: invented people with invented identifiers, drawn with numpy's seeded generator (input
data only; all release noise comes from the tool's keyed PRF).  Keys and nonces are fixed, so
every statistical check is deterministic; tolerances are stated where they are used (5
standard errors; chi-square p-value above 1e-6).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes
from scipy import stats

from conftest import assert_policy_refused
from ldptransform.keys import SecretKey
from ldptransform.random import SubjectPRF
from ldptransform.policy import parse_policy
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(100, 132)))  # fixed key: the statistical checks cannot flake
NIGHTS = [f"{i:032x}" for i in range(1, 51)]  # fixed nonces of 50 "nightly" releases
Z_LIMIT = 5.0
COLOURS = ["red", "green", "blue", "white", "black"]
EPS = 1.0


def people(n: int, seed: int = 7) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # invented input data only, never release noise
    ids = np.array([f"person-{i:06d}" for i in range(n)], dtype=object)
    return pd.DataFrame({
        "person": ids,
        "colour": rng.choice(COLOURS, size=n, p=[.4, .25, .15, .12, .08]),
        "score": np.round(rng.beta(2, 5, size=n) * 100, 2),
        "hours": np.round(rng.uniform(0, 60, size=n), 1),
    })


def policy(**over: Any) -> dict[str, Any]:
    p: dict[str, Any] = {
        "budget": {"epsilon_per_row": 3.0},
        "subject_key": "person",
        "output": {"row_order": "as-input"},  # these tests align a person's reports across nights by row
        "columns": {
            "colour": {"type": "categorical", "categories": list(COLOURS), "epsilon": EPS, "mechanism": "grr",
                       "memoize": True},
            "score": {"type": "numeric", "bounds": [0, 100], "epsilon": EPS, "mechanism": "hybrid",
                      "memoize": True},
            "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": EPS, "mechanism": "hybrid"},
        },
    }
    p.update(over)
    return p


def release(df: pd.DataFrame, pol: dict[str, Any], tmp: Path, nonce: str, name: str, **kw: Any) -> pd.DataFrame:
    raw = tmp / f"{name}.csv"
    df.to_csv(raw, index=False)
    out = tmp / f"{name}.parquet"
    privatize(raw, parse_policy(pol, "memo.yaml"), KEY, out, nonce=nonce,
              diagnostics_path=tmp.parent / f"{tmp.name}-{name}.diag.json", **kw)  # not beside the extract
    return pd.read_parquet(out)


# -- the PRF itself -------------------------------------------------------------------------

def _aes(key: bytes, block: bytes) -> bytes:
    enc = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
    return enc.update(block) + enc.finalize()


def test_subject_prf_matches_a_plain_one_row_computation() -> None:
    """The vectorized seeds equal a one-message-at-a-time encrypted CBC-MAC of
    [u64 length || u64 code] + subject bytes zero-padded, and a row's seed and words do not
    depend on the other rows evaluated with it (lengths 0..40 bytes, several block counts)."""
    prf = SubjectPRF(KEY, "report", "col", b"ctx")
    subjects = [b"", b"a", b"person-000001", b"x" * 16, b"y" * 17, "n\u00e9e-\u00e5".encode(), b"z" * 40]
    codes = np.array([0, 3, 1, 2, 7, 2**40, 5], dtype=np.int64)
    data = np.frombuffer(b"".join(subjects), dtype=np.uint8)
    offs = np.concatenate([[0], np.cumsum([len(s) for s in subjects])]).astype(np.int64)
    seeds = prf.seeds(data, offs, codes)
    chain = KEY.subkey("memoized/v1", "report", "col", b"ctx", "chain")
    final = KEY.subkey("memoized/v1", "report", "col", b"ctx", "final")
    expand = KEY.subkey("memoized/v1", "report", "col", b"ctx", "expand")
    words = prf.words(seeds, 3)
    for i, (s, c) in enumerate(zip(subjects, codes)):
        state = _aes(chain, len(s).to_bytes(8, "big") + int(c).to_bytes(8, "big"))
        padded = s + bytes(-len(s) % 16)
        for b in range(0, len(padded), 16):
            state = _aes(chain, bytes(x ^ y for x, y in zip(state, padded[b:b + 16])))
        seed = _aes(final, state)
        assert bytes(seeds[i]) == seed
        w0 = _aes(expand, seed[:8] + bytes(x ^ y for x, y in zip(seed[8:], (0).to_bytes(8, "big"))))
        w1 = _aes(expand, seed[:8] + bytes(x ^ y for x, y in zip(seed[8:], (1).to_bytes(8, "big"))))
        assert list(words[i]) == list(np.frombuffer(w0 + w1, dtype="<u8")[:3])
        alone = prf.seeds(np.frombuffer(s, dtype=np.uint8), np.array([0, len(s)]), codes[i:i + 1])
        assert bytes(alone[0]) == seed
    # another value code, another column label, another key: other seeds
    assert bytes(prf.seeds(data[:1], np.array([0, 1]), np.array([4]))[0]) != bytes(seeds[1])
    other = SubjectPRF(KEY, "report", "col2", b"ctx").seeds(data, offs, codes)
    assert not (other == seeds).all(axis=1).any()


# -- repeated releases ---------------------------------------------------------------------

@pytest.fixture(scope="module")
def nights(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    tmp = tmp_path_factory.mktemp("nights")
    df = people(3000)
    a = release(df, policy(), tmp, NIGHTS[0], "night1")
    b = release(df, policy(), tmp, NIGHTS[1], "night2")
    return {"df": df, "a": a, "b": b, "tmp": tmp}


def test_same_subject_and_value_give_the_same_report_every_night(nights: dict[str, Any]) -> None:
    a, b = nights["a"], nights["b"]
    assert "person" not in a.columns  # the subject is never released
    assert (a["colour"] == b["colour"]).all()
    assert (a["score"] == b["score"]).all()
    # the column without memoize gets fresh randomness each night (hybrid: most reports differ)
    assert (a["hours"] != b["hours"]).mean() > 0.5


def test_a_changed_value_gets_a_fresh_report(nights: dict[str, Any]) -> None:
    """Half the people change colour (to the next one).  Unchanged rows keep their report; a
    changed row's report is a fresh, independent grr draw, so it equals the old one with
    probability sum_y P(y|old) P(y|new) = 2pq + (k-2)q^2 (within 5 SE over the changed rows)."""
    df, a = nights["df"], nights["a"]
    df2 = df.copy()
    changed = np.arange(len(df)) % 2 == 0
    nxt = {c: COLOURS[(i + 1) % len(COLOURS)] for i, c in enumerate(COLOURS)}
    df2.loc[changed, "colour"] = df2.loc[changed, "colour"].map(nxt)
    b = release(df2, policy(), nights["tmp"], NIGHTS[2], "night3")
    assert (a["colour"][~changed] == b["colour"][~changed]).all()
    k, e = len(COLOURS), np.exp(EPS)
    p, q = e / (e + k - 1), 1 / (e + k - 1)
    same_rate = 2 * p * q + (k - 2) * q * q
    same = (a["colour"][changed].to_numpy() == b["colour"][changed].to_numpy())
    se = np.sqrt(same_rate * (1 - same_rate) / same.size)
    assert abs(same.mean() - same_rate) < Z_LIMIT * se, (same.mean(), same_rate)
    # numeric: a large change (about 10 grid steps) gives a new rounded value, hence fresh words
    df3 = df.copy()
    df3["score"] = np.where(df["score"] < 50, df["score"] + 30, df["score"] - 30)
    c = release(df3, policy(), nights["tmp"], NIGHTS[3], "night4")
    assert (a["score"] != c["score"]).mean() > 0.5


def test_row_order_and_batch_size_do_not_matter(nights: dict[str, Any]) -> None:
    df, a, tmp = nights["df"], nights["a"], nights["tmp"]
    perm = np.random.default_rng(11).permutation(len(df))  # shuffles the invented input only
    s = release(df.iloc[perm].reset_index(drop=True), policy(), tmp, NIGHTS[4], "shuffled")
    for col in ("colour", "score"):
        assert (s[col].to_numpy() == a[col].to_numpy()[perm]).all()
    small = release(df, policy(), tmp, NIGHTS[0], "batches", batch_rows=97)
    pd.testing.assert_frame_equal(small, a)


def test_rows_sharing_subject_and_value_are_identical(tmp_path: Path) -> None:
    df = people(400)
    dup = pd.concat([df, df.iloc[::-1]], ignore_index=True)  # every person twice, same values
    out = release(dup, policy(), tmp_path, NIGHTS[5], "dup")
    first, second = out.iloc[:400], out.iloc[400:].iloc[::-1].reset_index(drop=True)
    assert (first["colour"].to_numpy() == second["colour"].to_numpy()).all()
    assert (first["score"].to_numpy() == second["score"].to_numpy()).all()


# -- memoization does not bias the channel ---------------------------------------------------

def test_report_distribution_matches_the_exact_channel(tmp_path: Path) -> None:
    """40,000 distinct people: for each true colour the reported colours follow grr's exact
    channel (chi-square p-value > 1e-6, and every cell within 5 SE), and the memoized hybrid
    reports of the score average to the true mean within 5 SE (the SE is the sample SD of the
    reports over sqrt(n): it includes the rounding noise of the memo grid)."""
    df = people(40_000, seed=21)
    out = release(df, policy(), tmp_path, NIGHTS[6], "channel")
    k, e = len(COLOURS), np.exp(EPS)
    p, q = e / (e + k - 1), 1 / (e + k - 1)
    for i, c in enumerate(COLOURS):
        rep = out["colour"][df["colour"] == c].to_numpy()
        counts = np.array([(rep == d).sum() for d in COLOURS])
        expected = np.full(k, q)
        expected[i] = p
        chi = stats.chisquare(counts, expected * rep.size)
        assert chi.pvalue > 1e-6, (c, counts, chi)
        se = np.sqrt(expected * (1 - expected) / rep.size)
        assert (np.abs(counts / rep.size - expected) < Z_LIMIT * se).all(), (c, counts)
    y = out["score"].to_numpy()
    se = y.std(ddof=1) / np.sqrt(y.size)
    assert abs(y.mean() - df["score"].mean()) < Z_LIMIT * se, (y.mean(), df["score"].mean(), se)


def test_memo_rounding_is_unbiased_and_within_the_stated_variance() -> None:
    """The coarse rounding alone (before the randomizer): over 200,000 people with the same
    value, the rounded values average to it within 5 SE and their variance is frac(1-frac)
    step^2 <= step^2/4 (within 10%)."""
    from ldptransform.release import ColumnPlan, memo_round, memo_streams

    loaded = parse_policy(policy(), "memo.yaml")
    rc = loaded.by_name["score"]
    plan = ColumnPlan(rc, [])
    plan.memo, plan.memo_offset = memo_streams(KEY, rc)
    n = 200_000
    ids = [f"p{i}" for i in range(n)]
    data = np.frombuffer("".join(ids).encode(), dtype=np.uint8)
    offs = np.concatenate([[0], np.cumsum([len(s) for s in ids])]).astype(np.int64)
    step = 100 / 32
    x = np.full(n, 41.3)
    r, j = memo_round(plan, x, (data, offs))
    frac = (41.3 / step) % 1
    assert set(np.unique(j)) == {13, 14}
    assert abs(r.mean() - 41.3) < Z_LIMIT * r.std() / np.sqrt(n)
    assert abs(r.var() / (frac * (1 - frac) * step**2) - 1) < 0.10
    assert r.var() <= step**2 / 4


# -- the averaging attack ----------------------------------------------------------------------

def test_averaging_fifty_nights_recovers_nothing_with_memoization(tmp_path: Path) -> None:
    """300 people whose score never changes, released on 50 nights with two-point (eps 1).
    Without memoization the per-person average of the 50 reports converges to the value (its
    RMSE falls below 0.3 x that of one night: expected 1/sqrt(50) = 0.14); with memoization all
    50 reports are identical, so the average is exactly as far from the value as one report."""
    df = people(300, seed=5)[["person", "score"]]
    raw = tmp_path / "people.csv"
    df.to_csv(raw, index=False)
    truth = df["score"].to_numpy()
    rmse: dict[bool, tuple[float, float]] = {}
    for memo in (True, False):
        col: dict[str, Any] = {"type": "numeric", "bounds": [0, 100], "epsilon": EPS, "mechanism": "two-point"}
        if memo:
            col["memoize"] = True
        loaded = parse_policy({"budget": {"epsilon_per_row": EPS}, "subject_key": "person",
                               "output": {"row_order": "as-input"},  # the attacker aligns people by row
                               "columns": {"score": col}}, "memo.yaml")
        reports = []
        with pytest.MonkeyPatch.context() as mp:  # the nights' nonces under two policies: one steward state each
            mp.setenv("LDPT_PRIVATE_DIR", str(tmp_path.parent / f"{tmp_path.name}-steward-{int(memo)}"))
            for i, nonce in enumerate(NIGHTS):
                out = tmp_path / f"n{int(memo)}_{i}.parquet"
                privatize(raw, loaded, KEY, out, nonce=nonce,
                          diagnostics_path=tmp_path.parent / f"{tmp_path.name}-d{int(memo)}_{i}.json")
                reports.append(pd.read_parquet(out)["score"].to_numpy())
        r = np.array(reports)
        one = float(np.sqrt(np.mean((r[0] - truth) ** 2)))
        avg = float(np.sqrt(np.mean((r.mean(axis=0) - truth) ** 2)))
        rmse[memo] = (one, avg)
        if memo:
            assert (r == r[0]).all()
            assert avg == pytest.approx(one, rel=1e-12)  # the average of 50 identical reports
    assert rmse[False][1] < 0.3 * rmse[False][0], rmse
    print("averaging attack RMSE (one night, 50-night average):", rmse)


# -- manifest ----------------------------------------------------------------------------------

def test_manifest_records_memoization_and_never_the_subject(nights: dict[str, Any]) -> None:
    tmp = nights["tmp"]
    text = (tmp / "night1.manifest.json").read_text() if (tmp / "night1.manifest.json").exists() else \
        next(tmp.glob("night1*.json")).read_text()
    m = json.loads(text)
    cols = {c["name"]: c for c in m["columns"]}
    assert "person" not in cols and "person" not in m["extract"]["columns"]
    assert "memoized: true" in cols["colour"]["note"] and "memoized: true" in cols["score"]["note"]
    assert "memo_grid = 32" in cols["score"]["note"]
    assert cols["hours"].get("note") is None
    assert m["policy"]["subject_key"] == "person" and m["policy"]["columns"]["score"]["memoize"] is True
    assert "person-000" not in text  # no identifier leaks into the manifest
    comp = m["privacy"]["composition"]
    assert "memoized columns: colour, score (rounded to a grid of 32 steps" in comp
    assert "same report in every release" in comp and "shows that the value changed" in comp


def test_policy_check_shows_memoization_and_the_subject(tmp_path: Path, ldpt) -> None:
    pol = policy()
    pol["budget"]["lifetime_epsilon"] = 12.5
    path = tmp_path / "memo.json"
    path.write_text(json.dumps(pol))
    res = ldpt("policy", "check", path)
    assert res.returncode == 0, res.stderr
    rows = {line.split("│")[1].strip(): line for line in res.stdout.splitlines() if line.count("│") > 3}
    assert "yes (grid 32)" in rows["score"] and "yes" in rows["colour"]
    assert "yes" not in rows["hours"]
    assert "subject_key: person" in res.stdout and "lifetime_epsilon: 12.5" in res.stdout


# -- bad policies ------------------------------------------------------------------------------

def _no_subject(p: dict) -> None:
    del p["subject_key"]


def _public_subject(p: dict) -> None:
    p["columns"]["person"] = {"type": "public"}


def _missing_subject(p: dict) -> None:
    p["subject_key"] = "patient_no"


def _memo_dlap(p: dict) -> None:
    p["columns"]["hours"] = {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0, "mechanism": "discrete-laplace",
                             "memoize": True}


def _grid_without_memo(p: dict) -> None:
    p["columns"]["hours"]["memo_grid"] = 8


BAD = {
    "memoize without subject_key": (_no_subject, ["'colour'", "memoize", "subject_key"]),
    "subject_key listed as public": (_public_subject, ["'person'", "subject_key", "type: drop"]),
    "subject_key not in the input": (_missing_subject, ["subject_key", "'patient_no'", "'person'"]),
    "memoize on discrete-laplace": (_memo_dlap, ["'hours'", "memoize", "discrete-laplace"]),
    "memo_grid without memoize": (_grid_without_memo, ["'hours'", "memo_grid"]),
}


@pytest.mark.parametrize("case", list(BAD))
def test_bad_memo_policies_are_refused(case: str, tmp_path: Path, private_dir: Path, ldpt) -> None:
    edit, names = BAD[case]
    p = policy()
    edit(p)
    assert_policy_refused(ldpt, tmp_path, private_dir, p, people(50), names)


def test_missing_subject_values_are_refused(tmp_path: Path) -> None:
    from ldptransform.errors import DataError

    df = people(20)
    df.loc[[3, 7], "person"] = None
    with pytest.raises(DataError, match=r"subject_key.*2 value\(s\) in this batch, the first at data row 4"):
        release(df, policy(), tmp_path, NIGHTS[0], "holes")
    assert not (tmp_path / "holes.parquet").exists()
