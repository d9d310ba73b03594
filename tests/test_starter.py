"""`ldpt policy draft`: a commented starter policy from a table's steward-side profile
(ldptransform/starter.py).

On the demo survey and on a generated table (numpy's seeded generator, invented values) with
rare categories and extreme values: the draft loads as a valid policy; every line that sets a
value carries a `# REVIEW:` mark; no observed minimum or maximum is a bound; no category seen
fewer than the minimum count is proposed (none of the rare values appears in the file or on
stdout); the identifier is dropped; the draft privatizes the generated table (fixed key and
nonce).  CLI: exit 0, an existing --out exit 5 unless --overwrite, an --out beside an extract
exit 2, an unreadable table exit 2 with one paragraph.
"""

from __future__ import annotations

import re
import stat
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import yaml
from conftest import DEMO_CSV, write_fixed_key

from ldptransform.errors import ExitCode, OutputExistsError, UsageError
from ldptransform.keys import SecretKey
from ldptransform.policy import CategoricalColumn, DropColumn, NumericColumn, load_policy
from ldptransform.release import privatize
from ldptransform.starter import DEFAULT_MIN_COUNT, draft_policy

KEY = SecretKey(bytes(range(40, 72)))
NONCE = "5a" * 16
N = 3000
COMMON = ["amber", "cobalt", "jade", "ochre", "slate"]
RARE = [f"Zq-rare-{i}" for i in range(6)]          # each seen 1..6 times: fewer than the minimum count
INCOME_EXTREMES = (-4321.75, 98765432.5)          # one row each
HOURS_EXTREMES = (0.125, 167.25)


def generated(n: int = N, seed: int = 11) -> pd.DataFrame:
    """An invented table: an identifier, a category with rare values, a skewed and a plain number
    with one extreme row at each end, a 1-7 score with blanks."""
    rng = np.random.default_rng(seed)   # invented input data only; release noise comes from the keyed PRF
    colour = rng.choice(COMMON, size=n).astype(object)
    at = 0
    for i, v in enumerate(RARE):
        colour[at:at + i + 1] = v
        at += i + 1
    income = np.round(rng.lognormal(10.5, 0.8, size=n), 2)
    income[n - 1], income[n - 2] = INCOME_EXTREMES
    hours = np.round(rng.normal(38, 5, size=n), 1)
    hours[n - 3], hours[n - 4] = HOURS_EXTREMES
    score = pd.array(rng.integers(1, 8, size=n), dtype="Int64")
    score[rng.random(n) < 0.05] = pd.NA
    # whole-number pay, nearly unique per row but spread over a wide range: a measure, not a code
    pay = np.round(rng.lognormal(np.log(42_000), 0.35, size=n), 0)
    return pd.DataFrame({"member_no": rng.permutation(n) + 100000, "colour": colour, "income": income,
                         "hours": hours, "score": score, "pay": pay})


def value_lines(text: str) -> list[str]:
    """The lines of a YAML draft that set a value (not comments, not bare mapping headers)."""
    out = []
    for line in text.splitlines():
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        if re.fullmatch(r'("([^"\\]|\\.)*"|[A-Za-z_]+):', s):
            continue
        out.append(line)
    return out


def observed_extremes(df: pd.DataFrame, col: str) -> tuple[float, float]:
    x = pd.to_numeric(df[col], errors="coerce").dropna()
    return float(x.min()), float(x.max())


def check_draft(path: Path, df: pd.DataFrame, min_count: int = DEFAULT_MIN_COUNT) -> None:
    """The properties every draft has: valid, REVIEW on every value line, no extreme as a bound,
    no category below the minimum count, mode 0600."""
    text = path.read_text(encoding="utf-8")
    assert text.startswith("# DRAFT release policy") and "steward must review every line" in text
    assert "eps is a policy choice" in text and "NOT protected" in text and "linked" in text
    lp = load_policy(path)
    assert stat.S_IMODE(path.stat().st_mode) == 0o600
    lines = value_lines(text)
    assert lines and all("# REVIEW:" in line for line in lines), [x for x in lines if "# REVIEW:" not in x]
    for name, col in lp.policy.columns.items():
        if isinstance(col, NumericColumn):
            lo, hi = col.domain
            vmin, vmax = observed_extremes(df, name)
            assert lo != vmin and hi != vmax, (name, lo, hi)
        if isinstance(col, CategoricalColumn):
            counts = df[name].dropna().astype(str).str.strip().value_counts()
            for label in (str(c) for c in col.categories):
                assert counts.get(label, 0) >= min_count, (name, label)


