"""`privatize` charges the spend ledger: memoized columns cost eps only when a person's value
changed since the last recorded release, budget.lifetime_epsilon caps the lifetime spend
(refused before anything is written, or --allow-partial releases only the people within it),
and nothing raw reaches the ledger or the manifest.

Data: invented people with invented identifiers, drawn with numpy's seeded generator (input
data only; all release noise comes from the tool's keyed PRF).  Keys and nonces are fixed.
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from conftest import listing, partials, write_fixed_key, write_policy
from ldptransform.errors import LdptError, UsageError
from ldptransform.keys import SecretKey
from ldptransform.ledger import BudgetExhaustedError, Ledger, subject_hashes
from ldptransform.policy import parse_policy
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(100, 132)))
NIGHT1, NIGHT2, NIGHT3 = (f"{i:032x}" for i in (11, 12, 13))
COLOURS = ["red", "green", "blue", "white", "black"]
N = 400


def people(n: int = N, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # invented input data only, never release noise
    return pd.DataFrame({
        "person": [f"person-{i:06d}" for i in range(n)],
        "colour": rng.choice(COLOURS, size=n),
        "score": np.round(rng.uniform(0, 100, size=n), 2),
        "hours": np.round(rng.uniform(0, 60, size=n), 1),
    })


def policy(cap: float | None = None) -> dict[str, Any]:
    p: dict[str, Any] = {
        "budget": {"epsilon_per_row": 3.0},
        "subject_key": "person",
        "output": {"row_order": "as-input"},  # these tests compare a person's reports across nights by row
        "columns": {
            "colour": {"type": "categorical", "categories": list(COLOURS), "epsilon": 1.0, "mechanism": "grr",
                       "memoize": True},
            "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "mechanism": "hybrid",
                      "memoize": True},
            "hours": {"type": "numeric", "bounds": [0, 60], "epsilon": 1.0, "mechanism": "hybrid"},
        },
    }
    if cap is not None:
        p["budget"]["lifetime_epsilon"] = cap
    return p


def policy_without_subject(cap: float | None = None) -> dict[str, Any]:
    """The test policy without subject_key and without memoized columns."""
    p = policy(cap)
    del p["subject_key"]
    for c in p["columns"].values():
        c.pop("memoize", None)
    return p


def steward(tmp: Path) -> Path:
    """A steward-only folder beside ``tmp`` (diagnostics never go where the extract goes)."""
    d = tmp.parent / f"{tmp.name}-steward"
    d.mkdir(mode=0o700, exist_ok=True)
    return d


def run(df: pd.DataFrame, pol: dict[str, Any], tmp: Path, nonce: str, name: str, ledger: Path, **kw: Any):
    raw = tmp / f"{name}.csv"
    df.to_csv(raw, index=False)
    return privatize(raw, parse_policy(pol, "ledger-release.yaml"), KEY, tmp / f"{name}.parquet", nonce=nonce,
                     diagnostics_path=steward(tmp) / f"{name}.diag.json", ledger_path=ledger, **kw)


def spent(ledger: Path, ids: list[str]) -> np.ndarray:
    with Ledger.open(ledger, create=False) as led:
        return led.spent(subject_hashes(KEY, ids))


def release_spend(ledger: Path, rid: int) -> np.ndarray:
    with Ledger.open(ledger, create=False) as led:
        return np.sort(led.release_spend(rid)[1])


def test_unchanged_memoized_values_cost_only_the_other_columns(tmp_path: Path) -> None:
    df = people()
    led = tmp_path / "ledger.sqlite3"
    r1 = run(df, policy(), tmp_path, NIGHT1, "night1", led)
    r2 = run(df, policy(), tmp_path, NIGHT2, "night2", led)
    assert (r1.ledger_release_id, r2.ledger_release_id) == (1, 2)
    np.testing.assert_allclose(release_spend(led, 1), np.full(N, 3.0))
    np.testing.assert_allclose(release_spend(led, 2), np.full(N, 1.0))  # only hours, not memoized
    np.testing.assert_allclose(spent(led, list(df["person"])), np.full(N, 4.0))
    # the memoized reports are indeed the same both nights (so charging nothing for them is right)
    a, b = pd.read_parquet(tmp_path / "night1.parquet"), pd.read_parquet(tmp_path / "night2.parquet")
    assert (a["colour"] == b["colour"]).all() and np.array_equal(a["score"], b["score"])
    assert not np.array_equal(a["hours"], b["hours"])
    with Ledger.open(led, create=False) as lg:
        assert lg.verify().ok
        cols = json.loads(sqlite3.connect(led).execute("SELECT columns FROM releases WHERE id = 2").fetchone()[0])
    assert cols == {"colour": {"eps": 1.0, "memoized": True}, "hours": {"eps": 1.0, "memoized": False},
                    "score": {"eps": 1.0, "memoized": True}}
    man = json.loads((tmp_path / "night2.manifest.json").read_text())
    assert man["extract"]["sha256"] == sqlite3.connect(led).execute(
        "SELECT extract_sha256 FROM releases WHERE id = 2").fetchone()[0]


def test_the_record_uses_the_state_the_pre_pass_checked(tmp_path: Path, monkeypatch) -> None:
    """A release reads and checks the ledger's state once (its pre-pass); its record, with nobody
    writing the ledger in between, uses that state instead of reading it again, and the ledger it
    leaves is the one a record that reads again would leave (verify intact, same spend)."""
    df = people()
    led = tmp_path / "ledger.sqlite3"
    run(df, policy(cap=10.0), tmp_path, NIGHT1, "night1", led)
    reads: list[str] = []
    real_get = Ledger._get

    def counted(self: Ledger, name: str) -> bytes:
        reads.append(name)
        return real_get(self, name)

    monkeypatch.setattr(Ledger, "_get", counted)
    df2 = df.assign(colour=df["colour"].where(df.index % 4 != 0, "red"))
    run(df2, policy(cap=10.0), tmp_path, NIGHT2, "night2", led)
    assert reads.count("subjects") == 1  # the pre-pass's read only
    monkeypatch.undo()
    ids = list(df["person"])
    with Ledger.open(led, readonly=True) as check:
        assert check.verify().ok
        two = check.spent(subject_hashes(KEY, ids))
    changed = (df2["colour"] != df["colour"]).to_numpy()
    np.testing.assert_allclose(two, np.where(changed, 3.0 + 2.0, 3.0 + 1.0))


def test_changed_value_is_charged_and_rows_of_one_subject_add_up(tmp_path: Path) -> None:
    df = people()
    led = tmp_path / "ledger.sqlite3"
    run(df, policy(), tmp_path, NIGHT1, "night1", led)
    df2 = df.copy()
    changed = np.arange(0, 40)  # 40 people change colour, 10 of them also their score by a lot
    df2.loc[changed, "colour"] = [COLOURS[(COLOURS.index(c) + 1) % 5] for c in df.loc[changed, "colour"]]
    far = np.arange(0, 10)
    df2.loc[far, "score"] = np.where(df.loc[far, "score"] < 50, 99.0, 1.0)
    dup = df2.iloc[[100]]  # person 100 appears twice tonight (same values)
    df2 = pd.concat([df2, dup], ignore_index=True)
    run(df2, policy(), tmp_path, NIGHT2, "night2", led)
    ids = list(df["person"])
    s = spent(led, ids)
    expect = np.full(N, 4.0)
    expect[changed] += 1.0
    expect[far] += 1.0
    expect[100] += 1.0  # its second row: hours again (memoized columns unchanged)
    np.testing.assert_allclose(s, expect)
    # a third night back to the first night's colours is charged again (the last recorded value differs)
    run(df, policy(), tmp_path, NIGHT3, "night3", led)
    s3 = spent(led, ids)
    np.testing.assert_allclose(s3[40:], s[40:] + 1.0)
    np.testing.assert_allclose(s3[10:40], s[10:40] + 2.0)
    np.testing.assert_allclose(s3[:10], s[:10] + 3.0)


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {n: (folder / n).read_bytes() for n in listing(folder) if (folder / n).is_file()}


def test_cap_refuses_before_writing_anything(tmp_path: Path, private_dir: Path) -> None:
    df = people()
    led = tmp_path / "ledger.sqlite3"
    run(df, policy(cap=5.5), tmp_path, NIGHT1, "night1", led)  # 3 each
    run(df, policy(cap=5.5), tmp_path, NIGHT2, "night2", led)  # +1 each: 4
    df3 = df.copy()
    df3.loc[:6, "colour"] = [COLOURS[(COLOURS.index(c) + 1) % 5] for c in df.loc[:6, "colour"]]  # 7 people
    raw = tmp_path / "night3.csv"
    df3.to_csv(raw, index=False)
    before, before_private = _snapshot(tmp_path), _snapshot(private_dir)
    with pytest.raises(BudgetExhaustedError) as err:
        privatize(raw, parse_policy(policy(cap=5.5), "p.yaml"), KEY, tmp_path / "night3.parquet", nonce=NIGHT3,
                  ledger_path=led)
    msg = str(err.value)
    assert "7 subject(s)" in msg and "by up to 0.5" in msg and "nothing was written" in msg
    assert "person-" not in msg
    assert _snapshot(tmp_path) == before  # no extract, manifest, partial file; ledger bytes unchanged
    assert _snapshot(private_dir) == before_private  # no diagnostics either
    assert not partials(tmp_path)
    with Ledger.open(led, create=False) as lg:
        assert lg.verify().releases == 2


def test_allow_partial_keeps_every_row_and_uses_no_data_of_held_back_people(tmp_path: Path,
                                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """Held-back people stay in the extract, at their rows, as rows whose reports are drawn from
    placeholder values: the row count is the full table's, the other rows are exactly those of a
    full release, and changing the held-back people's data changes no byte of the extract."""
    df = people()
    led = tmp_path / "ledger.sqlite3"
    run(df, policy(cap=5.5), tmp_path, NIGHT1, "night1", led)
    run(df, policy(cap=5.5), tmp_path, NIGHT2, "night2", led)
    night2 = pd.read_parquet(tmp_path / "night2.parquet")
    df3 = df.copy()
    df3.loc[:6, "colour"] = [COLOURS[(COLOURS.index(c) + 1) % 5] for c in df.loc[:6, "colour"]]
    res = run(df3, policy(cap=5.5), tmp_path, NIGHT3, "night3", led, allow_partial=True)
    assert (res.held_back_subjects, res.held_back_rows) == (7, 7)
    out = pd.read_parquet(tmp_path / "night3.parquet")
    assert len(out) == N == res.manifest.rows
    # the other rows are exactly those a full release (same key and nonce) gives them; it reuses the
    # nonce with another policy, which a steward's record of nonces refuses: a separate steward state
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(tmp_path / "full-private"))
    full_res = run(df3, policy(), tmp_path, NIGHT3, "full3", tmp_path / "other.sqlite3")
    full = pd.read_parquet(tmp_path / "full3.parquet")
    assert full_res.manifest.rows == N
    pd.testing.assert_frame_equal(out.iloc[7:], full.iloc[7:])
    # held back: fresh columns are placeholder reports; a memoized cell whose value is the one the
    # ledger recorded keeps the report released before (score); a changed one does not (colour)
    assert not np.array_equal(out["hours"].iloc[:7], full["hours"].iloc[:7])
    np.testing.assert_array_equal(out["score"].iloc[:7], night2["score"].iloc[:7])
    assert (out["colour"].iloc[:7] != full["colour"].iloc[:7]).any()
    # nothing of the held-back people's changed data reaches the extract
    df4 = df3.copy()
    df4.loc[:6, "hours"] = 59.0
    df4.loc[:6, "colour"] = [COLOURS[(COLOURS.index(c) + 2) % 5] for c in df.loc[:6, "colour"]]  # changed too
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(tmp_path / "other-private"))  # a separate steward state
    (tmp_path / "other-private").mkdir(mode=0o700)
    again_led = tmp_path / "again.sqlite3"
    run(df, policy(cap=5.5), tmp_path, NIGHT1, "again1", again_led)
    run(df, policy(cap=5.5), tmp_path, NIGHT2, "again2", again_led)
    again = run(df4, policy(cap=5.5), tmp_path, NIGHT3, "again3", again_led, allow_partial=True)
    assert again.manifest.extract.sha256 == res.manifest.extract.sha256
    s = spent(led, list(df["person"]))
    np.testing.assert_allclose(s[:7], 4.0)  # held back: not charged
    np.testing.assert_allclose(s[7:], 5.0)  # hours again, within the cap
    with Ledger.open(led, create=False) as lg:
        v = lg.verify()
        assert v.ok and v.releases == 3
    manifest = json.loads((tmp_path / "night3.manifest.json").read_text())
    assert "7" not in json.dumps(manifest["privacy"]) and manifest["rows"] == N
    assert "placeholder" in json.dumps(manifest["privacy"])  # it says the release may hold such rows
    diag = json.loads((steward(tmp_path) / "night3.diag.json").read_text())
    assert diag["ledger"]["held_back_subjects"] == 7 and diag["ledger"]["held_back_rows"] == 7
    # the held-back people's memo state was not updated: their old colour is still the recorded one
    night4 = run(df, policy(cap=10.0), tmp_path, f"{14:032x}", "night4", led)
    assert night4.held_back_subjects == 0
    s4 = spent(led, list(df["person"]))
    np.testing.assert_allclose(s4 - s, 1.0)


