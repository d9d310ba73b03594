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