def test_draft_of_the_generated_table_and_its_release(tmp_path: Path, private_dir: Path) -> None:
    df = generated()
    raw = tmp_path / "members.csv"
    df.to_csv(raw, index=False)
    res = draft_policy(raw, private_dir / "members.yaml")
    path = res.path
    check_draft(path, df)
    text = path.read_text(encoding="utf-8")
    lp = load_policy(path)
    cols = lp.policy.columns
    assert isinstance(cols["member_no"], DropColumn)           # nearly unique whole numbers: an identifier
    assert not isinstance(cols["pay"], DropColumn)             # nearly unique too, but a widely spread measure
    assert res.subject_key == "member_no" and '# subject_key: "member_no"' in text
    assert lp.policy.subject_key is None                      # proposed commented out only
    colour = cols["colour"]
    assert isinstance(colour, CategoricalColumn) and sorted(map(str, colour.categories)) == COMMON
    assert colour.unknown == "as-category"                     # the rare ones go to <other>
    assert f"{len(RARE)} value(s) seen fewer than {DEFAULT_MIN_COUNT} times" in text
    for v in RARE:
        assert v not in text
    income = cols["income"]                                    # skewed: bins, rounded outward
    assert isinstance(income, NumericColumn) and income.bins is not None
    for x in (*INCOME_EXTREMES, *HOURS_EXTREMES):
        assert f"{x:g}" not in text and repr(x) not in text
    hours = cols["hours"]
    assert isinstance(hours, NumericColumn) and hours.bounds is not None and hours.bins is None
    assert HOURS_EXTREMES[0] < hours.bounds[0] and hours.bounds[1] < HOURS_EXTREMES[1]   # clipped, not stretched
    score = cols["score"]
    assert isinstance(score, CategoricalColumn) and score.missing == "as-category"
    assert [str(c) for c in score.categories] == [str(i) for i in range(1, 8)]
    # eps per column from the planner, and the budget their sum
    eps = {rc.name: rc.mechanism.epsilon for rc in lp.columns if rc.mechanism is not None}
    assert set(eps) == {"colour", "income", "hours", "score", "pay"}
    assert all(0 < e < 5 for e in eps.values())
    assert abs(lp.policy.budget.epsilon_per_row - sum(eps.values())) < 0.011
    assert text.count("(planner)") == 5
    # the draft releases the table
    steward = tmp_path / "steward"
    steward.mkdir(mode=0o700)
    out = tmp_path / "partner" / "members.parquet"
    out.parent.mkdir()
    privatize(raw, lp, KEY, out, nonce=NONCE, diagnostics_path=steward / "members.diag.json")
    ext = pq.read_table(out)
    assert ext.num_rows == N and "member_no" not in ext.column_names
    assert not set(RARE) & set(ext.column("colour").to_pylist())


def test_draft_of_the_demo_survey(tmp_path: Path, private_dir: Path) -> None:
    df = pd.read_csv(DEMO_CSV, dtype=str)   # the text the release reads
    res = draft_policy(DEMO_CSV, tmp_path / "survey.yaml")
    check_draft(res.path, df)
    lp = load_policy(res.path)
    cols = lp.policy.columns
    assert isinstance(cols["staff_id"], DropColumn)            # by its name
    assert isinstance(cols["survey_wave"], DropColumn)         # one value only: nothing to learn, never public
    assert not any(c.type == "public" for c in cols.values())
    assert isinstance(cols["site"], CategoricalColumn) and isinstance(cols["pay"], NumericColumn)
    assert isinstance(cols["satisfaction"], CategoricalColumn) and cols["satisfaction"].missing == "as-category"
    assert {d.name: d.kind for d in res.columns}["weekly_hours"] in ("numeric", "binned")


