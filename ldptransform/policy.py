"""Policy files: what each column of the input becomes, and the row's privacy budget.

A policy is YAML or JSON.  Domains are declared, never inferred from the data (a
domain read off the data would leak it).  Loading validates everything at once and
reports every problem with the column and field it concerns.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

from . import mechanisms as mech
from .errors import PolicyError
from .safeload import LoadProblem, load_json, load_yaml

EPS_TOLERANCE = 1e-9
MISSING_LABEL = "<missing>"
OTHER_LABEL = "<other>"
DEFAULT_CSV_NULLS = ["", "NA", "N/A", "NaN", "nan", "null", "NULL"]

Epsilon = Annotated[float, Field(gt=0, le=50, allow_inf_nan=False, strict=True,
                                 description="Privacy parameter of this column (natural log).")]
_EPS_FIELD = ("Privacy parameter of this column (natural log): required under budget.strategy split, "
              "absent under sample (every reported column then gets epsilon_per_row / m).")
# A whole number written as one (not true/false, not 2.0, not "2"): YAML reads `yes` as true.
StrictInt = Annotated[int, Field(strict=True)]
Scalar = (Annotated[str, Field(strict=True)] | Annotated[int, Field(strict=True)]
          | Annotated[float, Field(strict=True)] | Annotated[bool, Field(strict=True)])


def _mechanisms_doc(*families: str) -> str:
    """The mechanisms of these families as a policy description lists them."""
    names = mech.names_of(*families)
    return ", ".join(names[:-1]) + " or " + names[-1] if len(names) > 1 else ", ".join(names)


def _field_doc(field: str, *families: str, only: bool = False) -> str:
    """A policy field's description from the mechanisms that take it (their ``Params``)."""
    owners = mech.field_owners(field, *families)
    desc = mech.registry()[owners[0]].Params.model_fields[field].description
    return f"{'/'.join(owners)}{' only' if only else ''}: {desc}."


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def category_label(value: Any) -> str:
    """Canonical text of a category as written in a policy (YAML may give ints, bools...)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def number_label(value: float) -> str:
    return str(int(value)) if float(value).is_integer() and abs(value) < 1e15 else repr(float(value))


class Fill(_Strict):
    fill: Annotated[float, Field(strict=True, allow_inf_nan=False,
                                 description="Value used in place of a missing one (within bounds).")]


class Quality(_Strict):
    """Fitness-for-use targets that `ldpt plan` and `ldpt validate` check."""

    max_se: Annotated[float, Field(gt=0, allow_inf_nan=False, strict=False)] | None = Field(
        None, description="Largest acceptable standard error: of each frequency share (0..1, root mean square over "
                          "the column's values), or of a mean (column units). At the top level of a policy it "
                          "applies to frequency shares only.")
    max_relative_se: Annotated[float, Field(gt=0, allow_inf_nan=False, strict=False)] | None = Field(
        None, description="Means: largest acceptable standard error as a share of the width of the bounds "
                          "(hi - lo).")
    median_max_se: Annotated[float, Field(gt=0, allow_inf_nan=False, strict=False)] | None = Field(
        None, description="needs quantiles: largest acceptable standard error of the median (column units).")


FREQUENCY_NEEDS = Literal["frequencies"]
_RERANDOMIZE_DOC = ("memoize only: the eps of a second randomization layer that re-randomizes the memoized report "
                    "with fresh noise in every release, so that a report no longer stays the same (a linkage key) "
                    "or changes only with the value; a release then reveals at most the composite eps of the two "
                    "layers, and the lifetime cost per distinct value stays the column's epsilon.")


def _check_rerandomize(col: Any) -> None:
    if col.rerandomize_epsilon is not None and not col.memoize:
        raise ValueError("rerandomize_epsilon applies only with memoize: true (it re-randomizes the memoized report "
                         "in every release); add memoize: true or remove rerandomize_epsilon")


class CategoricalColumn(_Strict):
    type: Literal["categorical"]
    categories: list[Scalar] = Field(description="The declared domain, in order.")
    epsilon: Epsilon | None = Field(None, description=_EPS_FIELD)
    mechanism: str | None = Field(None, description=_mechanisms_doc("frequency") + "; absent or 'auto': the "
                                                    "lowest variance for what partners need.")
    missing: Literal["error", "as-category"] = "error"
    unknown: Literal["error", "as-category"] = "error"
    hash_range: StrictInt | None = Field(None, description=_field_doc("hash_range", "frequency", only=True))
    subset_size: StrictInt | None = Field(None, description=_field_doc("subset_size", "frequency", only=True))
    matrix: list[list[Annotated[float, Field(strict=True, allow_inf_nan=False)]]] | None = Field(
        None, description=_field_doc("matrix", "frequency", only=True))
    needs: list[FREQUENCY_NEEDS] | None = Field(
        None, min_length=1, description="What partners will estimate: [frequencies] (the default).")
    quality: Quality | None = Field(None, description="Targets checked by `ldpt plan` and `ldpt validate`.")
    memoize: Annotated[bool, Field(strict=True)] | None = Field(
        None, description="true: memoized randomness (permanent randomized response): a person (budget's "
                          "subject_key) with the same value gets the same report in every release; needs "
                          "subject_key at the top level.")
    rerandomize_epsilon: Epsilon | None = Field(None, description=_RERANDOMIZE_DOC)

    @model_validator(mode="after")
    def _layer(self) -> CategoricalColumn:
        _check_rerandomize(self)
        return self

    @field_validator("categories")
    @classmethod
    def _cats(cls, v: list[Any]) -> list[Any]:
        if len(v) == 0:
            raise ValueError("categories is empty: list the values this column may take")
        labels = [category_label(c) for c in v]
        seen: set[str] = set()
        dups = sorted({x for x in labels if x in seen or seen.add(x)})  # type: ignore[func-returns-value]
        if dups:
            raise ValueError(f"categories has duplicates: {', '.join(map(repr, dups))}; list each value once")
        if "" in labels:
            raise ValueError("an empty category cannot be told apart from a missing value; use missing: "
                             "as-category instead")
        padded = [x for x in labels if x != x.strip()]
        if padded:
            raise ValueError(f"category {padded[0]!r} has spaces at its start or end, but the data's values are "
                             "trimmed before they are matched, so it could never match a row; remove the spaces")
        for special in (MISSING_LABEL, OTHER_LABEL):
            if special in labels:
                raise ValueError(f"{special!r} is reserved for values the tool adds; rename that category")
        return v


class NumericColumn(_Strict):
    type: Literal["numeric"]
    bounds: tuple[float, float] | None = Field(None, description="[low, high]; values outside are clipped.")
    bins: list[Annotated[float, Field(strict=True, allow_inf_nan=False)]] | None = Field(
        None, description="Bin edges; the column is released as a categorical column of bins.")
    epsilon: Epsilon | None = Field(None, description=_EPS_FIELD)
    mechanism: str | None = Field(None, description=", ".join(mech.names_of("mean")) + " (means); "
                                  + ", ".join(mech.names_of("distribution")) + " (distributions: quantiles, range "
                                  "shares); with bins, a categorical one.")
    missing: Literal["error", "as-answer"] | Fill = Field(
        "error", description="error (the default): refuse a missing value; {fill: V}: replace it by V (every statistic "
                             "then describes the filled column); as-answer: keep 'missing' as its own answer, so "
                             "partners estimate the share missing and the mean or distribution among rows with a "
                             "value (with bins: one more bin, <missing>, at the column's eps; without bins: a "
                             "missing flag at missing_epsilon beside the value at the rest of the column's eps, "
                             "through a mean mechanism or, for quantiles, hierarchy).")
    missing_epsilon: Epsilon | None = Field(
        None, description="missing: as-answer without bins only: the part of the column's epsilon spent on the "
                          "randomized missing flag (default a quarter of it); the value gets the rest.")
    out_of_bounds: Literal["clip", "error"] = "clip"
    grid: StrictInt | None = Field(None, ge=1, le=4096, description=_field_doc("grid", "mean", "distribution"))
    hash_range: StrictInt | None = Field(None, description="/".join(mech.field_owners("hash_range", "frequency"))
                                         + " on bins only.")
    subset_size: StrictInt | None = Field(None, description="/".join(mech.field_owners("subset_size", "frequency"))
                                          + " on bins only.")
    needs: list[Literal["mean", "quantiles", "frequencies"]] | None = Field(
        None, min_length=1, description="What partners will estimate: mean and/or quantiles (default [mean]); "
                                        "with bins, frequencies (the default) and/or quantiles. With quantiles and "
                                        "no mechanism, the tool's distribution default is used.")
    quality: Quality | None = Field(None, description="Targets checked by `ldpt plan` and `ldpt validate`.")
    branching: int | None = Field(None, ge=2, le=16, description=_field_doc("branching", "distribution"))
    leaves: int | None = Field(None, ge=2, le=1024, description=_field_doc("leaves", "distribution"))
    quantile: float | None = Field(None, gt=0, lt=1, description=_field_doc("quantile", "quantile"))
    memoize: Annotated[bool, Field(strict=True)] | None = Field(
        None, description="true: memoized randomness (permanent randomized response): a person (budget's "
                          "subject_key) with the same value gets the same report in every release; needs "
                          "subject_key at the top level.")
    memo_grid: StrictInt | None = Field(
        None, ge=1, le=4096, description="memoize on a numeric column (no bins): number of steps between the bounds "
                                         "of the coarse grid the value is rounded to first, with a per-person random "
                                         "offset (default 32).")
    rerandomize_epsilon: Epsilon | None = Field(None, description=_RERANDOMIZE_DOC)

    @model_validator(mode="after")
    def _domain(self) -> NumericColumn:
        if self.bins is None and self.bounds is None:
            raise ValueError("give bounds: [low, high] (or bins: [edges]) for a numeric column")
        self._check_bounds_and_bins()
        self._check_needs()
        self._check_memo_grid()
        _check_rerandomize(self)
        self._check_missing_answer()
        if isinstance(self.missing, Fill):
            lo, hi = self.domain
            if not lo <= self.missing.fill <= hi:
                raise ValueError(f"missing fill value {self.missing.fill:g} lies outside the bounds [{lo:g}, {hi:g}]")
        return self

    def _check_bounds_and_bins(self) -> None:
        if self.bounds is not None:
            lo, hi = self.bounds
            if not (math.isfinite(lo) and math.isfinite(hi)):
                raise ValueError("bounds must be finite numbers")
            if lo >= hi:
                raise ValueError(f"bounds low ({lo:g}) must be below high ({hi:g})")
        if self.bins is not None:
            b = self.bins
            if len(b) < 3:
                raise ValueError("bins needs at least 3 edges (2 bins)")
            if any(b2 <= b1 for b1, b2 in zip(b, b[1:])):
                raise ValueError("bins edges must be strictly increasing")
            if self.bounds is not None and (self.bounds[0] != b[0] or self.bounds[1] != b[-1]):
                raise ValueError("with bins, bounds (if given) must equal the first and last edge")

    def _check_needs(self) -> None:
        if self.needs is not None and len(set(self.needs)) != len(self.needs):
            raise ValueError("needs lists a value twice; list each of mean, quantiles, frequencies at most once")
        if self.needs is not None and self.bins is None and "frequencies" in self.needs:
            raise ValueError("needs: frequencies applies to a numeric column released as bins; add bins: [edges], "
                             "or ask for mean / quantiles")
        if self.needs is not None and self.bins is not None and "mean" in self.needs:
            raise ValueError("needs: mean is not available for a column released as bins (a bin's values are not "
                             "known); remove bins to release the value with a mean mechanism, or ask for "
                             "frequencies / quantiles")

    def _check_missing_answer(self) -> None:
        if self.missing_epsilon is not None and self.missing != "as-answer":
            raise ValueError("missing_epsilon applies only with missing: as-answer (it is the eps of the randomized "
                             "missing flag); set missing: as-answer or remove missing_epsilon")
        if self.missing != "as-answer":
            return
        if self.bins is not None and self.missing_epsilon is not None:
            raise ValueError("missing_epsilon does not apply to a column released as bins: with bins, missing is one "
                             "more bin (<missing>) randomized with the others at the column's epsilon; remove "
                             "missing_epsilon")
        if (self.missing_epsilon is not None and self.epsilon is not None
                and self.missing_epsilon >= self.epsilon):
            raise ValueError(f"missing_epsilon ({self.missing_epsilon:g}) must be below the column's epsilon "
                             f"({self.epsilon:g}): the value gets epsilon - missing_epsilon; lower missing_epsilon "
                             "or leave it out (default: a quarter of the column's epsilon)")
        if self.bins is None and self.memoize:
            raise ValueError("missing: as-answer on a numeric column without bins does not combine with memoize; "
                             "add bins: [edges] (a memoized <missing> bin), or remove memoize")

    def _check_memo_grid(self) -> None:
        if self.memo_grid is not None and not self.memoize:
            raise ValueError("memo_grid applies only with memoize: true; add memoize: true or remove memo_grid")
        if self.memo_grid is not None and self.bins is not None:
            raise ValueError("memo_grid does not apply to a column released as bins (memoization uses the bin "
                             "itself); remove memo_grid")

    @property
    def domain(self) -> tuple[float, float]:
        if self.bins is not None:
            return (self.bins[0], self.bins[-1])
        assert self.bounds is not None
        return (float(self.bounds[0]), float(self.bounds[1]))

    def bin_labels(self) -> list[str]:
        assert self.bins is not None
        b = self.bins
        return [f"[{number_label(b[i])}, {number_label(b[i + 1])}{']' if i == len(b) - 2 else ')'}"
                for i in range(len(b) - 1)]


class DropColumn(_Strict):
    type: Literal["drop"]


class PublicColumn(_Strict):
    type: Literal["public"]


ColumnPolicy = Annotated[CategoricalColumn | NumericColumn | DropColumn | PublicColumn,
                         Field(discriminator="type")]


MAX_COLUMN_EPSILON = 50.0  # the largest column epsilon a policy may give (see Epsilon)
SAMPLE_EPSILON_STEP = 2.5  # the m rule of Wang et al., ICDE 2019 (see sample_size)


def sample_size(epsilon_per_row: float, d: int) -> int:
    """How many of its d privatized columns a row reports under ``strategy: sample``.

    m = max(1, min(d, floor(eps / 2.5))): the rule of N. Wang, X. Xiao, Y. Yang, J. Zhao,
    S. C. Hui, H. Shin, J. Shin, G. Yu, "Collecting and Analyzing Multidimensional Data with
    Local Differential Privacy", ICDE 2019 (restated in docs/formulas.md section 5.4; tag [M]).
    """
    return max(1, min(d, math.floor(epsilon_per_row / SAMPLE_EPSILON_STEP)))


# a problem a policy-wide validator reports: (location of the field, its input, what is wrong and the fix)
_Problem = tuple[tuple[str, ...], Any, str]


class Budget(_Strict):
    epsilon_per_row: Annotated[float, Field(gt=0, allow_inf_nan=False, strict=True,
                                            description="Total eps over all columns of one row.")]
    strategy: Literal["split", "sample"] = Field(
        "split", description="split: each privatized column has its own epsilon, their sum <= epsilon_per_row. "
                             "sample: each row reports only m of its d privatized columns (chosen by the keyed "
                             "PRF, independently of the data), each at epsilon_per_row / m; the others are empty.")
    sample_columns: Annotated[int, Field(ge=1, strict=True)] | None = Field(
        None, description="strategy sample only: m, the number of columns each row reports (default "
                          "max(1, min(d, floor(epsilon_per_row / 2.5))).")
    lifetime_epsilon: Annotated[float, Field(gt=0, allow_inf_nan=False, strict=True)] | None = Field(
        None, description="Most eps any one person (subject_key) may spend over all releases recorded in the "
                          "spend ledger; a release that would take someone past it is refused (or, with "
                          "--allow-partial, leaves them out). Needs subject_key.")


class InputOptions(_Strict):
    csv_null_values: list[str] = Field(default_factory=lambda: list(DEFAULT_CSV_NULLS),
                                       description="CSV cells read as missing.")
    csv_delimiter: Annotated[str, Field(min_length=1, max_length=1)] = ","


class OutputOptions(_Strict):
    row_order: Literal["shuffled", "as-input"] = Field(
        "shuffled", description="shuffled (the default): the extract lists the rows in a keyed pseudorandom order, "
                                "independent of the data, so a table exported sorted by a sensitive column does not "
                                "give that column away through a row's neighbours. as-input: keep the input's row "
                                "order (only when partners must align rows with another file; the input's order is "
                                "then released and may disclose what it was sorted by).")
    one_row_per_person: Annotated[bool, Field(strict=True)] = Field(
        False, description="The steward declares that every person has at most one row of the input (with "
                           "subject_key, privatize also checks it and refuses a release where a subject repeats). "
                           "One of the conditions under which the manifest states the central guarantee that "
                           "shuffling gives.")


MAX_JOINT_CELLS = 1024
"""The largest product domain of a joint group: every row's report and its per-row estimate are
vectors over all the cells (a subset report is one character per cell), so the extract's size and
the decoder's memory and time grow with the number of cells."""