def test_nothing_raw_in_the_ledger_or_the_manifest(tmp_path: Path) -> None:
    df = people(60)
    led = tmp_path / "ledger.sqlite3"
    run(df, policy(cap=20.0), tmp_path, NIGHT1, "night1", led)
    run(df, policy(cap=20.0), tmp_path, NIGHT2, "night2", led)
    files = [led, tmp_path / "night1.manifest.json", tmp_path / "night2.manifest.json"]
    assert all(f.exists() for f in files)
    for f in files:
        blob = f.read_bytes()
        assert b"person-" not in blob
        for pid in df["person"]:
            assert pid.encode() not in blob
        assert KEY.contains_in(blob.decode("latin-1")) is False
    # nor in the extract: the subject column is never released
    assert "person" not in pd.read_parquet(tmp_path / "night1.parquet").columns


def test_bad_ledger_use_is_refused_before_writing(tmp_path: Path) -> None:
    df = people(20)
    raw = tmp_path / "in.csv"
    df.to_csv(raw, index=False)
    no_subject = policy_without_subject()
    no_subject["columns"]["person"] = {"type": "drop"}
    before = listing(tmp_path)
    with pytest.raises(UsageError, match="subject_key"):
        privatize(raw, parse_policy(no_subject, "p.yaml"), KEY, tmp_path / "o.parquet", nonce=NIGHT1,
                  ledger_path=tmp_path / "l.sqlite3")
    with pytest.raises(UsageError, match="lifetime"):
        privatize(raw, parse_policy(policy(), "p.yaml"), KEY, tmp_path / "o.parquet", nonce=NIGHT1,
                  ledger_path=tmp_path / "l.sqlite3", allow_partial=True)
    bad = policy_without_subject(cap=5.0)
    with pytest.raises(LdptError, match="lifetime_epsilon"):
        parse_policy(bad, "p.yaml")
    df.loc[3, "person"] = None  # a missing identifier: refused in the pre-pass, no ledger file made
    df.to_csv(raw, index=False)
    with pytest.raises(LdptError, match="subject_key"):
        privatize(raw, parse_policy(policy(cap=5.0), "p.yaml"), KEY, tmp_path / "o.parquet", nonce=NIGHT1,
                  ledger_path=tmp_path / "l.sqlite3")
    assert listing(tmp_path) == before


