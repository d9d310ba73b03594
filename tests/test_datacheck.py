"""`ldpt policy check POLICY --data TABLE` and ``check_data``: a policy against the steward's raw
table, every problem of every column in one streamed pass, each with its count and example rows.

The tables are generated (a seeded numpy generator, invented values) with known rows of each
problem in several columns; the demo table is checked against every example policy and every
count cross-checked with pandas."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from conftest import DEMO_CSV, REPO, listing, write_policy
from ldptransform import check_data
from ldptransform.datacheck import MAX_EXAMPLES, MAX_VALUE_CHARS, STEWARD_ONLY, invalid_utf8_rows
from ldptransform.errors import DataError, InputFileError, PolicyError
from ldptransform.policy import load_policy

N = 3000
DEPTS = ["Alpha", "Beta", "Gamma"]

POLICY: dict[str, Any] = {
    "budget": {"epsilon_per_row": 10.0},
    "subject_key": "pid",
    "output": {"one_row_per_person": True},
    "columns": {
        "pid": {"type": "drop"},
        "dept": {"type": "categorical", "categories": DEPTS, "epsilon": 1.0, "unknown": "as-category"},
        "answer": {"type": "categorical", "categories": ["yes", "no"], "epsilon": 1.0},
        "level": {"type": "categorical", "categories": [1, 2, 3], "epsilon": 1.0},
        "score": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0, "missing": {"fill": 50}},
        "hours": {"type": "numeric", "bounds": [0, 80], "epsilon": 1.0, "out_of_bounds": "error"},
        "note": {"type": "public"},
        "ghost": {"type": "numeric", "bounds": [0, 1], "epsilon": 1.0},
    },
}


def _disjoint(rng: np.random.Generator, sizes: dict[str, int], n: int = N) -> dict[str, np.ndarray]:
    """Disjoint sets of row indices (0-based), sorted, of the given sizes."""
    picked = rng.choice(n, size=sum(sizes.values()), replace=False)
    out, at = {}, 0
    for name, k in sizes.items():
        out[name] = np.sort(picked[at:at + k])
        at += k
    return out


def _cell(v: bytes) -> bytes:
    return b'"' + v.replace(b'"', b'""') + b'"' if (b"," in v or b'"' in v) else v


# per column: (kind the check reports, rows, the value(s) written there)
PROBLEMS: dict[str, list[tuple[str, int, list[bytes]]]] = {
    "dept": [("unknown_category", 7, [b"Delta"]), ("padded_label", 5, [b" Beta "]), ("missing", 4, [b""]),
             ("category_case_differs", 3, [b"alpha"]), ("not_utf8", 2, [b"Caf\xe9"])],
    "answer": [("boolean_spelling", 6, [b"true", b"False", b"ON"]), ("unknown_category", 4, [b"maybe"])],
    "level": [("number_written_differently", 4, [b"2.0", b"03"])],
    "score": [("above_bounds", 9, [b"150"]), ("below_bounds", 8, [b"-5.5"]), ("missing", 5, [b"NA"]),
              ("not_a_number", 3, [b"1,234"])],
    "hours": [("above_bounds", 4, [b"99"]), ("missing", 3, [b""])],
    "note": [("not_utf8", 3, [b"r\xe9sum\xe9 \xff"])],
}
# the problems a release takes with a policy that clips, fills and maps unknown values to <other>
RELEASE_TAKES = {("dept", "unknown_category"), ("dept", "padded_label"), ("dept", "missing"),
                 ("dept", "category_case_differs"), ("answer", "boolean_spelling"), ("score", "above_bounds"),
                 ("score", "below_bounds"), ("score", "missing")}


def make_table(tmp: Path, clean: bool = False,
               release_ok: bool = False) -> tuple[Path, dict[tuple[str, str], np.ndarray]]:
    """A CSV table of N rows with known problems (PROBLEMS, and repeated and missing subjects);
    returns its path and, per (column, kind), the 0-based rows that have it.  ``release_ok``:
    only RELEASE_TAKES."""
    rng = np.random.default_rng(20261203)
    cols: dict[str, list[bytes]] = {
        "pid": [f"P{i:05d}".encode() for i in range(N)],
        "dept": [DEPTS[k].encode() for k in rng.integers(0, 3, N)],
        "answer": [[b"yes", b"no"][k] for k in rng.integers(0, 2, N)],
        "level": [str(k).encode() for k in rng.integers(1, 4, N)],
        "score": [f"{v:.1f}".encode() for v in rng.uniform(0, 100, N)],
        "hours": [f"{v:.1f}".encode() for v in rng.uniform(0, 80, N)],
        "note": [f"note {k}".encode() for k in rng.integers(0, 50, N)],
        "extra": [b"x"] * N,
    }
    want: dict[tuple[str, str], np.ndarray] = {}
    if clean:
        return _write(tmp / "clean.csv", cols), want
    for column, problems in PROBLEMS.items():
        problems = [p for p in problems if not release_ok or (column, p[0]) in RELEASE_TAKES]
        sets = _disjoint(rng, {kind: k for kind, k, _ in problems})
        for kind, _, values in problems:
            for j, i in enumerate(sets[kind]):
                cols[column][i] = values[j % len(values)]
            want[(column, kind)] = sets[kind]
    if release_ok:
        return _write(tmp / "changes.csv", cols), want
    # subjects: 4 rows repeat an earlier row's identifier, 2 rows have none (the second repeats the first)
    sets = {k: v + 1 for k, v in _disjoint(rng, {"repeat": 4, "missing": 2}, N - 1).items()}  # never row 0
    for i in sets["repeat"]:
        cols["pid"][i] = cols["pid"][int(rng.integers(0, i))]
    for i in sets["missing"]:
        cols["pid"][i] = b""
    want[("pid", "missing_subject")] = sets["missing"]
    ids = pd.Series([v if v else None for v in cols["pid"]]).fillna("\x00<missing>")
    want[("pid", "repeated_subject")] = np.flatnonzero(ids.duplicated().to_numpy())
    return _write(tmp / "table.csv", cols), want


def _write(path: Path, cols: dict[str, list[bytes]]) -> Path:
    lines = [b",".join(c.encode() for c in cols)] + [b",".join(_cell(cols[c][i]) for c in cols) for i in range(N)]
    path.write_bytes(b"\n".join(lines) + b"\n")
    return path


@pytest.fixture
def policy_file(tmp_path: Path) -> Path:
    return write_policy(tmp_path / "policy.yaml", POLICY)


def _by_key(report: Any) -> dict[tuple[str | None, str], Any]:
    return {(f.column, f.kind): f for f in report.findings}


def test_every_problem_in_one_pass(tmp_path: Path, policy_file: Path) -> None:
    table, want = make_table(tmp_path)
    report = check_data(policy_file, table, batch_rows=700)  # several batches
    got = _by_key(report)
    assert report.rows == N and report.format == "csv" and not report.ok
    for key, rows in want.items():
        assert key in got, key
        f = got[key]
        assert f.rows == len(rows), (key, f.rows, len(rows))
        shown = [r for r, _ in f.examples]
        assert 1 <= len(shown) <= MAX_EXAMPLES and shown == sorted(shown)
        assert set(shown) <= set((rows + 1).tolist()), key  # data rows are 1-based
    # column-level problems: a policy column the table lacks, a table column the policy lacks (unlisted: error)
    assert got[("ghost", "policy_column_not_in_table")].severity == "error"
    assert got[("extra", "table_column_not_in_policy")].severity == "error"
    assert got[("ghost", "policy_column_not_in_table")].rows is None
    row_problems = {k for k, f in got.items() if f.rows is not None}
    assert row_problems == set(want)  # nothing else found
    sev = {k: f.severity for k, f in got.items()}
    assert sev[("dept", "unknown_category")] == "warning"      # unknown: as-category -> <other>
    assert sev[("dept", "missing")] == "error"                 # missing: error
    assert sev[("dept", "padded_label")] == "note"             # trimmed by the release, matched
    assert sev[("answer", "boolean_spelling")] == "error"      # unknown: error
    assert sev[("score", "missing")] == "warning" and "50" in got[("score", "missing")].message
    assert sev[("score", "above_bounds")] == "warning" and "clips them to 100" in got[("score", "above_bounds")].message
    assert sev[("hours", "above_bounds")] == "error"           # out_of_bounds: error
    assert sev[("pid", "missing_subject")] == "note"           # no memoized column, no ledger
    assert sev[("pid", "repeated_subject")] == "error"
    # the values shown are the table's, as the release sees them before trimming
    assert {v for _, v in got[("dept", "padded_label")].examples} == {" Beta "}
    assert {v for _, v in got[("dept", "not_utf8")].examples} == {"Caf\\xe9"}
    assert {v for _, v in got[("score", "not_a_number")].examples} == {"1,234"}
    assert {v for _, v in got[("answer", "boolean_spelling")].examples} == {"true", "False", "ON"}
    assert {v for _, v in got[("level", "number_written_differently")].examples} == {"2.0", "03"}
    assert all(v is None for _, v in got[("hours", "missing")].examples)
    # errors first, then warnings, then notes
    order = [f.severity for f in report.findings]
    assert order == sorted(order, key=["error", "warning", "note"].index)


def test_batch_size_does_not_change_the_report(tmp_path: Path, policy_file: Path) -> None:
    table, _ = make_table(tmp_path)
    small = check_data(policy_file, table, batch_rows=97).to_dict()
    large = check_data(policy_file, table, batch_rows=1 << 20).to_dict()
    counts = {(p["column"], p["kind"]): p["rows"] for p in small["problems"]}
    assert counts == {(p["column"], p["kind"]): p["rows"] for p in large["problems"]}
    # examples may differ with the batches (distinct values first within each), never their number's cap
    assert all(len(p["examples"]) <= MAX_EXAMPLES for p in small["problems"])


def test_the_release_agrees(tmp_path: Path, policy_file: Path) -> None:
    """What the check says a release does is what a release does: the table with errors is
    refused; on a table that a release takes, the rows the check says are clipped, filled and
    mapped to <other> are the release's own counts (its steward-only diagnostics)."""
    from ldptransform import privatize
    from ldptransform.keys import SecretKey
    from ldptransform.policy import parse_policy

    key = SecretKey(bytes(range(32)))
    table, _ = make_table(tmp_path)
    with pytest.raises(DataError):
        privatize(table, load_policy(policy_file), key, tmp_path / "refused.parquet")
    table, want = make_table(tmp_path, release_ok=True)
    pol = yaml.safe_load(policy_file.read_text())
    del pol["columns"]["ghost"]
    pol["columns"]["hours"] = {"type": "drop"}
    pol["columns"]["extra"] = {"type": "drop"}
    pol["columns"]["dept"]["missing"] = "as-category"
    pol["columns"]["answer"]["unknown"] = "as-category"
    pol["output"] = {"one_row_per_person": False}
    lp = parse_policy(pol, "p")
    report = check_data(lp, table)
    got = {k: f.rows for k, f in _by_key(report).items()}
    assert not any(f.severity == "error" for f in report.findings)
    res = privatize(table, lp, key, tmp_path / "out.parquet")
    assert res.manifest.rows == N
    diag = json.loads(Path(res.diagnostics_path).read_text())["columns"]
    other = got[("dept", "unknown_category")] + got[("dept", "category_case_differs")]
    assert diag["dept"]["unknown_as_other"] == other == 10
    assert diag["dept"]["missing_as_category"] == got[("dept", "missing")] == len(want[("dept", "missing")])
    assert diag["answer"]["unknown_as_other"] == got[("answer", "boolean_spelling")]
    assert diag["score"]["clipped_high"] == got[("score", "above_bounds")] == len(want[("score", "above_bounds")])
    assert diag["score"]["clipped_low"] == got[("score", "below_bounds")]
    assert diag["score"]["filled"] == got[("score", "missing")]