class JointGroup(_Strict):
    """A group of categorical (or binned) columns randomized as one report over their product domain."""

    columns: list[Annotated[str, Field(strict=True, min_length=1)]] = Field(
        description="The member columns, in order (the first varies slowest in the product code); each is "
                    "declared under columns with its categories or bins, missing/unknown handling and epsilon.")
    mechanism: str | None = Field(None, description=_mechanisms_doc("frequency") + " over the product domain; "
                                  "absent or 'auto': the lowest variance, by the rule of a categorical column.")
    hash_range: StrictInt | None = Field(None, description=_field_doc("hash_range", "frequency", only=True))
    subset_size: StrictInt | None = Field(None, description=_field_doc("subset_size", "frequency", only=True))


class Policy(_Strict):
    """A release policy (the file's top level)."""

    budget: Budget
    unlisted: Literal["error", "drop"] = "error"
    input: InputOptions = Field(default_factory=InputOptions)
    output: OutputOptions = Field(default_factory=OutputOptions)
    quality: Quality | None = Field(None, description="Policy-wide default targets: max_se for frequency shares, "
                                                      "max_relative_se for means (a column's own quality overrides).")
    subject_key: Annotated[str, Field(strict=True, min_length=1)] | None = Field(
        None, description="Input column that identifies a person (memoized columns key their randomness on it). "
                          "It is never released: leave it out of columns or give it type: drop.")
    columns: dict[str, ColumnPolicy] = Field(min_length=1)
    joint: dict[str, JointGroup] | None = Field(
        None, description="Joint groups: name -> {columns: [A, B, ...]}; each group's members are randomized as one "
                          "report over their product domain at the sum of their eps (docs/policy.md, joint groups).")

    @property
    def privatized_names(self) -> list[str]:
        """Names of every categorical and numeric column, group members included, in policy order."""
        return [n for n, c in self.columns.items() if isinstance(c, (CategoricalColumn, NumericColumn))]

    @property
    def group_of(self) -> dict[str, str]:
        """Member column -> the name of its joint group."""
        return {m: g for g, grp in (self.joint or {}).items() for m in grp.columns}

    @property
    def privatized_columns(self) -> list[str]:
        """The d units a row's budget is spread over, in policy order: every categorical and numeric
        column that is not in a joint group, and each joint group once, at its first member's place."""
        group_of, out = self.group_of, []
        for n in self.privatized_names:
            unit = group_of.get(n, n)
            if unit not in out:
                out.append(unit)
        return out

    @property
    def reported_columns(self) -> int:
        """m: how many privatized columns each row reports (all d of them under split)."""
        d = len(self.privatized_columns)
        if self.budget.strategy == "split":
            return d
        return self.budget.sample_columns or sample_size(self.budget.epsilon_per_row, d)

    @property
    def sampled_epsilon(self) -> float:
        """strategy sample: the epsilon of every reported column, epsilon_per_row / m."""
        return self.budget.epsilon_per_row / self.reported_columns

    @model_validator(mode="after")
    def _joint(self) -> Policy:
        """Joint groups: at least two members, each a categorical or binned column of this policy in
        one group only, neither memoized nor with a mechanism of its own; a name of its own."""
        problems: list[_Problem] = []
        seen: dict[str, str] = {}
        for g, grp in (self.joint or {}).items():
            loc = ("joint", g, "columns")
            if g in self.columns:
                problems.append((("joint", g), g, "has the name of a column of the policy; a group's report is "
                                 "written under the group's name, so give the group a name of its own"))
            if len(grp.columns) < 2:
                problems.append((loc, grp.columns, "lists fewer than two columns; a joint group randomizes two or "
                                 "more columns together (remove the group to release the column on its own)"))
            if len(set(grp.columns)) != len(grp.columns):
                problems.append((loc, grp.columns, "lists a column twice; list each member once"))
            for m in grp.columns:
                problems += self._member_problems(g, m, seen)
                seen.setdefault(m, g)
        if problems:
            raise ValidationError.from_exception_data("Policy", [
                InitErrorDetails(type=PydanticCustomError("policy_joint", msg), loc=loc, input=value)
                for loc, value, msg in problems])
        return self

    def _member_problems(self, g: str, m: str, seen: dict[str, str]) -> list[_Problem]:
        loc = ("joint", g, "columns")
        col = self.columns.get(m)
        if col is None:
            return [(loc, m, f"names {m!r}, which is not a column of the policy; declare it under columns (with "
                     "its categories or bins and epsilon) or remove it from the group")]
        if m in seen and seen[m] != g:
            return [(loc, m, f"lists {m!r}, which is already a member of joint group {seen[m]!r}; a column can "
                     "be in one group only")]
        if isinstance(col, (PublicColumn, DropColumn)):
            return [(loc, m, f"lists {m!r}, a {col.type} column; only categorical columns and numeric columns "
                     "with bins can be randomized jointly")]
        if isinstance(col, NumericColumn) and col.bins is None:
            return [(loc, m, f"lists {m!r}, a numeric column without bins (released for means or quantiles); "
                     "give it bins: [edges] to release it as categories in the group, or remove it from the "
                     "group")]
        out: list[_Problem] = []
        for f in ("memoize", "rerandomize_epsilon"):
            if getattr(col, f, None):
                out.append((loc, m, f"lists {m!r}, which sets {f}; memoized randomness is not available for a "
                            "joint group's report: remove the column from the group or remove its " + f))
        own = (["mechanism"] if col.mechanism is not None else []) + _set_fields(col, "frequency")
        for f in own:
            if f:
                out.append((loc, m, f"lists {m!r}, which sets {f}; a member is randomized by its group's "
                            f"report, so its own {f} would not be used: set mechanism (and its fields) on the "
                            f"group joint.{g} instead, and remove {f} from column {m!r}"))
        return out

    @model_validator(mode="after")
    def _budget(self) -> Policy:
        eps_of = {n: c.epsilon for n, c in self.columns.items() if isinstance(c, (CategoricalColumn, NumericColumn))}
        strategy = self.budget.strategy
        problems = self._split_problems(eps_of) if strategy == "split" else self._sample_problems(eps_of)
        if problems:
            raise ValidationError.from_exception_data("Policy", [
                InitErrorDetails(type=PydanticCustomError("policy_budget", msg),
                                 loc=loc, input=value) for loc, value, msg in problems])
        if strategy == "sample":
            return self
        # every one is set under split (checked above); a column with a second layer releases less than its
        # epsilon per release (the composite of its two layers): ``resolve`` checks the sum with it
        total = sum(e or 0.0 for n, e in eps_of.items()
                    if getattr(self.columns[n], "rerandomize_epsilon", None) is None)
        if total > self.budget.epsilon_per_row + EPS_TOLERANCE:
            parts = ", ".join(f"{n} {c.epsilon:g}" for n, c in self.columns.items()
                              if isinstance(c, (CategoricalColumn, NumericColumn)))
            raise ValueError(f"the column epsilons add up to {total:g} ({parts}), more than "
                             f"budget.epsilon_per_row = {self.budget.epsilon_per_row:g}; lower some column "
                             "epsilons or (after review) raise the budget")
        return self

    def _split_problems(self, eps_of: dict[str, float | None]) -> list[_Problem]:
        """strategy split: every privatized column has its own epsilon; no sample_columns."""
        problems: list[_Problem] = []
        for n in self.privatized_names:
            if eps_of[n] is None:
                problems.append((("columns", n, "epsilon"), self.columns[n].model_dump(exclude_none=True),
                                 "is required under budget.strategy split (the default): give this column its "
                                 "own epsilon (the column epsilons may add up to at most budget.epsilon_per_row), "
                                 "or set budget.strategy: sample"))
        if self.budget.sample_columns is not None:
            problems.append((("budget", "sample_columns"), self.budget.sample_columns,
                             "applies only to budget.strategy: sample; remove it, or set strategy: sample"))
        return problems

    def _sample_problems(self, eps_of: dict[str, float | None]) -> list[_Problem]:
        """strategy sample: no column epsilons; m within 1..d; each reported column's share within bounds."""
        problems: list[_Problem] = []
        names = self.privatized_columns
        for n in self.privatized_names:
            eps = eps_of[n]
            if eps is not None:
                problems.append((("columns", n, "epsilon"), eps,
                                 "must be left out under budget.strategy sample: each row reports m of its d "
                                 "privatized columns and every reported column gets epsilon_per_row / m; "
                                 "remove this field"))
        m, d, eps_row = self.budget.sample_columns, len(names), self.budget.epsilon_per_row
        if d == 0:
            problems.append((("budget", "strategy"), self.budget.strategy, "sample needs at least one categorical "
                             "or numeric column to sample from; use strategy: split (the default)"))
        elif m is not None and m > d:
            problems.append((("budget", "sample_columns"), m,
                             f"is more than the {d} privatized (categorical and numeric) column(s) of this policy "
                             "(public and drop columns do not count); give at most "
                             f"{d}, or leave it out for the default rule"))
        elif eps_row / self.reported_columns > MAX_COLUMN_EPSILON:
            problems.append((("budget", "epsilon_per_row"), eps_row,
                             f"under strategy sample each reported column gets epsilon_per_row / m = "
                             f"{eps_row / self.reported_columns:g}, above the largest column epsilon "
                             f"({MAX_COLUMN_EPSILON:g}); lower the budget or raise budget.sample_columns"))
        return problems

    @model_validator(mode="after")
    def _subject(self) -> Policy:
        problems: list[_Problem] = []
        sk = self.subject_key
        for n, c in self.columns.items():
            if getattr(c, "memoize", None) and sk is None:
                problems.append((("columns", n, "memoize"), True,
                                 "needs subject_key at the top level of the policy (the input column that identifies "
                                 "a person, whose reports are memoized); add subject_key: COLUMN or remove memoize"))
        if self.budget.lifetime_epsilon is not None and sk is None:
            problems.append((("budget", "lifetime_epsilon"), self.budget.lifetime_epsilon,
                             "needs subject_key at the top level of the policy (the input column that identifies "
                             "a person, whose spend the ledger adds up); add subject_key: COLUMN or remove "
                             "lifetime_epsilon"))
        if sk is not None and sk in self.columns and not isinstance(self.columns[sk], DropColumn):
            problems.append((("columns", sk, "type"), self.columns[sk].type,
                             "this column is the policy's subject_key (it identifies a person) and is never "
                             "released; give it type: drop or leave it out of columns"))
        if problems:
            raise ValidationError.from_exception_data("Policy", [
                InitErrorDetails(type=PydanticCustomError("policy_subject", msg), loc=loc, input=value)
                for loc, value, msg in problems])
        return self

    def canonical(self) -> dict[str, Any]:
        out = self.model_dump(mode="json", exclude_none=True)
        if out["budget"].get("strategy") == "split":
            del out["budget"]["strategy"]  # the default: policies keep the hash they had before strategies
        if out.get("output") == OutputOptions().model_dump(mode="json"):
            del out["output"]  # the default (shuffled rows, no declaration)
        return out

    def sha256(self) -> str:
        return hashlib.sha256(json.dumps(self.canonical(), sort_keys=True, separators=(",", ":")).encode()).hexdigest()


