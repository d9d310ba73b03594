"""Held-back people (--allow-partial) do not show in the extract.

The scenario the attack used: a sensitive group of people had an extra release earlier, so on a
later night they are past their lifetime budget and held back.  A partner holds every night's
extract and tries to pick out the held-back people: by the row count, by row positions, or by
aligning nights on the memoized reports (a person's memoized report repeats while the value does
not change).  Held-back people stay in the extract as placeholder rows (their memoized cells keep
the report already released while the value is the recorded one; other cells are reports of
random values), so the row count is the full table's, rows are shuffled, and the alignment flags
the people whose values changed, held back or not: its precision is the base rate.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ldptransform.keys import SecretKey
from ldptransform.policy import parse_policy
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(100, 132)))
N, HELD, CHANGED = 3000, 300, 0.2
COLOURS = ["red", "green", "blue", "amber", "violet", "grey"]


def people(seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # synthetic test data only
    return pd.DataFrame({
        "person": [f"p{i:05d}" for i in range(N)],
        "colour": rng.choice(COLOURS, size=N, p=[0.4, 0.2, 0.15, 0.1, 0.1, 0.05]),
        "score": np.round(rng.beta(2, 5, size=N) * 100, 0),
        "hours": np.round(rng.uniform(0, 60, size=N), 1),
    })


def policy() -> Any:
    return parse_policy({
        "budget": {"epsilon_per_row": 3.0, "lifetime_epsilon": 5.5},
        "subject_key": "person",
        "columns": {
            "colour": {"type": "categorical", "categories": COLOURS, "epsilon": 1.0, "mechanism": "grr",
                       "memoize": True},
            "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": "hybrid",
                      "memoize": True},
            "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0, "mechanism": "hybrid"},
        },
    }, "held-back.yaml")


def release(df: pd.DataFrame, tmp: Path, name: str, nonce: int, **kw: Any) -> Any:
    raw = tmp / f"{name}.csv"
    df.to_csv(raw, index=False)
    steward = tmp.parent / f"{tmp.name}-steward"  # private, apart from what partners receive
    return privatize(raw, policy(), KEY, tmp / f"{name}.parquet", nonce=f"{nonce:032x}",
                     diagnostics_path=steward / f"{name}.json", ledger_path=steward / "ledger.sqlite3", **kw)


@pytest.fixture(scope="module")
def nights(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    tmp = tmp_path_factory.mktemp("held")
    (tmp.parent / f"{tmp.name}-steward").mkdir(mode=0o700)
    with pytest.MonkeyPatch.context() as mp:  # the steward's private state of these nights
        mp.setenv("LDPT_PRIVATE_DIR", str(tmp.parent / f"{tmp.name}-steward"))
        yield _nights(tmp)


def _nights(tmp: Path) -> dict[str, Any]:
    df = people()
    release(df, tmp, "night1", 1)                              # everyone: 3 each
    release(df.iloc[:HELD], tmp, "sensitive", 2)               # the sensitive group: +1 (memoized unchanged)
    release(df.iloc[:HELD], tmp, "sensitive2", 5)              # and +1 again: 5 each
    rng = np.random.default_rng(5)
    df2 = df.copy()
    changed = rng.random(N) < CHANGED                          # a fifth of everyone changes colour
    df2.loc[changed, "colour"] = [COLOURS[(COLOURS.index(c) + 1) % 6] for c in df.loc[changed, "colour"]]
    # the group would reach 6 or 7 > 5.5: held back; the others 4, or 5 with a changed colour
    res = release(df2, tmp, "night2", 3, allow_partial=True)
    return {"tmp": tmp, "res": res, "changed": changed, "held": np.arange(N) < HELD,
            "n1": pd.read_parquet(tmp / "night1.parquet"), "n2": pd.read_parquet(tmp / "night2.parquet")}


def test_the_row_count_is_the_full_tables(nights: dict[str, Any]) -> None:
    res = nights["res"]
    assert res.held_back_subjects == HELD and res.held_back_rows == HELD
    assert res.manifest.rows == N == len(nights["n2"]) == len(nights["n1"])


def test_aligning_nights_by_memoized_reports_picks_held_back_people_at_the_base_rate(nights: dict[str, Any]) -> None:
    """Flag every night-2 row whose memoized reports (colour, score) match no night-1 row: the
    flagged rows are the people whose values changed; the share of held-back people among them
    is the base rate HELD / N within 4 binomial standard errors."""
    n1, n2 = nights["n1"], nights["n2"]
    seen = set(zip(n1["colour"].astype(str), n1["score"].round(9), strict=True))
    flagged = np.array([(c, s) not in seen for c, s in zip(n2["colour"].astype(str), n2["score"].round(9),
                                                           strict=True)])
    # the steward knows which extract row is whose: the extract lists rows by their keyed tags
    from ldptransform.release.shuffle import row_tags, tag_stream

    order = np.argsort(row_tags(tag_stream(KEY, f"{3:032x}"), 0, N), kind="stable")
    held = nights["held"][order]
    changed = nights["changed"][order]
    assert flagged.sum() > 100
    # what the alignment finds is change (a new report), not being held back
    assert (flagged & ~changed).mean() < 0.01
    share = held[flagged].mean()
    base = HELD / N
    se = np.sqrt(base * (1 - base) / flagged.sum())
    assert abs(share - base) < 4 * se, (share, base, se)
    # the held-back people whose values did not change are matched like everyone else
    assert (~flagged[held & ~changed]).all()


def test_a_held_back_person_keeps_one_placeholder_report_night_after_night(nights: dict[str, Any]) -> None:
    """A held-back person whose value changed gets a placeholder, drawn from per-person words: on
    the next night (still held back) the same memoized report, so a repeated change does not mark
    them either."""
    tmp = nights["tmp"]
    df2 = pd.read_csv(tmp / "night2.csv")
    res3 = release(df2, tmp, "night3", 4, allow_partial=True)
    assert res3.held_back_subjects >= HELD
    n2, n3 = nights["n2"], pd.read_parquet(tmp / "night3.parquet")
    from ldptransform.release.shuffle import row_tags, tag_stream

    pos2 = np.argsort(np.argsort(row_tags(tag_stream(KEY, f"{3:032x}"), 0, N), kind="stable"))
    pos3 = np.argsort(np.argsort(row_tags(tag_stream(KEY, f"{4:032x}"), 0, N), kind="stable"))
    held_changed = np.flatnonzero(nights["held"] & nights["changed"])
    assert len(held_changed) > 20
    np.testing.assert_array_equal(n2["colour"].astype(str).to_numpy()[pos2[held_changed]],
                                  n3["colour"].astype(str).to_numpy()[pos3[held_changed]])


def test_the_extract_alone_tells_little_about_who_is_a_placeholder(nights: dict[str, Any]) -> None:
    """A partner who knows the population's distribution exactly scores each row by the
    likelihood ratio of its fresh (non-memoized) report under placeholder versus real values.
    Reports are eps-LDP, so this can only be weak: the measured AUC is printed and must stay
    below 0.6 (an AUC of 0.5 is chance; eps 1 bounds the likelihood ratio by e)."""
    n2 = nights["n2"]
    from ldptransform.release.shuffle import row_tags, tag_stream

    order = np.argsort(row_tags(tag_stream(KEY, f"{3:032x}"), 0, N), kind="stable")
    held = nights["held"][order]
    # hours is uniform in the data too, so its report says nothing; colour (memoized) is what a
    # partner could score, and a held-back person's unchanged colour is their real report
    colour = n2["colour"].astype(str).to_numpy()
    p_real = pd.Series(people()["colour"]).value_counts(normalize=True).reindex(COLOURS).to_numpy()
    ratio = float(np.exp(1.0))  # the column's eps is 1
    k = len(COLOURS)
    q = (p_real * ratio + (1 - p_real)) / (ratio + k - 1)  # P(report = c) for real values (k-ary RR)
    u = np.full(k, 1 / k)                                    # placeholders: uniform values
    q_u = (u * ratio + (1 - u)) / (ratio + k - 1)
    score = pd.Series(colour).map(dict(zip(COLOURS, q_u / q, strict=True))).to_numpy()
    from scipy.stats import mannwhitneyu

    auc = mannwhitneyu(score[held], score[~held]).statistic / (held.sum() * (~held).sum())
    print("placeholder-detection AUC from the extract alone:", auc)
    assert auc < 0.6


def test_validate_does_not_call_a_release_with_placeholder_rows_wrong(nights: dict[str, Any]) -> None:
    """The steward's re-derivation cannot replay the ledger that decided who was held back: for a
    release with placeholder rows it says so (not checked) rather than "different values"."""
    from ldptransform.validate import validate

    tmp = nights["tmp"]
    rep = validate(tmp / "night2.parquet", raw=tmp / "night2.csv", key=KEY)
    check = {c.name: c for c in rep.checks}["reproduced"]
    assert check.ok is None and "placeholder rows" in check.detail, check