def test_min_count_option_groups_more(tmp_path: Path) -> None:
    df = generated()
    raw = tmp_path / "members.parquet"
    df.to_parquet(raw, index=False)   # Parquet: numbers stored as numbers
    counts = df["colour"].value_counts()
    cut = int(sorted(counts[COMMON])[2]) + 1            # the two most common colours reach it, three do not
    res = draft_policy(raw, tmp_path / "d.yaml", min_count=cut)
    check_draft(res.path, df, min_count=cut)
    colour = load_policy(res.path).policy.columns["colour"]
    assert isinstance(colour, CategoricalColumn)
    assert sorted(map(str, colour.categories)) == sorted(counts[COMMON].index[counts[COMMON] >= cut])
    assert len(colour.categories) == 2 and colour.unknown == "as-category"
    assert f"{len(RARE) + 3} value(s) seen fewer than {cut} times" in res.path.read_text()


def test_destinations_refused(tmp_path: Path, private_dir: Path) -> None:
    df = generated(400)
    raw = tmp_path / "t.csv"
    df.to_csv(raw, index=False)
    before = raw.read_bytes()
    partner = tmp_path / "partner"
    partner.mkdir()
    (partner / "x.manifest.json").write_text("{}")
    with pytest.raises(UsageError, match="partners"):
        draft_policy(raw, partner / "p.yaml")
    assert sorted(p.name for p in partner.iterdir()) == ["x.manifest.json"]
    with pytest.raises(UsageError, match=r"\.yaml"):
        draft_policy(raw, tmp_path / "p.json")
    key = write_fixed_key(tmp_path / "k.yaml")
    key_bytes = key.read_bytes()
    with pytest.raises(UsageError, match="secret key"):
        draft_policy(raw, key, overwrite=True)
    assert key.read_bytes() == key_bytes
    existing = tmp_path / "mine.yaml"
    existing.write_text("keep me\n")
    with pytest.raises(OutputExistsError):
        draft_policy(raw, existing)
    assert existing.read_text() == "keep me\n"
    assert raw.read_bytes() == before
    assert not [p for p in tmp_path.iterdir() if ".ldpt-partial-" in p.name]
    res = draft_policy(raw)                                    # default: the private folder
    assert res.path.parent == private_dir and res.path.name == "t.policy-draft.yaml"


def test_cli(tmp_path: Path, ldpt, private_dir: Path) -> None:
    df = generated(1500)
    raw = tmp_path / "members.csv"
    df.to_csv(raw, index=False)
    out = tmp_path / "draft.yaml"
    r = ldpt("policy", "draft", raw, "--out", out)
    assert r.returncode == 0, r.stderr
    assert "DRAFT" in r.stdout and "colour: categorical" in r.stdout and "grouped into <other>" in r.stdout
    for v in RARE:
        assert v not in r.stdout and v not in r.stderr
    for x in (*INCOME_EXTREMES, *HOURS_EXTREMES):
        assert f"{x:g}" not in r.stdout
    load_policy(out)
    first = out.read_bytes()
    r = ldpt("policy", "draft", raw, "--out", out, "--min-count", "50")
    assert r.returncode == ExitCode.OUTPUT_EXISTS == OutputExistsError.exit_code
    assert out.read_bytes() == first
    r = ldpt("policy", "draft", raw, "--out", out, "--min-count", "50", "--overwrite")
    assert r.returncode == 0, r.stderr
    assert "50 times" in out.read_text()
    r = ldpt("policy", "check", out)
    assert r.returncode == 0, r.stderr
    # beside an extract
    partner = tmp_path / "partner"
    partner.mkdir()
    (partner / "members.manifest.json").write_text("{}")
    r = ldpt("policy", "draft", raw, "--out", partner / "p.yaml")
    assert r.returncode == UsageError.exit_code == 2
    assert not (partner / "p.yaml").exists()
    # an unreadable table: one paragraph, no traceback
    bad = tmp_path / "broken.parquet"
    bad.write_bytes(b"not a parquet file at all")
    for table in (bad, tmp_path / "absent.csv", tmp_path / "table.txt"):
        r = ldpt("policy", "draft", table, "--out", tmp_path / "x.yaml")
        assert r.returncode == 2, (table, r.stderr)
        assert "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1, r.stderr
        assert not (tmp_path / "x.yaml").exists()
    # the default destination: the steward's private folder, mode 0600
    r = ldpt("policy", "draft", raw)
    assert r.returncode == 0, r.stderr
    made = private_dir / "members.policy-draft.yaml"
    assert stat.S_IMODE(made.stat().st_mode) == 0o600
    assert yaml.safe_load(made.read_text())["columns"]["member_no"] == {"type": "drop"}