# -- resolution: policy column -> concrete mechanism ------------------------------------

# what a policy column becomes: a numeric column with bins is released as a categorical one ("binned")
ColumnKind = Literal["categorical", "numeric", "binned", "public", "drop"]


@dataclass
class ResolvedColumn:
    name: str
    type: ColumnKind
    config: Any
    mechanism: mech.Mechanism | None = None
    chosen_because: str | None = None
    labels: list[str] = field(default_factory=list)   # categorical/binned: declared labels (codes 0..)
    missing_code: int | None = None
    other_code: int | None = None
    memoize: bool = False          # memoized randomness keyed by (subject, value)
    memo_grid: int | None = None   # numeric (not binned) memoized columns: steps of the coarse rounding grid
    # memoized columns with a second layer: its eps; ``mechanism`` is then the composite channel
    # (what one release reveals, what partners decode) and ``mechanism.permanent`` the memoized layer
    rerandomize_epsilon: float | None = None
    group: str | None = None       # a member of a joint group: the group's name (its mechanism is then None)
    members: list[ResolvedColumn] | None = None  # a joint group: its member columns, in order

    @property
    def domain_labels(self) -> list[str]:
        """A categorical or binned column's codes 0.. as labels: its declared labels, then <missing>
        and <other> where the policy adds them."""
        out = list(self.labels)
        if self.missing_code is not None:
            out.append(MISSING_LABEL)
        if self.other_code is not None:
            out.append(OTHER_LABEL)
        return out

    @property
    def privatized(self) -> bool:
        return self.mechanism is not None

    @property
    def permanent_epsilon(self) -> float:
        """The eps a distinct value of this column costs over a lifetime: the permanent layer's eps
        (the column's own eps without a second layer)."""
        assert self.mechanism is not None
        return self.mechanism.permanent.epsilon