def test_clean_table_passes(tmp_path: Path, policy_file: Path, ldpt) -> None:
    table, _ = make_table(tmp_path, clean=True)
    pol = yaml.safe_load(policy_file.read_text())
    del pol["columns"]["ghost"]
    pol["columns"]["extra"] = {"type": "drop"}
    clean_policy = write_policy(tmp_path / "clean.yaml", pol)
    report = check_data(clean_policy, table)
    assert report.ok and report.findings == [] and report.rows == N
    before = listing(tmp_path)
    res = ldpt("policy", "check", clean_policy, "--data", table)
    assert res.returncode == 0, res.stderr
    assert STEWARD_ONLY in res.stdout.splitlines()[0]
    assert "passed" in res.stdout
    assert listing(tmp_path) == before  # nothing written beside the table (or anywhere there)


def test_cli_exit_codes_and_text(tmp_path: Path, policy_file: Path, ldpt) -> None:
    table, want = make_table(tmp_path)
    before = listing(tmp_path)
    res = ldpt("policy", "check", policy_file, "--data", table)
    assert res.returncode == 1, res.stderr
    first = res.stdout.splitlines()[0]
    assert first.startswith(STEWARD_ONLY)
    assert "FAILED" in res.stdout
    assert f"column 'score': above_bounds, {len(want[('score', 'above_bounds')])} row(s)" in res.stdout
    assert "'Caf\\xe9'" in res.stdout
    assert "\x1b" not in res.stdout and "Traceback" not in res.stderr
    assert listing(tmp_path) == before
    # bad input: exit 2, one paragraph on stderr, nothing on stdout
    for args, words in (((policy_file, "--data", tmp_path / "absent.csv"), ["absent.csv", "does not exist"]),
                        ((tmp_path / "absent.yaml", "--data", table), ["absent.yaml"]),
                        ((policy_file, "--format", "json"), ["--data"]),
                        ((policy_file, "--data", tmp_path / "table.txt"), ["table.txt"])):
        res = ldpt("policy", "check", *args)
        assert res.returncode == 2, (args, res.stdout, res.stderr)
        assert res.stdout == ""
        assert all(w in res.stderr for w in words), res.stderr
        assert "Traceback" not in res.stderr and len(res.stderr.strip().splitlines()) == 1
    ragged = tmp_path / "ragged.csv"
    ragged.write_text("pid,dept\nP1,Alpha\nP2,Beta,extra\n", encoding="utf-8")
    res = ldpt("policy", "check", policy_file, "--data", ragged)
    assert res.returncode == 2 and res.stdout == "" and "data row 2" in res.stderr