def test_hostile_labels_and_names_stay_valid(tmp_path: Path, ldpt) -> None:
    """Labels YAML would misread, control characters, reserved labels, padded text, a stored NaN
    and an odd column name: the draft is still a valid policy that releases the table, and the
    terminal never gets a raw control character."""
    rng = np.random.default_rng(5)   # invented values
    n = 2000
    labels = ["yes", "no", "010", "1.50", "#x: y", "a\x1b[2Jb", "<other>", "  padded  ", "é\u2028z"]
    level = rng.integers(1, 4, size=n).astype(float)
    level[:60] = np.nan
    df = pd.DataFrame({"answer": rng.choice(labels, size=n), "level": level,
                       'odd "col"\tname\x1b': rng.choice(["p", "q"], size=n),
                       "flag": rng.choice([True, False], size=n), "constant": 2.5})
    for kind in ("csv", "parquet"):
        raw = tmp_path / f"h.{kind}"
        df.to_csv(raw, index=False) if kind == "csv" else df.to_parquet(raw, index=False)
        out = tmp_path / f"h-{kind}.yaml"
        r = ldpt("policy", "draft", raw, "--out", out)
        assert r.returncode == 0, r.stderr
        assert "\x1b" not in r.stdout and "\\x1b" in r.stdout
        lp = load_policy(out)
        cols = lp.policy.columns
        answer = cols["answer"]
        assert isinstance(answer, CategoricalColumn) and answer.unknown == "as-category"   # <other> is reserved
        assert sorted(map(str, answer.categories)) == sorted(
            v.strip() for v in labels if v != "<other>")
        assert isinstance(cols["constant"], DropColumn)
        assert isinstance(cols["flag"], CategoricalColumn) and len(cols["flag"].categories) == 2
        steward = tmp_path / f"steward-{kind}"
        steward.mkdir(mode=0o700)
        (tmp_path / f"partner-{kind}").mkdir()
        nonce = ("c7" if kind == "csv" else "e8") * 16   # fixed, one per release
        res = privatize(raw, lp, KEY, tmp_path / f"partner-{kind}" / "x.parquet", nonce=nonce,
                        diagnostics_path=steward / "d.json")
        assert res.manifest.rows == n


def test_a_semicolon_table_is_drafted_with_its_delimiter_and_released_as_profiled(tmp_path: Path, ldpt,
                                                                                  private_dir: Path) -> None:
    """--delimiter: the table is profiled with it and the draft records it (input.csv_delimiter),
    so the release reads the table as it was profiled; a bad delimiter is refused (exit 2)."""
    from ldptransform.keys import SecretKey
    from ldptransform.release import privatize

    df = generated(600)
    raw = tmp_path / "members.csv"
    df.to_csv(raw, index=False, sep=";")
    out = private_dir / "semicolon.yaml"
    r = ldpt("policy", "draft", str(raw), "--out", str(out), "--delimiter", ";")
    assert r.returncode == 0, r.stderr
    lp = load_policy(out)
    assert lp.policy.input.csv_delimiter == ";"
    assert {rc.name for rc in lp.columns if rc.mechanism is not None} >= {"colour", "hours"}
    privatize(raw, lp, SecretKey(bytes(range(32))), tmp_path / "release" / "x.parquet", nonce="5" * 32)
    r = ldpt("policy", "draft", str(raw), "--out", str(private_dir / "bad.yaml"), "--delimiter", ";;")
    assert r.returncode == 2 and "--delimiter" in r.stderr and not (private_dir / "bad.yaml").exists()