def _where(name: str, fieldname: str) -> str:
    return f"column {name!r}, field '{fieldname}'"


def _set_fields(col: Any, *families: str) -> list[str]:
    """The fields of ``col`` (in the column model's order) that some mechanism of these families takes
    as a policy parameter and that the policy sets."""
    return [f for f in type(col).model_fields if getattr(col, f, None) is not None and mech.field_owners(f, *families)]


def _owners_text(field: str, *families: str) -> str:
    return " or ".join(mech.field_owners(field, *families))


def _build(name: str, cls: type[mech.Mechanism], epsilon: Any, domain: Any, params: dict[str, Any]) -> mech.Mechanism:
    """The column's mechanism from its class and policy fields; the mechanism's own errors name the column
    (and the field, for a missing or refused one)."""
    try:
        return cls.from_policy(epsilon, domain, params)
    except mech.MechanismParamError as err:
        raise PolicyError(f"{_where(name, err.field)}: {err}") from None
    except PolicyError as err:
        raise PolicyError(f"column {name!r}: {err}") from None


def _resolve_categories(name: str, col: Any) -> ResolvedColumn:
    """A categorical column, or a numeric one released as bins: a frequency oracle over its values."""
    kind: ColumnKind
    if isinstance(col, CategoricalColumn):
        labels = [category_label(c) for c in col.categories]
        kind = "categorical"
    else:
        labels = col.bin_labels()
        kind = "binned"
    domain = list(labels)
    rc = ResolvedColumn(name, kind, col, labels=labels)
    if getattr(col, "missing", None) in ("as-category", "as-answer"):   # binned: as-answer is a <missing> bin
        rc.missing_code = len(domain)
        domain.append(MISSING_LABEL)
    if getattr(col, "unknown", None) == "as-category":
        rc.other_code = len(domain)
        domain.append(OTHER_LABEL)
    if len(domain) < 2:
        raise PolicyError(f"{_where(name, 'categories')}: a column needs at least 2 possible values "
                          "(declare more categories, or use type: public / drop)")
    name_ = col.mechanism or "auto"
    cls = mech.registry().get(name_)
    frequency = mech.names_of("frequency")
    if kind == "binned" and cls is not None and cls.family == "frequency" and not cls.accepts_binned:
        usable = [n for n in frequency if mech.registry()[n].accepts_binned]
        raise PolicyError(f"{_where(name, 'mechanism')}: mechanism {name_} is not available for a numeric column "
                          f"released as bins ({cls.binned_refusal}); use one of {', '.join(usable)}, or leave "
                          "mechanism out to pick the lowest-variance one")
    takes = cls.policy_fields() if cls is not None else ()
    params: dict[str, Any] = {}
    for fieldname in _set_fields(col, "frequency"):
        if fieldname not in takes:
            owner = _owners_text(fieldname, "frequency")
            raise PolicyError(f"{_where(name, fieldname)}: {fieldname} applies to mechanism {owner} only; set "
                              f"mechanism: {owner} to use it, or remove {fieldname}")
        params[fieldname] = getattr(col, fieldname)
    if name_ == "auto":
        rc.mechanism, rc.chosen_because = mech.choose_categorical(col.epsilon, domain)
    elif cls is not None and cls.family == "frequency":
        rc.mechanism = _build(name, cls, col.epsilon, domain, params)
    elif cls is not None:
        raise PolicyError(f"{_where(name, 'mechanism')}: {name_!r} randomizes numbers, but this column is "
                          f"released as categories{' (bins)' if kind == 'binned' else ''}; use one of "
                          f"{', '.join(frequency)} or leave mechanism out")
    else:
        raise PolicyError(f"{_where(name, 'mechanism')}: unknown mechanism {name_!r}; for this column use one "
                          f"of {', '.join(frequency)}, or leave it out to pick the lowest-variance one")
    return rc