def test_default_ledger_path_when_the_policy_sets_a_lifetime_budget(tmp_path: Path, private_dir: Path) -> None:
    raw = tmp_path / "in.csv"
    people(30).to_csv(raw, index=False)
    res = privatize(raw, parse_policy(policy(cap=10.0), "p.yaml"), KEY, tmp_path / "o.parquet", nonce=NIGHT1)
    assert res.ledger_path == private_dir / "ledger.sqlite3" and res.ledger_release_id == 1
    # without a lifetime budget and without --ledger there is no ledger at all
    privatize(raw, parse_policy(policy(), "p.yaml"), KEY, tmp_path / "o2.parquet", nonce=NIGHT2)
    with Ledger.open(private_dir / "ledger.sqlite3", create=False) as lg:
        assert lg.verify().releases == 1


def test_cli_ledger_options(tmp_path: Path, ldpt, private_dir: Path) -> None:
    key = write_fixed_key(tmp_path / "k.key")
    df = people(50)
    raw = tmp_path / "in.csv"
    df.to_csv(raw, index=False)
    no_subject = policy_without_subject()
    no_subject["columns"]["person"] = {"type": "drop"}
    pol = write_policy(tmp_path / "nosub.yaml", no_subject)
    before = listing(tmp_path)
    r = ldpt("privatize", raw, "--policy", pol, "--key", key, "--out", tmp_path / "o.parquet",
             "--ledger", tmp_path / "l.sqlite3")
    assert r.returncode == 2, r.stderr
    assert "subject_key" in r.stderr and "Traceback" not in r.stderr
    assert listing(tmp_path) == before and listing(private_dir) == []
    capped = write_policy(tmp_path / "cap.yaml", policy(cap=4.5))
    led = tmp_path / "l.sqlite3"
    r = ldpt("privatize", raw, "--policy", capped, "--key", key, "--out", tmp_path / "a.parquet", "--ledger", led,
             "--nonce", NIGHT1)
    assert r.returncode == 0, r.stderr
    assert "recorded as release 1" in r.stderr
    df2 = df.copy()
    df2.loc[:2, "colour"] = [COLOURS[(COLOURS.index(c) + 1) % 5] for c in df.loc[:2, "colour"]]
    df2.to_csv(raw, index=False)
    r = ldpt("privatize", raw, "--policy", capped, "--key", key, "--out", tmp_path / "b.parquet", "--ledger", led,
             "--nonce", NIGHT2)
    assert r.returncode == 4 and "3 subject(s)" in r.stderr and "Traceback" not in r.stderr  # refused for privacy
    assert not (tmp_path / "b.parquet").exists()
    r = ldpt("privatize", raw, "--policy", capped, "--key", key, "--out", tmp_path / "b.parquet", "--ledger", led,
             "--nonce", NIGHT2, "--allow-partial")
    assert r.returncode == 0, r.stderr
    assert "3 subject(s) past the lifetime budget, 3 row(s)" in r.stderr
    man = json.loads((tmp_path / "b.manifest.json").read_text())
    assert man["rows"] == 50  # held-back people stay, as placeholder rows
    r = ldpt("ledger", "verify", "--ledger", led)
    assert r.returncode == 0 and "2 release(s)" in r.stdout
    # no output may replace the ledger, whatever --overwrite says (nor through a symlink to it)
    led_bytes = led.read_bytes()
    (tmp_path / "link.json").symlink_to(led)
    for option, target in (("--manifest", led), ("--diagnostics", led), ("--manifest", tmp_path / "link.json")):
        r = ldpt("privatize", raw, "--policy", capped, "--key", key, "--out", tmp_path / "c.parquet", "--ledger",
                 led, option, target, "--overwrite", "--allow-partial")
        assert r.returncode == 2 and "ledger" in r.stderr and "destroy" in r.stderr, r.stderr
        assert "Traceback" not in r.stderr and not (tmp_path / "c.parquet").exists()
        assert led.read_bytes() == led_bytes