def test_json_shape(tmp_path: Path, policy_file: Path, ldpt) -> None:
    table, want = make_table(tmp_path)
    res = ldpt("policy", "check", policy_file, "--data", table, "--format", "json")
    assert res.returncode == 1
    out = json.loads(res.stdout)
    assert list(out) == ["steward_only", "notice", "policy", "table", "format", "rows", "ok", "counts", "problems"]
    assert out["steward_only"] is True and out["notice"] == STEWARD_ONLY and out["ok"] is False
    assert out["rows"] == N and out["format"] == "csv" and out["table"] == str(table)
    assert set(out["counts"]) == {"error", "warning", "note"}
    assert sum(out["counts"].values()) == len(out["problems"])
    for p in out["problems"]:
        assert list(p) == ["column", "kind", "severity", "rows", "examples", "message"]
        assert p["severity"] in ("error", "warning", "note")
        for e in p["examples"]:
            assert list(e) == ["row", "value"] and isinstance(e["row"], int)
            assert e["value"] is None or isinstance(e["value"], str)
    rows = {(p["column"], p["kind"]): p["rows"] for p in out["problems"]}
    assert rows[("score", "below_bounds")] == len(want[("score", "below_bounds")])


def test_parquet_table(tmp_path: Path) -> None:
    """Parquet: numbers stored as text, infinite and NaN values, booleans against yes/no,
    several values per cell, bytes that are not UTF-8 in a text column, times in a numeric column."""
    rng = np.random.default_rng(7)
    n = 500
    x = rng.uniform(0, 10, n)
    x[[3, 40]] = np.inf
    x[[5, 6, 7]] = np.nan
    text = [f"{v:.2f}" for v in rng.uniform(0, 10, n)]
    text[11] = "12 kg"
    text[12] = None  # type: ignore[call-overload]
    flags = rng.integers(0, 2, n).astype(bool)
    labels = [b"north", b"south"] * (n // 2)
    labels[9] = b"nor\xf0th"
    table = pa.table({"x": pa.array(x), "t": pa.array(text, pa.string()), "flag": pa.array(flags),
                      "region": pa.array(labels, pa.binary()).cast(pa.string(), safe=False),
                      "tags": pa.array([["a"]] * n), "when": pa.array(np.arange(n), pa.timestamp("s"))})
    path = tmp_path / "t.parquet"
    pq.write_table(table, path)
    policy = write_policy(tmp_path / "p.yaml", {
        "budget": {"epsilon_per_row": 6.0},
        "columns": {"x": {"type": "numeric", "bounds": [0, 10], "epsilon": 1.0, "missing": "as-answer"},
                    "t": {"type": "numeric", "bounds": [0, 10], "epsilon": 1.0},
                    "flag": {"type": "categorical", "categories": ["yes", "no"], "epsilon": 1.0},
                    "region": {"type": "categorical", "categories": ["north", "south"], "epsilon": 1.0},
                    "tags": {"type": "categorical", "categories": ["a"], "epsilon": 1.0, "unknown": "as-category"},
                    "when": {"type": "numeric", "bounds": [0, 1000], "epsilon": 1.0}}})
    got = _by_key(check_data(policy, path))
    assert got[("x", "infinite")].rows == 2 and [r for r, _ in got[("x", "infinite")].examples] == [4, 41]
    assert got[("x", "missing")].rows == 3 and got[("x", "missing")].severity == "note"
    assert got[("t", "numbers_stored_as_text")].severity == "note"
    assert got[("t", "not_a_number")].rows == 1 and got[("t", "not_a_number")].examples == [(12, "12 kg")]
    assert got[("t", "missing")].rows == 1 and got[("t", "missing")].severity == "error"
    assert got[("flag", "boolean_spelling")].rows == n  # stored as booleans: 'true'/'false', never yes/no
    assert got[("region", "not_utf8")].rows == 1 and got[("region", "not_utf8")].examples == [(10, "nor\\xf0th")]
    assert ("region", "unknown_category") not in got
    assert got[("tags", "several_values_per_cell")].severity == "error"
    assert got[("when", "not_numbers")].severity == "error" and got[("when", "not_numbers")].rows is None


def test_values_shown_safely(tmp_path: Path) -> None:
    hostile = "\x1b[2J\x1b]0;title\x07" + "z" * 100
    path = tmp_path / "h.csv"
    path.write_text("c\nok\n" + hostile + "\n", encoding="utf-8")
    policy = write_policy(tmp_path / "p.yaml", {"budget": {"epsilon_per_row": 1.0}, "columns": {
        "c": {"type": "categorical", "categories": ["ok", "fine"], "epsilon": 1.0}}})
    f = _by_key(check_data(policy, path))[("c", "unknown_category")]
    (row, value), = f.examples
    assert row == 2 and len(value) <= MAX_VALUE_CHARS and value.endswith("...")
    assert "\x1b" not in value and "\x07" not in value and "\\x1b" in value


def test_bad_input_raises_the_release_errors(tmp_path: Path, policy_file: Path) -> None:
    with pytest.raises(InputFileError):
        check_data(policy_file, tmp_path / "nothing.csv")
    bad = tmp_path / "bad.yaml"
    bad.write_text("budget: {epsilon_per_row: 1}\ncolumns:\n  a: {type: categorical, categories: [yes, no], "
                   "epsilon: 1}\n", encoding="utf-8")
    with pytest.raises(PolicyError, match="boolean"):  # an unquoted yes/no: refused before the data is read
        check_data(bad, DEMO_CSV)
    ragged = tmp_path / "r.csv"
    ragged.write_text("a\nx\ny,z\n", encoding="utf-8")
    with pytest.raises(DataError):
        check_data(policy_file, ragged)


def test_utf8_validator_against_the_codec() -> None:
    rng = np.random.default_rng(11)
    values = [bytes(rng.integers(0, 256, int(rng.integers(0, 7))).astype(np.uint8)) for _ in range(4000)]
    values += [chr(int(c)).encode() for c in rng.integers(0x80, 0xD7FF, 500)]
    values += [b"\xed\xa0\x80", b"\xf4\x90\x80\x80", b"\xe0\x80\x80", b"\xc0\xaf", b"\xef\xbf\xbf", b"\xf4\x8f\xbf\xbf"]

    def bad(b: bytes) -> bool:
        try:
            b.decode("utf-8")
            return False
        except UnicodeDecodeError:
            return True

    expected = np.array([bad(b) for b in values])
    arr = pa.array(values, pa.binary())
    assert (invalid_utf8_rows(arr) == expected).all()
    assert (invalid_utf8_rows(arr.slice(13, 2000)) == expected[13:2013]).all()
    assert 0 < expected.sum() < len(values)


# -- the demo table against the example policies: every count as pandas finds it ----------------

EXAMPLE_POLICIES = sorted(p.name for p in (REPO / "policies").iterdir() if p.suffix in (".yaml", ".json"))


@pytest.mark.parametrize("name", EXAMPLE_POLICIES)
def test_demo_table_against_the_example_policies(name: str) -> None:
    lp = load_policy(REPO / "policies" / name)
    report = check_data(lp, DEMO_CSV)
    df = pd.read_csv(DEMO_CSV, dtype=str, keep_default_na=False, na_values=lp.policy.input.csv_null_values)
    assert report.rows == len(df)
    got = {(f.column, f.kind): f for f in report.findings}
    expected: dict[tuple[str | None, str], int | None] = {}
    for rc in lp.columns:
        if rc.type in ("drop", "public") or rc.name not in df:
            continue
        s = df[rc.name]
        expected[(rc.name, "missing")] = int(s.isna().sum())
        if rc.type == "categorical":
            trimmed = s.str.strip()
            expected[(rc.name, "unknown_category")] = int((s.notna() & ~trimmed.isin(rc.labels)).sum())
            expected[(rc.name, "padded_label")] = int((trimmed.isin(rc.labels) & (trimmed != s)).sum())
        else:
            x = pd.to_numeric(s)
            lo, hi = rc.config.domain
            expected[(rc.name, "below_bounds")] = int((x < lo).sum())
            expected[(rc.name, "above_bounds")] = int((x > hi).sum())
    for name_ in df.columns:
        if name_ not in lp.by_name and name_ != lp.policy.subject_key:
            expected[(name_, "table_column_not_in_policy")] = None
    sk = lp.policy.subject_key
    if sk is not None and lp.policy.output.one_row_per_person:
        expected[(sk, "repeated_subject")] = int(df[sk].fillna("\x00").duplicated().sum())
    expected = {k: v for k, v in expected.items() if v != 0}
    assert {k: f.rows for k, f in got.items()} == expected
    for (column, _), f in got.items():
        for row, value in f.examples:  # every example is the table's own cell at that data row
            cell = df[column].iloc[row - 1]
            assert (value is None and pd.isna(cell)) or value == cell
    # the demo table has values outside the policy's domains: the check says so (exit 1 on the command line)
    assert not report.ok


def test_policy_side_problems(tmp_path: Path) -> None:
    """Categories that are JSON booleans against yes/no answers, a category that is also a CSV
    missing-value marker, missing subjects where the lifetime budget needs them, a subject_key
    the table lacks."""
    path = tmp_path / "t.csv"
    path.write_text("who,ok,grade\nA1,true,A\n,yes,B\nA3,false,none\nA4,No,A\n,true,B\n", encoding="utf-8")
    policy = tmp_path / "p.json"
    policy.write_text(json.dumps({
        "budget": {"epsilon_per_row": 2.0, "lifetime_epsilon": 10.0}, "subject_key": "who",
        "input": {"csv_null_values": ["", "none"]},
        "columns": {"ok": {"type": "categorical", "categories": [True, False], "epsilon": 1.0},
                    "grade": {"type": "categorical", "categories": ["A", "B", "none"], "epsilon": 1.0,
                              "missing": "as-category"}}}), encoding="utf-8")
    got = _by_key(check_data(policy, path))
    f = got[("ok", "boolean_spelling")]
    assert f.rows == 2 and f.severity == "error" and f.examples == [(2, "yes"), (4, "No")]
    assert got[("grade", "category_is_missing_marker")].severity == "error"
    assert got[("grade", "missing")].rows == 1  # 'none' is read as missing, as the release reads it
    f = got[("who", "missing_subject")]
    assert f.rows == 2 and f.severity == "error" and [r for r, _ in f.examples] == [2, 5]
    other = tmp_path / "q.json"
    other.write_text(policy.read_text().replace('"subject_key": "who"', '"subject_key": "person"'), encoding="utf-8")
    got = _by_key(check_data(other, path))
    assert got[("person", "subject_key_not_in_table")].severity == "error"
    assert got[("who", "table_column_not_in_policy")].severity == "error"


def test_delimiter_option(tmp_path: Path, policy_file: Path, ldpt) -> None:
    """`--delimiter` (and ``check_data(delimiter=)``) reads a text table as `privatize --delimiter`
    does, winning over the policy's input.csv_delimiter; misuse is exit 2 with one paragraph."""
    table, _ = make_table(tmp_path, clean=True)
    semi = tmp_path / "semi.csv"
    semi.write_bytes(table.read_bytes().replace(b",", b";"))
    plain = {**check_data(policy_file, table).to_dict(), "table": str(semi)}
    by_option = check_data(policy_file, semi, delimiter=";").to_dict()
    assert by_option == plain
    assert check_data(policy_file, semi).to_dict() != plain     # read with commas: one column, other findings
    res = ldpt("policy", "check", policy_file, "--data", semi, "--delimiter", ";", "--format", "json")
    assert res.returncode == 1, res.stderr                       # the ghost column is missing from the table
    assert json.loads(res.stdout) == plain
    pq.write_table(pa.table({"pid": ["P1"]}), tmp_path / "t.parquet")
    for args, words in (((policy_file, "--delimiter", ";"), ["--delimiter", "--data"]),
                        ((policy_file, "--data", semi, "--delimiter", ";;"), ["--delimiter", "one character"]),
                        ((policy_file, "--data", tmp_path / "t.parquet", "--delimiter", ";"), ["t.parquet", "CSV"])):
        res = ldpt("policy", "check", *args)
        assert res.returncode == 2, (args, res.stdout, res.stderr)
        assert res.stdout == "" and "Traceback" not in res.stderr
        assert len(res.stderr.strip().splitlines()) == 1, res.stderr
        assert all(w in res.stderr for w in words), res.stderr