def _refuse_fields_of_others(name: str, col: NumericColumn, chosen: str) -> None:
    """A distribution field set for a column whose mechanism the tool chose, which does not take it."""
    takes = mech.registry()[chosen].policy_fields()
    for fieldname in _set_fields(col, "distribution"):
        if fieldname not in takes:
            raise PolicyError(f"{_where(name, fieldname)}: {fieldname} applies to mechanism "
                              f"{_owners_text(fieldname, 'distribution')} only, and the automatic choice for "
                              f"`needs: [quantiles]` is {chosen}. Add `mechanism: "
                              f"{mech.field_owners(fieldname, 'distribution')[0]}` to use it, or remove {fieldname}")


def _resolve_number(name: str, col: NumericColumn) -> ResolvedColumn:
    """A numeric column released as a number: a mean or distribution mechanism on its bounds."""
    rc = ResolvedColumn(name, "numeric", col)
    name_ = col.mechanism or "auto"
    numeric = mech.names_of("mean", "distribution", "quantile")
    for fieldname in _set_fields(col, "frequency"):
        raise PolicyError(f"{_where(name, fieldname)}: {fieldname} applies to mechanism "
                          f"{_owners_text(fieldname, 'frequency')} on bins only")
    auto_quantiles = name_ == "auto" and "quantiles" in (col.needs or ())
    if auto_quantiles:   # one quantile named (quantile:): the mechanism with the smaller predicted SE for it
        name_, rc.chosen_because = mech.choose_quantiles(col.epsilon, col.domain, col.quantile)
        _refuse_fields_of_others(name, col, name_)
    cls = mech.registry().get(name_)
    takes = cls.policy_fields() if cls is not None else mech.AUTO_NUMERIC_FIELDS if name_ == "auto" else ()
    params: dict[str, Any] = {}
    refused: list[str] = []
    for fieldname in _set_fields(col, "mean", "distribution", "quantile"):
        if auto_quantiles and fieldname == "quantile" and fieldname not in takes:
            continue   # the quantile the automatic choice was made for; the chosen mechanism estimates it too
        if fieldname in takes:
            params[fieldname] = getattr(col, fieldname)
        elif fieldname not in mech.AUTO_NUMERIC_FIELDS:
            raise PolicyError(f"{_where(name, fieldname)}: {fieldname} applies to mechanism "
                              f"{_owners_text(fieldname, 'mean', 'distribution', 'quantile')} only")
        elif cls is not None and cls.family != "frequency":
            refused.append(fieldname)   # a field of the automatic choice that this mechanism has no use for
    if name_ == "auto":
        rc.mechanism, rc.chosen_because = mech.choose_numeric(col.epsilon, col.domain, **params)  # type: ignore[arg-type]
    elif cls is not None and cls.family != "frequency":
        if refused:
            raise PolicyError(f"{_where(name, refused[0])}: {cls.refuse_field(refused[0])}")
        rc.mechanism = _build(name, cls, col.epsilon, col.domain, params)
    elif cls is not None:
        raise PolicyError(f"{_where(name, 'mechanism')}: {name_!r} randomizes categories, but this column is "
                          f"numeric; use one of {', '.join(numeric)}, or add bins: [edges] to release it "
                          "as categories")
    else:
        raise PolicyError(f"{_where(name, 'mechanism')}: unknown mechanism {name_!r}; for a numeric column use one "
                          f"of {', '.join(numeric)}, or leave it out to pick the lowest-variance one")
    return rc