def test_strategy_sample_charges_the_row_total_and_tracks_reported_values(tmp_path: Path) -> None:
    """Under strategy sample a row costs epsilon_per_row_used whatever it reports (memoized or not);
    the memo state is updated only where the memoized column was reported."""
    pol = policy()
    pol["budget"] = {"epsilon_per_row": 2.0, "strategy": "sample", "sample_columns": 2}
    for c in pol["columns"].values():
        c.pop("epsilon")
    df = people(200)
    led = tmp_path / "ledger.sqlite3"
    r1 = run(df, pol, tmp_path, NIGHT1, "night1", led)
    out = pd.read_parquet(tmp_path / "night1.parquet")
    with Ledger.open(led, create=False) as ledger:
        last = ledger.last_values("colour", subject_hashes(KEY, list(df["person"])))
    n_state = int((last != np.zeros(1, dtype=last.dtype)).sum())
    reported = int(out["colour"].notna().sum())
    assert 0 < reported < 200 and n_state == reported
    r2 = run(df, pol, tmp_path, NIGHT2, "night2", led)
    assert r1.manifest.privacy.epsilon_per_row_used == pytest.approx(2.0) and r2.ledger_release_id == 2
    np.testing.assert_allclose(spent(led, list(df["person"])), 4.0)


def test_a_ledger_refuses_another_key(tmp_path: Path) -> None:
    """Subjects are kept only as hashes under the key: a release under another key would start
    everyone from zero spend, so the ledger binds itself to the first key's fingerprint and
    refuses another one before anything is written."""
    from ldptransform.errors import LdptError

    df = people(50)
    led = tmp_path / "ledger.sqlite3"
    run(df, policy(), tmp_path, NIGHT1, "night1", led)
    before = led.read_bytes()
    raw = tmp_path / "other.csv"
    df.to_csv(raw, index=False)
    with pytest.raises(LdptError, match="belongs to another key"):
        privatize(raw, parse_policy(policy(), "ledger-release.yaml"), SecretKey(bytes(range(1, 33))),
                  tmp_path / "other.parquet", nonce=NIGHT2, diagnostics_path=steward(tmp_path) / "other.diag.json",
                  ledger_path=led)
    assert led.read_bytes() == before
    assert not (tmp_path / "other.parquet").exists() and not (tmp_path / "other.manifest.json").exists()


