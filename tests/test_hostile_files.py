"""Hostile or damaged policies and manifests: each is refused with one paragraph that names the
file and where (key, line, column, field), exit code 2 (validate: a failed check, exit 1), no
traceback, in bounded time and memory; and validate says what it can and cannot prove.

Every case here was seen to fail before the defensive reading (ldptransform/safeload.py): a
duplicate key kept silently, a RecursionError traceback (exit 3) for deep nesting, a few hundred
bytes of YAML aliases standing for millions of values, unquoted yes/no turned into booleans.
"""

from __future__ import annotations

import json
import time
import tracemalloc
from pathlib import Path
from typing import Any

import pytest
import yaml

from conftest import DEMO_POLICY, assert_user_error, survey_policy, write_policy

# -- policies: strict JSON and YAML ---------------------------------------------------------------


def _json_policy(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "policy.json"
    path.write_text(text, encoding="utf-8")
    return path


def test_json_policy_with_a_duplicate_key_is_refused(tmp_path: Path, ldpt: Any) -> None:
    """eps 1 then eps 3 in one object: before, the last one counted silently."""
    text = json.dumps(survey_policy(), indent=1).replace('"epsilon": 1.0', '"epsilon": 1.0, "epsilon": 3.0', 1)
    path = _json_policy(tmp_path, text)
    line = text[:text.index('"epsilon": 3.0')].count("\n") + 1
    msg = assert_user_error(ldpt("policy", "check", path), [str(path), "'epsilon'", "twice"])
    # the line of the object that holds the key twice: the column's object opens a line or so above
    assert "(line " in msg and 0 <= line - int(msg.split("(line ")[1].split(")")[0]) <= 2, msg


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_json_policy_with_nan_or_infinity_is_refused(tmp_path: Path, ldpt: Any, literal: str) -> None:
    p = survey_policy()
    p["quality"] = {"max_se": 0.05}
    text = json.dumps(p, indent=1).replace("0.05", literal)
    path = _json_policy(tmp_path, text)
    assert_user_error(ldpt("policy", "check", path), [str(path), literal.lstrip("-"), "finite number"])


def test_yaml_policy_with_a_duplicate_key_is_refused(survey: dict[str, Path], ldpt: Any) -> None:
    text = survey["policy"].read_text(encoding="utf-8").replace("epsilon: 1.0", "epsilon: 1.0\n    epsilon: 3.0", 1)
    survey["policy"].write_text(text, encoding="utf-8")
    assert_user_error(ldpt("policy", "check", survey["policy"]), [str(survey["policy"]), "'epsilon'", "twice",
                                                                  "line "])


def test_yaml_policy_with_a_list_as_a_key_is_refused(tmp_path: Path, ldpt: Any) -> None:
    path = tmp_path / "policy.yaml"
    path.write_text("? [a]\n: 1\n", encoding="utf-8")
    assert_user_error(ldpt("policy", "check", path), [str(path), "key", "line 1"])


DEEP = 100_000


@pytest.mark.parametrize("kind", ["json", "yaml flow", "yaml block"])
def test_deeply_nested_policy_is_refused(tmp_path: Path, ldpt: Any, kind: str) -> None:
    """100k nested lists: before, a RecursionError traceback (exit 3)."""
    path = tmp_path / ("policy.json" if kind == "json" else "policy.yaml")
    if kind == "yaml block":
        path.write_text("budget:\n" + "".join("  " * (i + 1) + "-\n" for i in range(3000)), encoding="utf-8")
    else:
        path.write_text('{"budget": ' + "[" * DEEP + "]" * DEEP + "}", encoding="utf-8")
    t0 = time.perf_counter()
    assert_user_error(ldpt("policy", "check", path), [str(path), "nested more than 64 deep"])
    assert time.perf_counter() - t0 < 10


def _laughs(levels: int) -> str:
    """A billion-laughs policy: ten values, then each level a list of ten aliases of the one before
    (10^levels values from a few hundred bytes), as a matrix the policy would otherwise read."""
    rows = ["&l0 [0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5]"]
    rows += [f"&l{i} [" + ", ".join([f"*l{i - 1}"] * 10) + "]" for i in range(1, levels + 1)]
    return ("budget: {epsilon_per_row: 1}\ncolumns:\n  c:\n    type: categorical\n    categories: [a, b]\n"
            "    epsilon: 1\n    mechanism: matrix\n    matrix: [" + ", ".join(rows) + "]\n")


def test_billion_laughs_policy_is_refused_fast_with_bounded_memory(tmp_path: Path, ldpt: Any) -> None:
    from ldptransform.errors import PolicyError
    from ldptransform.policy import load_policy

    path = tmp_path / "policy.yaml"
    path.write_text(_laughs(9), encoding="utf-8")
    assert path.stat().st_size < 1000
    tracemalloc.start()
    t0 = time.perf_counter()
    with pytest.raises(PolicyError, match="aliases"):
        load_policy(path)
    seconds = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert seconds < 2, seconds
    assert peak < 20 * 2**20, f"peak {peak / 2**20:.1f} MiB"
    assert_user_error(ldpt("policy", "check", path), [str(path), "aliases", "expand"])


def test_matrix_of_aliased_rows_costs_no_more_than_the_file(tmp_path: Path, ldpt: Any) -> None:
    """A matrix whose rows are all one aliased row: 3 bytes per row stand for 20000 values each
    (before: gigabytes built before the matrix was refused)."""
    n = 20_000
    text = ("budget: {epsilon_per_row: 1}\ncolumns:\n  c:\n    type: categorical\n    categories: [a, b]\n"
            "    epsilon: 1\n    mechanism: matrix\n    matrix: [&r [" + ", ".join(["0.5"] * n) + "]"
            + ", *r" * (n - 1) + "]\n")
    path = tmp_path / "policy.yaml"
    path.write_text(text, encoding="utf-8")
    t0 = time.perf_counter()
    assert_user_error(ldpt("policy", "check", path), [str(path), "aliases", "expand"])
    assert time.perf_counter() - t0 < 10


def test_aliases_that_expand_little_still_work(tmp_path: Path, ldpt: Any) -> None:
    """Reusing a list of categories through an alias is ordinary YAML and stays allowed."""
    p = survey_policy()
    text = yaml.safe_dump(p, sort_keys=False)
    text = text.replace("categories:\n    - North Works", "categories: &sites\n    - North Works", 1)
    path = tmp_path / "policy.yaml"
    path.write_text(text + "", encoding="utf-8")
    assert "&sites" in text
    res = ldpt("policy", "check", path)
    assert res.returncode == 0, res.stderr


def test_recursive_alias_is_refused(tmp_path: Path, ldpt: Any) -> None:
    path = tmp_path / "policy.yaml"
    path.write_text("budget: &b [*b]\ncolumns: {x: {type: drop}}\n", encoding="utf-8")
    assert_user_error(ldpt("policy", "check", path), [str(path), "alias", "contains it"])


# -- policies: labels YAML would change -----------------------------------------------------------

@pytest.mark.parametrize(("written", "becomes"), [
    ("yes", "boolean true"), ("no", "boolean false"), ("on", "boolean true"), ("Off", "boolean false"),
    ("true", "boolean true"), ("010", "number 8"), ("01", "number 1"), ("1_000", "number 1000"),
    ("1.50", "number 1.5"), ("0x1F", "number 31")])
def test_unquoted_category_that_yaml_changes_is_refused(survey: dict[str, Path], ldpt: Any, written: str,
                                                        becomes: str) -> None:
    text = survey["policy"].read_text(encoding="utf-8")
    assert text.count("- 'yes'\n") == 1, text
    survey["policy"].write_text(text.replace("- 'yes'\n", f"- {written}\n"), encoding="utf-8")
    msg = assert_user_error(ldpt("policy", "check", survey["policy"]),
                            [str(survey["policy"]), "'would_recommend'", "categories entry 1", becomes, "quotes"])
    assert f'"{written}"' in msg


def test_quoted_and_plain_categories_are_accepted(tmp_path: Path, ldpt: Any) -> None:
    """The shipped example writes "yes"/"no" in quotes and 1..5 as plain numbers: unchanged."""
    res = ldpt("policy", "check", DEMO_POLICY)
    assert res.returncode == 0, res.stderr
    path = tmp_path / "policy.yaml"
    path.write_text("budget: {epsilon_per_row: 1}\ncolumns:\n  c: {type: categorical, categories: [1, -2, 3.5, "
                    "'yes', \"on\", '010'], epsilon: 1}\n", encoding="utf-8")
    assert ldpt("policy", "check", path).returncode == 0


@pytest.mark.parametrize(("written", "becomes"), [("1.50", "number 1.5"), ("2.0", "number 2"),
                                                  ("1e3", "number 1000"), ("-0.0", "number 0")])
def test_json_number_category_that_changes_is_refused(tmp_path: Path, ldpt: Any, written: str,
                                                      becomes: str) -> None:
    """A JSON category written as a number whose text is not the label it becomes (1.50 is 1.5) is
    refused like YAML's, naming the line; 3.5, 7 and strings are kept."""
    path = tmp_path / "policy.json"
    path.write_text('{"budget": {"epsilon_per_row": 1},\n "columns": {\n  "c": {"type": "categorical", "epsilon": 1,\n'
                    f'   "categories": [3.5, 7, "x", {written}]}}}}}}\n', encoding="utf-8")
    msg = assert_user_error(ldpt("policy", "check", path),
                            [str(path), "(line 4)", "'c'", "categories entry 4", becomes, "string"])
    assert f'"{written}"' in msg
    path.write_text(path.read_text(encoding="utf-8").replace(f", {written}]", f', "{written}"]'), encoding="utf-8")
    assert ldpt("policy", "check", path).returncode == 0


@pytest.mark.parametrize("label", ["North Works ", " North Works", "North Works\t"])
def test_padded_category_is_refused(survey: dict[str, Path], ldpt: Any, label: str) -> None:
    """The data's values are trimmed before they are matched (release/encode.py), so a padded
    category could never match a row."""
    p = survey_policy()
    p["columns"]["site"]["categories"][0] = label
    write_policy(survey["policy"], p)
    assert_user_error(ldpt("policy", "check", survey["policy"]),
                      [str(survey["policy"]), "'site'", repr(label), "spaces", "trimmed"])


def test_json_policy_that_is_not_utf8_names_the_encoding(tmp_path: Path, ldpt: Any) -> None:
    path = tmp_path / "policy.json"
    path.write_bytes(json.dumps(survey_policy()).replace("Riverside", "Rivers\xefde").encode("latin-1"))
    msg = assert_user_error(ldpt("policy", "check", path), [str(path), "UTF-8"])
    assert "codec" not in msg


# -- manifests: damaged, forged, or edited ---------------------------------------------------------

@pytest.fixture(scope="module")
def released(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """One release of the survey under the tests' policy (fixed key and nonce; a public column)."""
    from conftest import DEMO_CSV, FIXED_KEY_BYTES, FIXED_NONCE, module_private_dir, write_fixed_key

    from ldptransform import parse_policy, privatize
    from ldptransform.keys import SecretKey

    d = tmp_path_factory.mktemp("hostile-release")
    out = d / "extract.parquet"
    with module_private_dir(tmp_path_factory):
        privatize(DEMO_CSV, parse_policy(survey_policy(), "survey.yaml"), SecretKey(FIXED_KEY_BYTES), out,
                  nonce=FIXED_NONCE)
    return {"out": out, "manifest": out.with_name("extract.manifest.json"), "raw": DEMO_CSV,
            "key": write_fixed_key(d / "release.key")}


def _copy_with_manifest(released: dict[str, Path], tmp_path: Path, edit: Any) -> tuple[Path, Path]:
    """The extract beside a manifest changed by ``edit`` (a function of the parsed manifest, or the
    manifest's new text)."""
    out = tmp_path / "extract.parquet"
    out.write_bytes(released["out"].read_bytes())
    mpath = tmp_path / "extract.manifest.json"
    if callable(edit):
        m = json.loads(released["manifest"].read_text(encoding="utf-8"))
        edit(m)
        mpath.write_text(json.dumps(m, indent=2), encoding="utf-8")
    else:
        mpath.write_text(edit, encoding="utf-8")
    return out, mpath


def _role(m: dict[str, Any]) -> tuple[int, dict[str, Any]]:
    i = next(i for i, c in enumerate(m["columns"]) if c["name"] == "role")
    return i, m["columns"][i]


def _eps_text(m: dict[str, Any]) -> None:
    _role(m)[1]["mechanism"]["epsilon"] = "abc"


def _no_eps(m: dict[str, Any]) -> None:
    del _role(m)[1]["mechanism"]["epsilon"]


def _no_rows(m: dict[str, Any]) -> None:
    del m["rows"]


def _no_name(m: dict[str, Any]) -> None:
    del _role(m)[1]["mechanism"]["mechanism"]


def _outputs_renamed(m: dict[str, Any]) -> None:
    _role(m)[1]["outputs"][0]["name"] = "elsewhere"


def _outputs_emptied(m: dict[str, Any]) -> None:
    _role(m)[1]["outputs"] = []


def _role_as_numeric(m: dict[str, Any]) -> None:
    _role(m)[1]["type"] = "numeric"


def _role_as_public(m: dict[str, Any]) -> None:
    _role(m)[1]["type"] = "public"


def _bins_cut(m: dict[str, Any]) -> None:
    next(c for c in m["columns"] if c["name"] == "tenure_years")["bins"] = [0, 1]


def _eps_huge(m: dict[str, Any]) -> None:
    _role(m)[1]["mechanism"]["epsilon"] = 1e308


MANIFEST_CASES: dict[str, tuple[Any, list[str]]] = {
    # before: KeyError, IndexError, AttributeError, ValueError and OverflowError tracebacks (exit 3)
    "an output renamed": (_outputs_renamed, ["].outputs", "'role'"]),
    "outputs emptied": (_outputs_emptied, ["].outputs", "'role'"]),
    "a categorical column typed numeric": (_role_as_numeric, ["].type", "'role'", "'numeric'"]),
    "a privatized column typed public": (_role_as_public, ["].mechanism", "'role'", "public column"]),
    "bins cut short": (_bins_cut, ["].bins", "'tenure_years'", "6 strictly increasing"]),
    "epsilon huge": (_eps_huge, ["].mechanism.epsilon", "'role'", "at most 100"]),
    "epsilon not a number": (_eps_text, ["columns[", "].mechanism.epsilon", "'role'", "positive number"]),
    "epsilon missing": (_no_eps, ["].mechanism.epsilon", "'role'", "missing"]),
    "rows missing": (_no_rows, ["'rows'", "missing"]),
    "mechanism name missing": (_no_name, ["].mechanism.mechanism", "'role'", "missing"]),
    "absurd nesting": (None, ["nested more than 64 deep"]),   # text edits: see _damaged
    "duplicate key": (None, ["'rows'", "twice"]),
}


def _damaged(released: dict[str, Path], tmp_path: Path, case: str) -> tuple[Path, Path]:
    edit, _ = MANIFEST_CASES[case]
    if case == "absurd nesting":
        text = released["manifest"].read_text(encoding="utf-8")
        text = text.replace('"categories": [', '"categories": [' + "[" * DEEP + "]" * DEEP + ", ", 1)
        return _copy_with_manifest(released, tmp_path, text)
    if case == "duplicate key":
        text = released["manifest"].read_text(encoding="utf-8").replace('"rows": ', '"rows": 5,\n  "rows": ', 1)
        return _copy_with_manifest(released, tmp_path, text)
    return _copy_with_manifest(released, tmp_path, edit)


@pytest.mark.parametrize("case", list(MANIFEST_CASES))
def test_estimate_refuses_a_damaged_manifest(released: dict[str, Path], tmp_path: Path, ldpt: Any,
                                              case: str) -> None:
    """Before: a traceback (exit 3) for a non-numeric or missing epsilon and for deep nesting, and a
    duplicate 'rows' read silently."""
    out, mpath = _damaged(released, tmp_path, case)
    assert_user_error(ldpt("estimate", out), [str(mpath), *MANIFEST_CASES[case][1]])


@pytest.mark.parametrize("case", list(MANIFEST_CASES))
def test_validate_fails_a_damaged_manifest_as_a_check(released: dict[str, Path], tmp_path: Path, ldpt: Any,
                                                      case: str) -> None:
    out, mpath = _damaged(released, tmp_path, case)
    res = ldpt("validate", out, "--format", "json")
    assert res.returncode == 1, res.stdout + res.stderr
    assert "Traceback" not in res.stderr and res.stderr == ""
    report = json.loads(res.stdout)
    assert set(report) == {"extract", "manifest", "ok", "checks"} and report["ok"] is False
    check = {c["check"]: c for c in report["checks"]}["manifest"]
    assert check["status"] == "fail" and str(mpath) in check["detail"]
    for name in MANIFEST_CASES[case][1]:
        assert name in check["detail"], check["detail"]
    table = ldpt("validate", out)
    assert table.returncode == 1 and "FAILED" in table.stdout and "Traceback" not in table.stderr


def _drop_public(m: dict[str, Any]) -> None:
    m["privacy"]["public_columns"] = []


def _drop_public_everywhere(m: dict[str, Any]) -> None:
    """The column left out of the public list and of the column entries (its bytes still in the extract)."""
    m["privacy"]["public_columns"] = []
    m["columns"] = [c for c in m["columns"] if c["type"] != "public"]


def _no_cautions(m: dict[str, Any]) -> None:
    m["cautions"] = []


def _one_caution_changed(m: dict[str, Any]) -> None:
    m["cautions"][1] = "Every column of this extract is protected."


EDITS: dict[str, tuple[Any, str, list[str]]] = {
    "public column unlisted": (_drop_public, "public columns", ["survey_wave", "embedded policy"]),
    "public column gone from every list": (_drop_public_everywhere, "public columns", ["survey_wave", "extract"]),
    "cautions emptied": (_no_cautions, "cautions", ["4 of the 4 cautions"]),
    "a caution reworded": (_one_caution_changed, "cautions", ["1 of the 4 cautions"]),
}


@pytest.mark.parametrize("side", ["partner", "steward"])
@pytest.mark.parametrize("case", list(EDITS))
def test_validate_catches_an_edited_public_list_or_cautions(released: dict[str, Path], tmp_path: Path, ldpt: Any,
                                                            case: str, side: str) -> None:
    """Before: both sides passed (the extract's bytes are untouched, so the hashes match)."""
    edit, name, words = EDITS[case]
    out, _ = _copy_with_manifest(released, tmp_path, edit)
    steward = ["--raw", released["raw"], "--key", released["key"]] if side == "steward" else []
    res = ldpt("validate", out, *steward, "--format", "json")
    assert res.returncode == 1, res.stdout + res.stderr
    check = {c["check"]: c for c in json.loads(res.stdout)["checks"]}[name]
    assert check["status"] == "fail", check
    for w in words:
        assert w in check["detail"], check["detail"]


def test_an_intact_release_passes_the_public_and_cautions_checks(released: dict[str, Path], ldpt: Any) -> None:
    res = ldpt("validate", released["out"], "--format", "json")
    assert res.returncode == 0, res.stdout + res.stderr
    checks = {c["check"]: c for c in json.loads(res.stdout)["checks"]}
    assert checks["cautions"]["status"] == "pass"
    assert checks["public columns"]["status"] == "warn" and "survey_wave" in checks["public columns"]["detail"]


# -- what validate proves ---------------------------------------------------------------------------

def _forge_eps(m: dict[str, Any]) -> None:
    """A consistent forgery: the role column claims eps 0.5 everywhere the manifest states it."""
    from ldptransform.policy import parse_policy

    _, role = _role(m)
    role["mechanism"]["epsilon"] = 0.5
    m["policy"]["columns"]["role"]["epsilon"] = 0.5
    m["privacy"]["epsilon_per_row_used"] -= 0.5
    m["policy_sha256"] = parse_policy(m["policy"], "forged").policy.sha256()


def test_partner_side_validate_says_what_it_cannot_prove(released: dict[str, Path], tmp_path: Path,
                                                         ldpt: Any) -> None:
    """A consistent forgery of eps passes the partner-side checks; the "origin" check says so, in the
    table and in the JSON, and the steward side catches it."""
    out, _ = _copy_with_manifest(released, tmp_path, _forge_eps)
    res = ldpt("validate", out, "--format", "json")
    report = json.loads(res.stdout)
    checks = {c["check"]: c for c in report["checks"]}
    origin = checks["origin"]
    assert origin["status"] == "warn", origin
    for words in ("consistent with each other", "forgery", "--raw and --key", "public key"):
        assert words in origin["detail"], origin["detail"]
    assert checks["privacy budget"]["status"] == "pass", checks["privacy budget"]
    assert "origin" in ldpt("validate", out).stdout
    steward = ldpt("validate", out, "--raw", released["raw"], "--key", released["key"], "--format", "json")
    assert steward.returncode == 1
    s_checks = {c["check"]: c for c in json.loads(steward.stdout)["checks"]}
    assert s_checks["reproduced"]["status"] == "fail" and s_checks["origin"]["status"] == "warn"


def test_steward_side_validate_proves_the_origin(released: dict[str, Path], ldpt: Any) -> None:
    res = ldpt("validate", released["out"], "--raw", released["raw"], "--key", released["key"], "--format", "json")
    assert res.returncode == 0, res.stdout
    origin = {c["check"]: c for c in json.loads(res.stdout)["checks"]}["origin"]
    assert origin["status"] == "pass" and "re-derives bit for bit" in origin["detail"]


def test_a_policy_of_too_many_values_is_refused(tmp_path: Path, ldpt: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    """JSON: counted from the file's commas and brackets before it is parsed (the real limit);
    YAML: while its nodes are composed (a smaller limit here, so that the test stays quick)."""
    from ldptransform import policy

    path = _json_policy(tmp_path, '{"budget": [' + "0," * policy.MAX_POLICY_VALUES + "0]}")
    t0 = time.perf_counter()
    assert_user_error(ldpt("policy", "check", path), [str(path), f"{policy.MAX_POLICY_VALUES:,} values"])
    assert time.perf_counter() - t0 < 10
    monkeypatch.setattr(policy, "MAX_POLICY_VALUES", 1000)
    yml = tmp_path / "policy.yaml"
    yml.write_text("budget: [" + "0, " * 1000 + "0]\n", encoding="utf-8")
    assert_user_error(ldpt("policy", "check", yml), [str(yml), "1,000 values"])


def test_validate_with_an_invalid_embedded_policy_fails_its_checks(released: dict[str, Path], tmp_path: Path,
                                                                   ldpt: Any) -> None:
    """Before: the quality check read the embedded policy unguarded (a PolicyError, exit 2)."""
    out, _ = _copy_with_manifest(released, tmp_path, lambda m: m.__setitem__("policy", {"columns": []}))
    res = ldpt("validate", out, "--format", "json")
    assert res.returncode == 1 and res.stderr == "", res.stdout + res.stderr
    checks = {c["check"]: c for c in json.loads(res.stdout)["checks"]}
    assert checks["privacy budget"]["status"] == "fail" and "embedded policy is invalid" in \
        checks["privacy budget"]["detail"]
    assert checks["quality"]["status"] == "warn" and "not checked" in checks["quality"]["detail"]