def resolve_column(name: str, col: Any) -> ResolvedColumn:
    """The concrete mechanism of one policy column.  Which policy fields a mechanism takes, and
    why it refuses one, is asked of the mechanism class (``Params``, ``field_refusals``,
    ``accepts_binned``); nothing here names a mechanism."""
    if isinstance(col, DropColumn):
        return ResolvedColumn(name, "drop", col)
    if isinstance(col, PublicColumn):
        return ResolvedColumn(name, "public", col)
    if isinstance(col, CategoricalColumn) or (isinstance(col, NumericColumn) and col.bins is not None):
        return _resolve_categories(name, col)
    assert isinstance(col, NumericColumn)
    if col.missing == "as-answer":
        return _resolve_with_missing_flag(name, col)
    return _resolve_number(name, col)


VALUE_EPS_MARGIN = 1e-12


def _resolve_with_missing_flag(name: str, col: NumericColumn) -> ResolvedColumn:
    """missing: as-answer without bins: the value through the column's mean mechanism at the column's
    eps minus missing_epsilon, beside a randomized missing flag at missing_epsilon (one mechanism,
    mechanisms/missing.py)."""
    eps = col.epsilon
    assert eps is not None   # under sample, resolve gives every column its eps first
    flag_eps = col.missing_epsilon if col.missing_epsilon is not None else mech.DEFAULT_FLAG_SHARE * eps
    if flag_eps >= eps:
        raise PolicyError(f"{_where(name, 'missing_epsilon')}: missing_epsilon ({flag_eps:g}) must be below the "
                          f"column's epsilon ({eps:g}); lower missing_epsilon or leave it out (default: a quarter of "
                          "the column's epsilon)")
    # the value gets the rest less 1e-12, so that the product of the two realized ratios (each at most a
    # certified lower bound of e^its eps) stays below the certified lower bound of e^eps, whatever the rounding
    rc = _resolve_number(name, col.model_copy(update={"epsilon": round(eps - flag_eps, 12) - VALUE_EPS_MARGIN}))
    rc.config = col
    assert rc.mechanism is not None
    try:
        rc.mechanism = mech.with_missing_flag(rc.mechanism, flag_eps, eps)
    except PolicyError as err:
        raise PolicyError(f"{_where(name, 'missing')}: {err}") from None
    return rc


@dataclass
class LoadedPolicy:
    policy: Policy
    source: str
    columns: list[ResolvedColumn]

    @property
    def by_name(self) -> dict[str, ResolvedColumn]:
        return {c.name: c for c in self.columns}

    @property
    def strategy(self) -> str:
        return self.policy.budget.strategy

    @property
    def report_rate(self) -> float:
        """m/d: the share of rows in which each privatized column is reported (1 under split)."""
        d = len(self.policy.privatized_columns)
        return self.policy.reported_columns / d if (self.strategy == "sample" and d) else 1.0

    @property
    def epsilon_total(self) -> float:
        """A row's privacy loss: the sum over its privatized columns (split), or m x eps_row/m
        over the m columns it reports (sample; which ones is independent of the data).  A column
        with a second layer counts its composite eps (what one release reveals), so under sample
        the loss is m x the largest column eps (eps_row/m unless every column has a second layer)."""
        if self.strategy == "sample":
            eps = [c.mechanism.epsilon for c in self.columns if c.mechanism is not None]
            return self.policy.reported_columns * (max(eps) if eps else self.policy.sampled_epsilon)
        return sum(c.mechanism.epsilon for c in self.columns if c.mechanism is not None)


def resolve(policy: Policy, source: str = "<policy>") -> LoadedPolicy:
    cols = []
    for name, col in policy.columns.items():
        if policy.budget.strategy == "sample" and isinstance(col, (CategoricalColumn, NumericColumn)):
            col = col.model_copy(update={"epsilon": policy.sampled_epsilon})  # every reported column: eps_row/m
        try:
            rc = resolve_column(name, col)
            if getattr(col, "memoize", None):
                _memoize(rc, source)
            cols.append(rc)
        except PolicyError as err:
            cls = mech.registry().get(getattr(col, "mechanism", None) or "")
            if (policy.budget.strategy == "sample" and isinstance(col, NumericColumn) and cls is not None
                    and cls.exact_decimal_epsilon and "field 'epsilon'" in str(err)):
                raise PolicyError(_sampled_exact_eps_message(policy, name, source, cls.name)) from None
            raise PolicyError(f"policy {source}: {err}") from None
    for g, grp in (policy.joint or {}).items():
        cols.append(_resolve_group(g, grp, [c for c in cols if c.name in grp.columns], policy, source))
    loaded = LoadedPolicy(policy, source, cols)
    _check_layered_budget(loaded)
    return loaded