def test_two_privatize_jobs_against_one_ledger(tmp_path: Path, private_dir: Path) -> None:
    """Two `ldpt privatize` processes started together against one ledger.  Without a cap both
    end with exit 0 and are recorded once each (ids 1 and 2, chain intact); with a cap that one
    release fits and two do not, exactly one succeeds, the other exits 2 and writes nothing, and
    the ledger holds one release.  Which one wins depends on timing; the outcome may not."""
    import subprocess
    import sys

    from conftest import cli_env

    key = write_fixed_key(tmp_path / "k.key")
    raw = tmp_path / "in.csv"
    people(200).to_csv(raw, index=False)

    def start(pol: Path, led: Path, out: str, nonce: str) -> subprocess.Popen:
        return subprocess.Popen([sys.executable, "-m", "ldptransform", "privatize", str(raw), "--policy", str(pol),
                                 "--key", str(key), "--out", str(tmp_path / out), "--ledger", str(led), "--nonce",
                                 nonce], env=cli_env(private_dir), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True, stdin=subprocess.DEVNULL)

    def finish(job: subprocess.Popen) -> tuple[int, str]:
        assert job.stderr is not None
        return job.wait(timeout=180), job.stderr.read()

    free = write_policy(tmp_path / "free.yaml", policy())
    led = tmp_path / "free.sqlite3"
    jobs = [start(free, led, f"free{i}.parquet", n) for i, n in enumerate((NIGHT1, NIGHT2))]
    res = [finish(j) for j in jobs]
    assert [r[0] for r in res] == [0, 0], res
    with Ledger.open(led, create=False) as lg:
        v = lg.verify()
        assert v.ok and v.releases == 2
    nonces = sorted(r[0] for r in sqlite3.connect(led).execute("SELECT nonce FROM releases"))
    assert nonces == sorted([NIGHT1, NIGHT2])

    # the first release of a person costs 3, a later one 1 (colour and score are memoized): a cap
    # of 3.5 refuses the second whichever order the two jobs take the ledger in (with 4 the second
    # fits when the first has committed before it is charged, which depends on timing)
    capped = write_policy(tmp_path / "capped.yaml", policy(cap=3.5))
    led = tmp_path / "capped.sqlite3"
    fresh = (f"{21:032x}", f"{22:032x}")  # another policy: nonces of its own (a nonce is used once)
    jobs = [start(capped, led, f"cap{i}.parquet", n) for i, n in enumerate(fresh)]
    res = [finish(j) for j in jobs]
    codes = sorted(r[0] for r in res)
    assert codes == [0, 4], res  # 4: refused for privacy
    loser = [i for i, r in enumerate(res) if r[0] == 4][0]
    assert "Traceback" not in res[loser][1] and "lifetime" in res[loser][1]
    assert not (tmp_path / f"cap{loser}.parquet").exists() and not (tmp_path / f"cap{loser}.manifest.json").exists()
    assert (tmp_path / f"cap{1 - loser}.parquet").exists()
    with Ledger.open(led, create=False) as lg:
        v = lg.verify()
        assert v.ok and v.releases == 1