def joint_label(values: list[str]) -> str:
    """The label of one cell of a joint group's product domain: its members' labels as a compact
    JSON array (unambiguous whatever characters the labels hold)."""
    return json.dumps(list(values), ensure_ascii=False, separators=(",", ":"))


def _resolve_group(g: str, grp: JointGroup, found: list[ResolvedColumn], policy: Policy,
                   source: str) -> ResolvedColumn:
    """A joint group: one frequency oracle over the product of its members' domains (codes in mixed
    radix, the first member most significant) at the sum of their eps (under strategy sample, the
    eps of one reported unit); the members keep their encoding and lose their own mechanism."""
    by = {c.name: c for c in found}
    members = [by[m] for m in grp.columns]
    sizes = [len(m.domain_labels) for m in members]
    cells = math.prod(sizes)
    where = f"policy {source}: joint group {g!r}, field 'columns'"
    if cells > MAX_JOINT_CELLS:
        raise PolicyError(f"{where}: its product domain has {' x '.join(map(str, sizes))} = {cells} cells, more "
                          f"than the {MAX_JOINT_CELLS} a group may have (every row's report and per-row estimate "
                          "is a vector over all the cells, so the extract's size and the decoder's memory and time "
                          "grow with them); group fewer or coarser columns, or release some separately")
    for m in members:
        m.mechanism, m.chosen_because, m.group = None, None, g
    if policy.budget.strategy == "sample":
        eps = policy.sampled_epsilon
    else:
        eps = sum(float(m.config.epsilon or 0.0) for m in members)
    domain = [joint_label(list(t)) for t in itertools.product(*(m.domain_labels for m in members))]
    rc = ResolvedColumn(g, "categorical", grp, labels=domain, members=members)
    name_ = grp.mechanism or "auto"
    cls = mech.registry().get(name_)
    frequency = mech.names_of("frequency")
    takes = cls.policy_fields() if cls is not None else ()
    params: dict[str, Any] = {}
    gwhere = f"policy {source}: joint group {g!r}"
    for fieldname in ("hash_range", "subset_size"):
        value = getattr(grp, fieldname)
        if value is None:
            continue
        if fieldname not in takes:
            owner = _owners_text(fieldname, "frequency")
            raise PolicyError(f"{gwhere}, field '{fieldname}': {fieldname} applies to mechanism {owner} only; set "
                              f"mechanism: {owner} on the group to use it, or remove {fieldname}")
        params[fieldname] = value
    if name_ == "auto":
        rc.mechanism, rc.chosen_because = mech.choose_categorical(eps, domain)
    elif cls is not None and cls.family == "frequency":
        try:
            rc.mechanism = cls.from_policy(eps, domain, params)
        except mech.MechanismParamError as err:
            raise PolicyError(f"{gwhere}, field '{err.field}': {err}") from None
        except PolicyError as err:
            raise PolicyError(f"{gwhere}: {err}") from None
    else:
        raise PolicyError(f"{gwhere}, field 'mechanism': {name_!r} is not a frequency oracle; a group's report is "
                          f"over the cells of its product domain: use one of {', '.join(frequency)}, or leave "
                          "mechanism out to pick the lowest-variance one")
    return rc


def _check_layered_budget(lp: LoadedPolicy) -> None:
    """strategy split with second layers: a row's eps per release is the sum of the column eps, each
    layered column counted at the composite eps of its two layers (what one release reveals)."""
    if lp.strategy != "split" or not any(rc.rerandomize_epsilon is not None for rc in lp.columns):
        return
    total, budget = lp.epsilon_total, lp.policy.budget.epsilon_per_row
    if total > budget + EPS_TOLERANCE:
        parts = ", ".join(f"{rc.name} {rc.mechanism.epsilon:.6g}" + (" (composite of its two layers)"
                                                                   if rc.rerandomize_epsilon is not None else "")
                          for rc in lp.columns if rc.mechanism is not None)
        raise PolicyError(f"policy {lp.source}: the column epsilons per release add up to {total:.6g} ({parts}), "
                          f"more than budget.epsilon_per_row = {budget:g}; lower some column epsilons or "
                          "rerandomize_epsilon values, or (after review) raise the budget")


DEFAULT_MEMO_GRID = 32


def _memoize(rc: ResolvedColumn, source: str) -> None:
    assert rc.mechanism is not None
    if not rc.mechanism.supports_memoize:
        raise PolicyError(f"{_where(rc.name, 'memoize')}: {rc.mechanism.memoize_refusal}")
    rc.memoize = True
    if rc.type == "numeric":
        rc.memo_grid = rc.config.memo_grid or DEFAULT_MEMO_GRID
    eps2 = getattr(rc.config, "rerandomize_epsilon", None)
    if eps2 is not None:
        if not rc.mechanism.supports_second_layer:
            raise PolicyError(f"{_where(rc.name, 'rerandomize_epsilon')}: {rc.mechanism.second_layer_refusal}")
        rc.mechanism = rc.mechanism.with_second_layer(eps2)
        rc.rerandomize_epsilon = float(eps2)


def _sampled_exact_eps_message(policy: Policy, name: str, source: str, mechanism: str) -> str:
    """A mechanism with ``exact_decimal_epsilon`` takes its eps as the exact fraction its decimal
    text denotes; under strategy sample that eps is the float epsilon_per_row / m, which the policy
    does not write."""
    m = policy.reported_columns
    return (f"policy {source}: column {name!r}, mechanism {mechanism}: its exact sampler needs an epsilon whose "
            "decimal form is a short fraction, but under budget.strategy sample the column's epsilon is "
            f"budget.epsilon_per_row / m = {policy.budget.epsilon_per_row:g} / {m} = {policy.sampled_epsilon!r} "
            "(m = budget.sample_columns, or the default rule), which it cannot use exactly. Choose "
            "budget.epsilon_per_row and budget.sample_columns so that their quotient, computed in floating point, "
            "has a short decimal form (for example 0.9 / 3 = 0.3; `ldpt policy check` shows whether it does), use "
            "budget.strategy split with a column epsilon such as 0.3, or give this column another numeric mechanism")


# -- loading ------------------------------------------------------------------------------

_PLAIN_INT = re.compile(r"-?(?:0|[1-9][0-9]*)")
MAX_POLICY_VALUES = 2_000_000  # a 1024 x 1024 matrix (the matrix mechanism's largest) and 100k categories fit


def _node_get(node: yaml.Node, key: str) -> yaml.Node | None:
    if isinstance(node, yaml.MappingNode):
        for k, v in node.value:
            if isinstance(k, yaml.ScalarNode) and k.value == key:
                return v
    return None