# -- crashes ---------------------------------------------------------------------------------

def test_a_release_killed_mid_way_leaves_the_ledger_without_it(tmp_path: Path) -> None:
    """SIGKILL (no clean-up possible) after the first batch: nothing published, the ledger
    (made earlier by night 1) still holds only night 1 and verifies; the next run succeeds
    and is release 2."""
    import subprocess
    import sys
    import textwrap

    led = tmp_path / "ledger.sqlite3"
    df = people()
    run(df, policy(), tmp_path, NIGHT1, "night1", led)
    raw = tmp_path / "night2.csv"
    df.to_csv(raw, index=False)
    script = tmp_path / "job.py"
    script.write_text(textwrap.dedent(f"""
        import os, signal
        from pathlib import Path
        from ldptransform.keys import SecretKey
        from ldptransform.policy import parse_policy
        from ldptransform.release import privatize
        pol = parse_policy({policy()!r}, "p.yaml")
        def die(n):
            os.kill(os.getpid(), signal.SIGKILL)
        privatize(Path({str(raw)!r}), pol, SecretKey(bytes(range(100, 132))), Path({str(tmp_path / 'n2.parquet')!r}),
                  nonce={NIGHT2!r}, ledger_path=Path({str(led)!r}), batch_rows=50, on_progress=die)
    """))
    p = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=120)
    assert p.returncode == -9, p.stderr
    assert not (tmp_path / "n2.parquet").exists() and not (tmp_path / "n2.manifest.json").exists()
    with Ledger.open(led, create=False) as lg:
        v = lg.verify()
        assert v.ok and v.releases == 1
    r = run(df, policy(), tmp_path, NIGHT2, "n2", led)
    assert r.ledger_release_id == 2 and (tmp_path / "n2.parquet").exists()


def test_a_stop_signal_after_the_ledger_commit_still_publishes(tmp_path: Path,
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    """SIGTERM arriving just after the release was recorded must not cancel the publication
    (the ledger would count a release nobody received)."""
    import os
    import signal

    import ldptransform.release.run as rel

    orig = rel._record

    def record_then_term(*a, **k):
        rid = orig(*a, **k)
        os.kill(os.getpid(), signal.SIGTERM)  # the handler of StagedFiles only sets a flag
        return rid

    monkeypatch.setattr(rel, "_record", record_then_term)
    led = tmp_path / "ledger.sqlite3"
    r = run(people(), policy(), tmp_path, NIGHT1, "night1", led)
    assert r.ledger_release_id == 1 and (tmp_path / "night1.parquet").exists()
    assert json.loads((tmp_path / "night1.manifest.json").read_text())["nonce"] == NIGHT1


def test_a_failed_move_after_the_ledger_commit_says_the_release_is_counted(tmp_path: Path,
                                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """If the files cannot be moved into place after the ledger recorded the release, the
    error says so (an over-count, the safe side) and nothing is published."""
    from ldptransform.errors import OutputError
    from ldptransform.io import StagedFiles

    def fail(self, *, check=True):
        raise PermissionError(13, "Permission denied", str(tmp_path / "night1.parquet"))

    monkeypatch.setattr(StagedFiles, "commit", fail)
    led = tmp_path / "ledger.sqlite3"
    with pytest.raises(OutputError, match="recorded in ledger .* as release 1.*nothing was published.*over-count"):
        run(people(), policy(), tmp_path, NIGHT1, "night1", led)
    assert not (tmp_path / "night1.parquet").exists() and partials(tmp_path) == []
    with Ledger.open(led, create=False) as lg:
        assert lg.verify().ok and lg.show()["releases"] == 1