def _label_problem(item: yaml.ScalarNode) -> str | None:
    """What YAML makes of an unquoted category that does not read as the text it shows: yes/no/on/off
    and true/false become booleans, 010 the number 8, 1_000 the number 1000, 1.50 the number 1.5."""
    tag, text = item.tag.rsplit(":", 1)[-1], item.value
    if tag not in ("bool", "int", "float"):
        return None
    value = yaml.safe_load(text)
    if tag == "bool":
        return f"the unquoted {text} is read by YAML as the boolean {'true' if value else 'false'}, not as the text"
    if (_PLAIN_INT.fullmatch(text) if tag == "int" else category_label(value) == text):
        return None
    return f"the unquoted {text} is read by YAML as the number {category_label(value)}, not as the text {text}"


def _check_yaml_labels(root: yaml.Node) -> None:
    """Categories that YAML would turn into something other than the text written (refused with
    the column and entry, before anything is built: the label would never match the data)."""
    columns = _node_get(root, "columns")
    if not isinstance(columns, yaml.MappingNode):
        return
    for name_node, col in columns.value:
        cats = _node_get(col, "categories")
        if not isinstance(cats, yaml.SequenceNode) or not isinstance(name_node, yaml.ScalarNode):
            continue
        for i, item in enumerate(cats.value, 1):
            if not isinstance(item, yaml.ScalarNode) or item.style is not None:
                continue
            problem = _label_problem(item)
            if problem is not None:
                raise LoadProblem(f"column {name_node.value!r}, categories entry {i}: {problem}; write it in quotes "
                                  f"(\"{item.value}\") to keep it as written", item.start_mark.line + 1)


class _NumberText(str):
    """A JSON number's text as written (``_check_json_labels``)."""


def _check_json_labels(text: str) -> None:
    """Categories written as JSON numbers whose text the policy cannot keep: 1.50 is the number 1.5
    and 1e3 the number 1000, so the label would be 1.5 or 1000 and never match the data's 1.50 or
    1e3 (refused with the column and entry, as YAML's are)."""
    data = json.loads(text, parse_float=_NumberText)
    columns = data.get("columns") if isinstance(data, dict) else None
    if not isinstance(columns, dict):
        return
    for name, col in columns.items():
        cats = col.get("categories") if isinstance(col, dict) else None
        if not isinstance(cats, list):
            continue
        for i, item in enumerate(cats, 1):
            if isinstance(item, _NumberText) and category_label(float(item)) != item:
                at = re.search(r"(?<![0-9.eE+-])" + re.escape(item) + r"(?![0-9.eE+-])", text)
                raise LoadProblem(f"column {name!r}, categories entry {i}: the JSON number {item} is the number "
                                  f"{category_label(float(item))}, not the text {item}; write it as a string "
                                  f"(\"{item}\") to keep it as written",
                                  None if at is None else text.count("\n", 0, at.start()) + 1)


def _format_loc(loc: tuple[Any, ...]) -> str:
    parts = [str(p) for p in loc]
    if len(parts) >= 2 and parts[0] == "columns":
        col = parts[1]
        rest = [p for p in parts[2:] if p not in ("categorical", "numeric", "drop", "public", "Fill",
                                                     "literal['error']", "function-after[_domain(), NumericColumn]")]
        rest = [p for p in rest if not p.startswith("function-") and not p.startswith("literal[")]
        return f"column {col!r}" + (f", field '{'.'.join(rest)}'" if rest else "")
    if len(parts) >= 2 and parts[0] == "joint":
        rest = parts[2:]
        return f"joint group {parts[1]!r}" + (f", field '{'.'.join(rest)}'" if rest else "")
    if not parts:
        return "top level"
    return "field '" + ".".join(p for p in parts if not p.startswith("function-")) + "'"


def _format_validation(err: ValidationError) -> list[str]:
    msgs: list[str] = []
    seen: set[str] = set()
    for e in err.errors():
        where = _format_loc(tuple(e.get("loc", ())))
        msg = e.get("msg", "invalid")
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, "):]
        etype = e.get("type", "")
        if etype == "extra_forbidden":
            msg = "is not a known field (check its spelling; `ldpt policy schema` lists the fields)"
        elif etype == "union_tag_invalid":
            msg = "type must be one of categorical, numeric, public, drop"
        elif etype == "union_tag_not_found":
            msg = "needs a 'type' (categorical, numeric, public or drop)"
        elif "input" in e and etype not in ("missing",) and not isinstance(e["input"], (dict, list)):
            msg = f"{msg} (got {e['input']!r})"
        line = f"{where}: {msg}"
        if line not in seen:
            seen.add(line)
            msgs.append(line)
    return msgs


def parse_policy(data: Any, source: str) -> LoadedPolicy:
    if not isinstance(data, dict):
        raise PolicyError(f"policy {source}: the top level must be a mapping with 'budget' and 'columns'. "
                          "See docs/policy.md for an example.")
    try:
        policy = Policy.model_validate(data)
    except ValidationError as err:
        problems = _format_validation(err)
        raise PolicyError(f"policy {source} has {len(problems)} problem{'s' if len(problems) > 1 else ''}: "
                          + "; ".join(problems) + ". Fix the policy and run `ldpt policy check` again.") from None
    return resolve(policy, source)


def load_policy(path: Path | str) -> LoadedPolicy:
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise PolicyError(f"policy file {path} does not exist. Check the path given to --policy.") from None
    except UnicodeDecodeError as err:
        raise PolicyError(f"policy file {path} is not UTF-8 text (the byte at offset {err.start} is not valid "
                          "UTF-8). A policy is a UTF-8 YAML or JSON text file: save it with that encoding.") from None
    except OSError as err:
        raise PolicyError(f"policy file {path} cannot be read ({getattr(err, 'strerror', None) or 'read error'}). "
                          "Check the path and its permissions.") from None
    try:
        if path.suffix.lower() == ".json":
            data = load_json(text, MAX_POLICY_VALUES)
            _check_json_labels(text)
        else:
            data = load_yaml(text, _check_yaml_labels, MAX_POLICY_VALUES)
    except LoadProblem as err:
        where = f" (line {err.line})" if err.line is not None else ""
        raise PolicyError(f"policy file {path}{where}: {err.text}. Fix the policy and run `ldpt policy check` "
                          "again.") from None
    except json.JSONDecodeError as err:
        raise PolicyError(f"policy file {path}: JSON syntax error at line {err.lineno}, column {err.colno}: "
                          f"{err.msg}. Fix the syntax and try again.") from None
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark is not None else ""
        problem = getattr(err, "problem", None) or str(err)
        raise PolicyError(f"policy file {path}: YAML syntax error{where}: {problem}. Fix the syntax "
                          "(indentation, colons, brackets) and try again.") from None
    return parse_policy(data, str(path))


def policy_json_schema() -> dict[str, Any]:
    schema = Policy.model_json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    schema["title"] = "ldptransform release policy"
    return schema
