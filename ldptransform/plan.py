"""Release planning: how precise each statistic will be before anything is released.

For every privatized column and every statistic the policy says partners need, the
planner predicts the standard error that ``ldpt estimate`` will report at N rows, the rows
needed to meet the policy's quality targets, and whether *any* eps-LDP mechanism could
meet a target at N rows (from the lower bounds in ``mechanisms/bounds.py``, not from one
mechanism).  Nothing here reads data: the predictions are worst cases over data sets.

What "SE" means here (the same quantity ``ldpt estimate`` reports, see estimate.py: the
spread of the per-row estimates over sqrt(n), which also counts the spread of the true
values):

* frequencies: the root mean square over the column's values of each share's SE.  Per
  report, n * Var = (noise variance of the mechanism, summed over values) + (1 - sum f^2),
  averaged over the k values; the second part is largest for equal shares, which is the case
  predicted (docs/formulas.md sections 0.3 and 0.4).
* means: the SE of the mean, worst case over data (data split evenly between the two
  bounds, which maximizes the spread of the reports for every mean mechanism of the tool:
  each one's second moment grows with |value - middle|).  A distribution mechanism's mean
  (needs: [mean, quantiles]; estimate reads it off the decoded distribution with
  ``Distribution.mean_ci``): exact from the covariance of the decoded bucket estimates where the
  decoder gives one (the mean is linear in them), else the simulated root mean squared error of
  the mean, as for medians below (``distribution_mean_se``); both on the skewed reference data,
  not a worst case.
* medians (needs: quantiles): no closed form; predicted by simulating releases of skewed
  reference data (the Beta(2, 5) shape stretched over the bounds) under a fixed public
  planning key and decoding them as ``ldpt estimate`` does, at min(N, 20000) rows: the root
  mean squared error around the data's true median, its spread scaled by sqrt(rows simulated
  / N) and its bias kept as simulated.  The shape is common practice for a skewed test
  distribution, not a worst case; an approximation: say so when quoting it.

The lower bounds are in the same units: the smallest worst-case SE any eps-LDP mechanism is
known to reach (frequencies: docs/formulas.md section 4 via bounds.frequency_lower_bound, plus
the same spread term; means: the two-point bound, which two-point attains exactly).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields, replace
from typing import TYPE_CHECKING, Any, cast

import numpy as np

from . import mechanisms as mech
from .errors import UsageError
from .mechanisms import bounds
from .results import DictView
from .policy import (
    CategoricalColumn,
    LoadedPolicy,
    NumericColumn,
    Quality,
    ResolvedColumn,
    resolve_column,
    sample_size,
)

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

SIM_ROWS = 20000
SIM_RELEASES = 24
MAX_COLUMN_EPS = 50.0


# -- per-row variances (worst case over data) -----------------------------------------------

def frequency_row_variance(m: mech.Mechanism) -> float:
    """n * (mean over values of Var of a share) as ``ldpt estimate`` reports it, worst case
    (the mechanism's ``frequency_row_variance``)."""
    v = m.frequency_row_variance()
    if v is None:
        raise ValueError(f"mechanism {m.name} does not estimate frequencies")
    return v


def frequency_row_variance_bound(epsilon: float, k: int) -> float:
    return (bounds.frequency_lower_bound(epsilon, k) + 1.0 - 1.0 / k) / k


def mean_row_variance(m: mech.Mechanism) -> float:
    """n * Var of the mean as ``ldpt estimate`` reports it, worst case over data (column units;
    the mechanism's ``mean_row_variance``)."""
    v = m.mean_row_variance()
    if v is None:
        raise ValueError(f"mechanism {m.name} gives no predicted SE for a mean")
    return v


def memo_rounding_variance(rc: ResolvedColumn) -> float:
    """Per-row variance the memo grid adds to a memoized numeric column (0 otherwise): alpha-point
    rounding to steps of (hi - lo) / memo_grid adds frac(t)(1 - frac(t)) step^2 <= step^2 / 4
    (Ding, Kulkarni, Yekhanin 2017).  Added to the mechanism's worst case as it is, which
    over-states the sum a little (values at the bounds, the mechanisms' worst case, are on the
    grid and not rounded)."""
    if not rc.memoize or not rc.memo_grid:
        return 0.0
    lo, hi = rc.config.domain
    step = (hi - lo) / rc.memo_grid
    return step * step / 4.0


def mean_row_variance_bound(epsilon: float, lo: float, hi: float) -> float:
    """Worst case over data of any unbiased eps-LDP mean estimate, as estimate reports it:
    (hi - lo)^2 [e^eps/(e^eps - 1)^2 + 1/4] (bounds.mean_lower_bound plus the spread of data
    split evenly between the bounds).  Two-point attains it."""
    return bounds.mean_lower_bound(epsilon, (lo, hi)) + (hi - lo) ** 2 / 4.0


# -- simulated median SE ----------------------------------------------------------------------

_PLAN_KEY = bytes(range(32))  # public: planning simulates noise on invented, evenly spread values only


def _simulate(m: mech.Mechanism, rc: ResolvedColumn, rows: float, releases: int) -> tuple[np.ndarray, list[Any]]:
    """``releases`` simulated releases of the skewed reference data (see module docstring) at
    min(rows, SIM_ROWS) rows under the public planning key, each decoded as ``ldpt estimate``
    decodes it: (the reference values, the decoded distributions)."""
    from .distribution import binned_distribution
    from .keys import SecretKey
    from .mechanisms.decoders import DistributionDecoder, FrequencyDecoder
    from .random import KeyedStream
    from .random.variates import to_unit
    from scipy.stats import beta

    n = int(min(rows, SIM_ROWS))
    cfg = rc.config
    lo, hi = cfg.domain
    # skewed reference data: the Beta(2, 5) shape on the bounds (median at about 26% of the
    # width), so that an estimator pulled toward the middle of the range shows its bias
    x = lo + beta.ppf((np.arange(n) + 0.5) / n, 2, 5) * (hi - lo)
    key = SecretKey(_PLAN_KEY)
    if rc.memoize and rc.memo_grid and rc.type == "numeric":  # the memo grid's rounding, as release applies it
        g = rc.memo_grid
        u = to_unit(KeyedStream(key, "0" * 32, "plan-memo", rc.name).words(0, n, 1)[:, 0])
        j = np.clip(np.floor((x - lo) * (g / (hi - lo)) + u), 0, g)
        x = np.minimum(lo + j * ((hi - lo) / g), hi)
    dists = []
    for r in range(releases):
        words = KeyedStream(key, f"{r:032x}", "plan", rc.name).words(0, n, m.words_per_row)
        if rc.type == "binned":
            edges = np.asarray(cfg.bins, dtype=float)
            codes = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, len(edges) - 2)
            cst = cast(FrequencyDecoder, m.decoder(joint=True)).add(m.randomize(codes, words))
            cov, shares = cst.covariance(), np.asarray(cst.estimates()[0])
            code = _missing_code(rc)
            if code is not None:   # missing: as-answer: the bins among rows with a value, as estimate
                from .mechanisms.decoders import shares_without

                kept, kept_cov = shares_without(shares, cov, code)
                assert kept is not None and kept_cov is not None   # the reference data has no missing value
                shares, cov = kept, kept_cov
            prefix_se = np.sqrt(np.maximum(np.diag(np.cumsum(np.cumsum(cov, axis=0), axis=1)), 0.0))
            dists.append(binned_distribution(edges, shares, prefix_se, cov=cov, n=cst.n))
        else:
            dists.append(cast(DistributionDecoder, m.decoder()).add(m.randomize(x, words)).distribution())
    return x, dists


def _missing_code(rc: ResolvedColumn) -> int | None:
    """The code of a binned column's <missing> bin (missing: as-answer), None without one: the
    resolved column's, or for a column rebuilt from a manifest the code after the last bin."""
    if rc.missing_code is not None or rc.type != "binned":
        return rc.missing_code
    bins = len(rc.config.bins) - 1
    return bins if cast(mech.FrequencyOracle, rc.mechanism).k > bins else None   # a binned column: a frequency oracle


def _rmse(estimates: list[float], truth: float, n: int, rows: float) -> float:
    """Root mean squared error at ``rows`` rows of estimates simulated at ``n`` rows: the spread
    shrinks like 1/sqrt(rows); the bias is kept as it is (it shrinks more slowly, if at all,
    for a smoothing decoder)."""
    a = np.asarray(estimates, dtype=float)
    bias = float(a.mean() - truth)
    return float(math.sqrt(bias * bias + np.var(a, ddof=1) * n / rows))


def simulated_median_se(m: mech.Mechanism, rc: ResolvedColumn, rows: float) -> float | None:
    """SE of the median estimate at ``rows`` rows, by simulation (see module docstring)."""
    if rows < 2:
        return None
    x, dists = _simulate(m, rc, rows, SIM_RELEASES)
    return _rmse([d.quantile(0.5) for d in dists], float(np.median(x)), len(x), rows)


@dataclass(frozen=True)
class DistributionMeanSE:
    """The predicted SE of the mean a distribution mechanism's decoded distribution gives, and how."""

    se: float
    exact: bool      # True: from the decoded bucket covariance (linear in the masses); False: simulated RMSE
    meaning: str


def distribution_mean_se(m: mech.Mechanism, rc: ResolvedColumn, rows: float) -> DistributionMeanSE | None:
    """SE at ``rows`` rows of the mean read off a decoded distribution (``Distribution.mean_ci``,
    what ``ldpt estimate`` reports).  Where the decoder gives the exact covariance of its bucket
    estimates (unbiased level or bin estimates), the mean is linear in them and its SE is exact:
    sqrt(c' Cov c) of one simulated release of the reference data, scaled by sqrt(rows simulated
    / rows).  Where it does not (a smoothing decoder, whose estimate is biased and whose SE comes
    from a bootstrap), no formula holds: the root mean squared error around the reference data's
    true mean over SIM_RELEASES simulated releases, spread scaled and bias kept, as for the
    median.  None below 2 rows."""
    if rows < 2:
        return None
    x, dists = _simulate(m, rc, rows, 1)
    n = len(x)
    if dists[0].cov is not None:
        iv = dists[0].mean_ci(0.95)
        if iv.se is not None and math.isfinite(iv.se):
            return DistributionMeanSE(
                float(iv.se) * math.sqrt(n / rows), True,
                "SE of the mean read off the decoded distribution, exact from the covariance of its bucket estimates "
                f"(one simulated release of skewed reference data, Beta(2, 5) shape, at min(N, {SIM_ROWS}) rows, "
                "scaled by sqrt(rows)); the reported interval also spans where rows sit inside their buckets")
    x, dists = _simulate(m, rc, rows, SIM_RELEASES)
    return DistributionMeanSE(
        _rmse([d.mean() for d in dists], float(np.mean(x)), n, rows), False,
        f"root mean squared error of the mean read off the decoded distribution over {SIM_RELEASES} simulated "
        f"releases of skewed reference data (Beta(2, 5) shape) at min(N, {SIM_ROWS}) rows, spread scaled by "
        "sqrt(rows), bias kept: the decoder smooths, so no exact formula holds; an approximation")


# -- typed results ----------------------------------------------------------------------------

@dataclass(frozen=True)
class PlanStatistic(DictView):
    """The prediction for one statistic of one column.  Every field the statistic has is set;
    ``keys`` lists them in the JSON order of ``to_dict()`` (a field not in ``keys`` is absent,
    which is not the same as a field present with the value None)."""

    statistic: str
    se: float | None = None
    relative_se: float | None = None
    efficiency: float | None = None
    se_meaning: str | None = None
    note: str | None = None
    target_se: float | None = None
    target_relative_se: float | None = None
    best_possible_se: float | None = None
    meets_target: bool | None = None
    rows_needed: int | None = None
    rows_needed_best_possible: int | None = None
    impossible_at_rows: bool | None = None
    keys_: tuple[str, ...] = ()

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> PlanStatistic:
        known = {f.name for f in fields(cls)} - {"keys_"}
        unknown = set(d) - known
        if unknown:
            raise ValueError(f"unknown plan statistic fields: {', '.join(sorted(unknown))}")
        return cls(**dict(d), keys_=tuple(d))

    def to_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self.keys_}


@dataclass(frozen=True)
class PlanColumn(DictView):
    """One column of a plan: a privatized column with its statistics, or a public column (a note)."""

    name: str
    type: str
    mechanism: str | None = None
    epsilon: float | None = None
    chosen_because: str | None = None
    rows_reporting: float | None = None
    statistics: tuple[PlanStatistic, ...] | None = None
    note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        if self.statistics is None:
            return {"name": self.name, "type": self.type, "note": self.note}
        return {"name": self.name, "type": self.type, "mechanism": self.mechanism, "epsilon": self.epsilon,
                "chosen_because": self.chosen_because, "rows_reporting": self.rows_reporting,
                "statistics": [st.to_dict() for st in self.statistics]}


PLAN_FRAME_COLUMNS = ("column", "type", "mechanism", "epsilon", "rows_reporting", "statistic", "se", "relative_se",
                      "target_se", "target_relative_se", "best_possible_se", "meets_target", "rows_needed",
                      "rows_needed_best_possible", "impossible_at_rows", "efficiency", "se_meaning", "note",
                      "chosen_because", "fields", "rows", "strategy", "epsilon_per_row", "epsilon_per_row_budget",
                      "report_rate")
"""The columns of ``PlanResult.to_frame()``, in order."""

_PLAN_FLOATS = ("epsilon", "rows_reporting", "se", "relative_se", "target_se", "target_relative_se",
                "best_possible_se", "efficiency", "epsilon_per_row", "epsilon_per_row_budget", "report_rate")
_PLAN_INTS = ("rows_needed", "rows_needed_best_possible", "rows")
_PLAN_BOOLS = ("meets_target", "impossible_at_rows")


@dataclass(frozen=True)
class PlanResult(DictView):
    """What ``plan`` predicts for a policy at ``rows`` table rows."""

    rows: int
    strategy: str
    epsilon_per_row: float
    epsilon_per_row_budget: float
    report_rate: float
    columns: tuple[PlanColumn, ...] = field(default_factory=tuple)
    targets_missed: tuple[str, ...] = ()
    impossible: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"rows": self.rows, "strategy": self.strategy, "epsilon_per_row": self.epsilon_per_row,
                "epsilon_per_row_budget": self.epsilon_per_row_budget, "report_rate": self.report_rate,
                "columns": [c.to_dict() for c in self.columns], "targets_missed": list(self.targets_missed),
                "impossible": list(self.impossible)}

    def to_frame(self) -> pd.DataFrame:
        """Long table (``PLAN_FRAME_COLUMNS``): one row per (column, statistic), the column's
        figures repeated on each; a public column is one row with its note.  ``fields`` lists the
        statistic's fields in the order of its JSON (a field not listed is absent from it, which
        is not the same as present and null); the plan's own figures (rows, strategy, eps, report
        rate) are repeated on every row (a plan without columns is one row of them).  A missing
        figure is NaN (or NA for whole numbers), a missing text or flag None.
        ``PlanResult.from_frame`` reads it back."""
        import pandas as pd

        from .results import _typed

        plan = {"rows": self.rows, "strategy": self.strategy, "epsilon_per_row": self.epsilon_per_row,
                "epsilon_per_row_budget": self.epsilon_per_row_budget, "report_rate": self.report_rate}
        out = []
        for c in self.columns:
            base = {**dict.fromkeys(PLAN_FRAME_COLUMNS), **plan, "column": c.name, "type": c.type,
                    "mechanism": c.mechanism, "epsilon": c.epsilon, "rows_reporting": c.rows_reporting,
                    "chosen_because": c.chosen_because}
            if c.statistics is None:
                out.append({**base, "note": c.note})
                continue
            for st in c.statistics:
                d = st.to_dict()
                out.append({**base, **{k: d.get(k) for k in PLAN_FRAME_COLUMNS[5:18]}, "fields": ",".join(d)})
            if not c.statistics:
                out.append({**base, "fields": ""})
        if not out:
            out.append({**dict.fromkeys(PLAN_FRAME_COLUMNS), **plan})
        frame = pd.DataFrame(out, columns=list(PLAN_FRAME_COLUMNS), dtype=object)
        return _typed(frame, _PLAN_FLOATS, _PLAN_INTS)

    @classmethod
    def from_frame(cls, frame: pd.DataFrame) -> PlanResult:
        """The plan a frame of ``to_frame()`` holds: its ``to_dict()`` is the original's with every
        non-finite figure as None (what the strict JSON of ``--format json`` holds);
        ``targets_missed`` and ``impossible`` are read off the statistics, as ``plan`` makes them."""
        from .results import _int, _num, _records, _text

        recs = _records(frame, PLAN_FRAME_COLUMNS)
        if not recs:
            raise ValueError("the frame has no rows: give a frame made by PlanResult.to_frame()")

        def value(k: str, v: Any) -> Any:
            if k in _PLAN_FLOATS:
                return _num(v)
            if k in _PLAN_INTS:
                return _int(v)
            if k in _PLAN_BOOLS:
                return None if v is None else bool(v)
            return _text(v)

        cols: list[PlanColumn] = []
        stats: dict[int, list[PlanStatistic]] = {}
        for r in recs:
            if r["column"] is None:
                continue
            if not cols or cols[-1].name != r["column"]:
                public = r["fields"] is None
                cols.append(PlanColumn(str(r["column"]), str(r["type"]), _text(r["mechanism"]), _num(r["epsilon"]),
                                       _text(r["chosen_because"]), _num(r["rows_reporting"]),
                                       None if public else (), _text(r["note"]) if public else None))
                stats[len(cols) - 1] = []
            if r["fields"]:
                stats[len(cols) - 1].append(PlanStatistic.from_dict(
                    {k: value(k, r[k]) for k in str(r["fields"]).split(",")}))
        cols = [c if c.statistics is None else replace(c, statistics=tuple(stats[i])) for i, c in enumerate(cols)]
        named = [(c.name, st) for c in cols for st in c.statistics or ()]
        head = recs[0]
        return cls(int(head["rows"]), str(head["strategy"]), float(head["epsilon_per_row"]),
                   float(head["epsilon_per_row_budget"]), float(head["report_rate"]), tuple(cols),
                   tuple(f"{n}: {st.statistic}" for n, st in named if st.meets_target is False),
                   tuple(f"{n}: {st.statistic}" for n, st in named if st.impossible_at_rows))


# -- the plan ---------------------------------------------------------------------------------

def needs_of(rc: ResolvedColumn) -> list[str]:
    cfg = rc.config
    needs = list(getattr(cfg, "needs", None) or [])
    if rc.type in ("categorical", "binned", "joint"):
        if not needs:
            return ["frequencies"]
        return needs
    if not needs:
        return ["mean"]
    return needs


def _stat(name: str, se: float | None, target: float | None, bound_se: float | None, row_var: float | None,
          bound_row_var: float | None, rows: int, rate: float, **extra: Any) -> dict[str, Any]:
    out: dict[str, Any] = {"statistic": name, "se": se, **extra, "target_se": target, "best_possible_se": bound_se}
    if target is not None and se is not None:
        out["meets_target"] = bool(se <= target * (1 + 1e-12))
        if row_var is not None:
            out["rows_needed"] = int(math.ceil(row_var / (target * target) / rate))
        if bound_row_var is not None:
            out["rows_needed_best_possible"] = int(math.ceil(bound_row_var / (target * target) / rate))
        out["impossible_at_rows"] = bool(bound_se is not None and bound_se > target * (1 + 1e-12))
    return out


def _mean_stat(se: float | None, v: float | None, vb: float, width: float, rows: int, rate: float,
               q: Quality | None, default: Quality | None, meaning: str, note: str | None = None,
               worst_case: bool = True) -> dict[str, Any]:
    """A mean's entry: its predicted ``se`` (n * Var ``v``), the lower bound ``vb`` any eps-LDP
    mean estimate has (worst case over data), and the policy's targets (max_se of the column;
    max_relative_se of the column, else of the policy).  ``worst_case`` False: ``se`` is for
    reference data, not a worst case, so no efficiency (the bound's ratio to it) is given."""
    n = rows * rate
    target = q.max_se if q is not None else None
    rel = (q.max_relative_se if q is not None and q.max_relative_se is not None
           else default.max_relative_se if default is not None else None)
    bse = math.sqrt(vb / n) if n > 0 else None
    extra: dict[str, Any] = {"relative_se": se / width if se is not None else None,
                             "efficiency": vb / v if v and worst_case else None, "se_meaning": meaning}
    if note is not None:
        extra["note"] = note
    stat = _stat("mean", se, target, bse, v, vb, rows, rate, **extra)
    if rel is not None:
        stat["target_relative_se"] = rel
    if rel is not None and se is not None and v is not None:
        ok_rel = se / width <= rel * (1 + 1e-12)
        stat["meets_target"] = bool(stat.get("meets_target", True) and ok_rel)
        need_rel = int(math.ceil(v / (rel * width) ** 2 / rate))
        stat["rows_needed"] = max(stat.get("rows_needed", 0), need_rel)
        need_b = int(math.ceil(vb / (rel * width) ** 2 / rate))
        stat["rows_needed_best_possible"] = max(stat.get("rows_needed_best_possible", 0), need_b)
        stat["impossible_at_rows"] = bool(stat.get("impossible_at_rows", False) or
                                          (bse is not None and bse / width > rel * (1 + 1e-12)))
    return stat


def column_statistics(rc: ResolvedColumn, rows: int, rate: float, default: Quality | None,
                      simulate: bool = True) -> list[PlanStatistic]:
    """Predicted statistics of one resolved (privatized) column at ``rows`` table rows, of
    which a share ``rate`` report it."""
    return [PlanStatistic.from_dict(d) for d in _column_statistics(rc, rows, rate, default, simulate)]


def _column_statistics(rc: ResolvedColumn, rows: int, rate: float, default: Quality | None,
                       simulate: bool) -> list[dict[str, Any]]:
    m = rc.mechanism
    assert m is not None
    n = rows * rate
    q: Quality | None = getattr(rc.config, "quality", None)
    out = []
    if m.family == "quantile":   # one quantile, whatever the column needs: its asymptotic SE on the reference shape
        return [_tracked_quantile_stat(m, rc, n)]
    for need in needs_of(rc):
        if need == "frequencies":
            target = (q.max_se if q is not None and q.max_se is not None
                      else default.max_se if default is not None else None)
            v = frequency_row_variance(m)
            vb = frequency_row_variance_bound(m.epsilon, m.k)  # type: ignore[attr-defined]
            out.append(_stat("frequencies", math.sqrt(v / n) if n > 0 else None, target,
                             math.sqrt(vb / n) if n > 0 else None, v, vb, rows, rate,
                             efficiency=m.efficiency(),
                             se_meaning="root mean square over values of each share's SE (equal shares: worst case)"))
        elif need == "mean" and m.mean_row_variance() is None:
            # a distribution mechanism (needs mean and quantiles): estimate reads the mean off the
            # decoded distribution (Distribution.mean_ci); its SE is predicted from the decoder
            lo, hi = rc.config.domain
            pred = distribution_mean_se(m, rc, n) if simulate else None
            vb = mean_row_variance_bound(m.epsilon, lo, hi)
            if pred is None:
                out.append(_mean_stat(None, None, vb, hi - lo, rows, rate, q, default,
                                      "no prediction (not simulated)" if not simulate else "no prediction",
                                      note=f"{m.name} decodes a distribution; its mean's SE is predicted by "
                                           "simulation, which this call skips" if not simulate else
                                           "too few rows to predict the mean's SE", worst_case=False))
            else:
                out.append(_mean_stat(pred.se, pred.se * pred.se * n, vb, hi - lo, rows, rate, q, default,
                                      pred.meaning, worst_case=False))
        elif need == "mean":
            mm = cast(mech.MeanMechanism, m)   # a mean mechanism: mean_row_variance() is not None
            v = mean_row_variance(m) + memo_rounding_variance(rc)
            vb = mean_row_variance_bound(mm.epsilon, mm.lo, mm.hi)
            se = math.sqrt(v / n) if n > 0 else None
            out.append(_mean_stat(se, v, vb, mm.hi - mm.lo, rows, rate, q, default,
                                  "SE of the mean in column units, worst case over data"
                                  + (" (memoized: includes the memo grid's rounding, <= step^2/4 per row)"
                                     if memo_rounding_variance(rc) else "")))
        elif need == "quantiles":
            target = q.median_max_se if q is not None else None
            se = simulated_median_se(m, rc, n) if simulate else None
            stat = {"statistic": "median", "se": se, "target_se": target, "best_possible_se": None,
                    "se_meaning": (f"root mean squared error of the median over {SIM_RELEASES} simulated releases of "
                                   f"skewed reference data (Beta(2, 5) shape) at min(N, {SIM_ROWS}) rows, spread "
                                   "scaled by sqrt(rows), bias kept; an approximation"),
                    "note": "no lower bound known to the tool for quantiles" + (
                        f"; the release will state no interval for this column's quantiles, ranges or mean "
                        f"({m.no_interval})" if m.no_interval else "")}
            if target is not None and se is not None:
                stat["meets_target"] = bool(se <= target)
                sim_n = min(n, SIM_ROWS)
                stat["rows_needed"] = int(math.ceil(se * se * n / (target * target) / rate)) if sim_n else None
                stat["impossible_at_rows"] = None
            out.append(stat)
    if getattr(rc.config, "missing", None) == "as-answer":   # missingness released as its own answer
        out.append(_missing_share_stat(m, rc, n))
    return out


def _tracked_quantile_stat(m: mech.Mechanism, rc: ResolvedColumn, n: float) -> dict[str, Any]:
    """A quantile mechanism's one quantile: the asymptotic SE sqrt(p(1-p)/(2p-1)^2 + q(1-q)) / (f sqrt(n))
    (docs/formulas.md section 21) at the density of the skewed reference data (Beta(2, 5) shape on
    the bounds) at that quantile."""
    from scipy.stats import beta

    lo, hi = rc.config.domain
    qq = float(m.to_spec()["quantile"])
    density = float(beta.pdf(beta.ppf(qq, 2, 5), 2, 5)) / (hi - lo)
    se = m.asymptotic_se(density, int(n)) if n >= 1 else None   # type: ignore[attr-defined]
    return {"statistic": f"{qq:g}-quantile", "se": se, "target_se": None, "best_possible_se": None,
            "se_meaning": ("asymptotic SE of the tracked quantile at the density of skewed reference data (Beta(2, 5) "
                           "shape) there; measured within 1.1x of it at 100,000 rows "
                           "(benchmarks/efficiency_quantiles.py)"),
            "note": "this mechanism estimates one quantile only: no mean, range or other quantile"}


def _missing_share_stat(m: mech.Mechanism, rc: ResolvedColumn, n: float) -> dict[str, Any]:
    """missing: as-answer: the share missing's predicted SE, worst case over data; the statistics
    among rows with a value (mean, quantiles) are predicted above as if every row had one: with a
    share s of rows having a value, their SE is about 1/s times larger (1/sqrt(s) for bins)."""
    v = m.missing_share_row_variance(_missing_code(rc))
    se = math.sqrt(v / n) if v is not None and n > 0 else None
    return {"statistic": "share missing", "se": se,
            "se_meaning": "SE of the share of rows with a missing value, worst case over data; the statistics among "
                          "rows with a value are predicted as if every row had one (with a share s of rows having a "
                          "value, a mean's SE is about 1/s times larger)",
            "target_se": None, "best_possible_se": None}


def plan(policy: LoadedPolicy, rows: int, *, simulate: bool = True) -> PlanResult:
    if rows < 1:
        raise UsageError(f"--rows must be a positive number of table rows, got {rows}")
    rate = policy.report_rate
    default = policy.policy.quality
    cols = []
    for rc in policy.columns:
        if rc.mechanism is None:
            if rc.type == "public":
                cols.append(PlanColumn(rc.name, "public", note="released in the clear: NOT protected"))
            continue
        if rc.members is not None:   # a joint group: its cells and marginals, joint vs separate columns
            cols.append(PlanColumn(rc.name, "joint", rc.mechanism.label, rc.mechanism.epsilon, rc.chosen_because,
                                   rows * rate, tuple(joint_statistics(rc, policy, rows, simulate))))
            continue
        cols.append(PlanColumn(rc.name, rc.type, rc.mechanism.label, rc.mechanism.epsilon, rc.chosen_because,
                               rows * rate, tuple(column_statistics(rc, rows, rate, default, simulate))))
    stats = [(c.name, st) for c in cols for st in c.statistics or ()]
    missed = tuple(f"{name}: {st.statistic}" for name, st in stats if st.get("meets_target") is False)
    impossible = tuple(f"{name}: {st.statistic}" for name, st in stats if st.get("impossible_at_rows"))
    return PlanResult(rows, policy.strategy, policy.epsilon_total, policy.policy.budget.epsilon_per_row, rate,
                      tuple(cols), missed, impossible)


# -- joint groups ---------------------------------------------------------------------------------

JOINT_SIM_VALUES = 1 << 22   # the planner simulates at most this many per-row cell estimates per marginal


def _verdict(joint: float, separate: float | None, what: str) -> str:
    if separate is None:
        return f"{what}: not available from separate columns here (no row would report both)"
    if separate == joint:
        return f"{what}: the joint report and separate columns are equally precise"
    better, factor = ("the joint report", separate / joint) if joint < separate else ("separate columns",
                                                                                      joint / separate)
    return (f"{what}: {better} is better ({factor:.3g}x lower variance; n*Var {joint:.4g} joint, {separate:.4g} "
            "separate)")


def joint_statistics(rc: ResolvedColumn, policy: LoadedPolicy, rows: int, simulate: bool = True
                     ) -> list[PlanStatistic]:
    """A joint group's predicted SEs at ``rows`` table rows (docs/formulas.md section 22), each for one
    small share (near 0: the noise alone, what dominates small cells): a cell of the group's report
    (exact, the oracle's per-value noise) against a cell from separate columns (the product of
    independent per-row estimates, exact); each member's marginal share read off the cells (by
    simulation under the public planning key, ``joint.simulated_marginal_nvar``) against the member
    released on its own at its eps (exact).  The note of each says which is better and by how much.
    Separate columns are the members at their own eps under strategy split; under sample, each
    member a unit of its own (d grows by members - 1) at epsilon_per_row / m."""
    from . import joint

    g = cast(mech.FrequencyOracle, rc.mechanism)
    members = rc.members or []
    pol = policy.policy
    d = len(pol.privatized_columns)
    if policy.strategy == "sample":
        d_sep = d + len(members) - 1
        m_sep = min(pol.reported_columns, d_sep)
        eps_sep = [pol.budget.epsilon_per_row / m_sep] * len(members)
        rate = m_sep / d_sep if pol.reported_columns else 1.0
        rate_pair = m_sep * (m_sep - 1) / (d_sep * (d_sep - 1)) if m_sep > 1 else 0.0
        rate_joint = policy.report_rate
    else:
        eps_sep = [float(m.config.epsilon or 0.0) for m in members]
        rate = rate_pair = rate_joint = 1.0
    alone = [mech.choose_categorical(e, m.domain_labels)[0] for e, m in zip(eps_sep, members)]
    n_joint = rows * rate_joint
    cell_joint = joint.small_share_nvar(g)
    # separate: the product of r independent reports, in the rows that report all r (split: every row)
    cell_sep = joint.product_cell_nvar(alone) if rate_pair > 0 or policy.strategy != "sample" else None
    n_pair = rows * (rate_pair if policy.strategy == "sample" else 1.0)
    sep_text = ", ".join(f"{m.name} at eps {e:g} ({o.name})" for m, e, o in zip(members, eps_sep, alone))
    # compared per row of the table: n*Var over the rows that report, scaled to all rows
    cj = cell_joint / rate_joint
    cs = None if cell_sep is None else cell_sep / (rate_pair if policy.strategy == "sample" else 1.0)
    out = [{"statistic": "cells", "se": math.sqrt(cell_joint / n_joint),
            "se_meaning": "SE of one small cell's share (near 0) of the group's report, exact (the oracle's noise)",
            "note": _verdict(cj, cs, "cells") + f"; separate columns: {sep_text}"
                    + ("" if cell_sep is None else f", SE {math.sqrt(cell_sep / n_pair):.4g}"),
            "target_se": None, "best_possible_se": None}]
    sizes = [len(m.domain_labels) for m in members]
    sim_rows = max(2000, min(200_000, JOINT_SIM_VALUES // g.k))
    for i, (m, o) in enumerate(zip(members, alone)):
        sep = joint.small_share_nvar(o) / (rate if policy.strategy == "sample" else 1.0)
        if not simulate:
            out.append({"statistic": f"marginal {m.name}", "se": None, "se_meaning": "no prediction (not simulated)",
                        "note": f"separate column: n*Var {sep:.4g}", "target_se": None, "best_possible_se": None})
            continue
        v = joint.simulated_marginal_nvar(g, sizes, i, sim_rows)
        out.append({"statistic": f"marginal {m.name}", "se": math.sqrt(v / n_joint),
                    "se_meaning": f"SE of one small share (near 0) of {m.name}, the sum of its cells, simulated "
                                  f"({sim_rows} reports under the public planning key; an approximation)",
                    "note": _verdict(v / rate_joint, sep, f"marginal {m.name}")
                            + f"; separate column: {m.name} at eps {eps_sep[i]:g} ({o.name})",
                    "target_se": None, "best_possible_se": None})
    return [PlanStatistic.from_dict(x) for x in out]


# -- suggest ------------------------------------------------------------------------------------

def _with_eps(rc: ResolvedColumn, eps: float) -> ResolvedColumn:
    # a short decimal (0.41, not 0.41000000000000003): what a steward would write, and what
    # the exact samplers (discrete-laplace) can represent
    return resolve_column(rc.name, rc.config.model_copy(update={"epsilon": round(eps, 10)}))


def _meets(rc: ResolvedColumn, eps: float, rows: int, rate: float, default: Quality | None) -> bool:
    stats = column_statistics(_with_eps(rc, eps), rows, rate, default, simulate=True)
    return all(s.get("meets_target") is not False for s in stats)


def _meets_as_is(rc: ResolvedColumn, rows: int, default: Quality | None) -> bool:
    """Whether the column as the policy gives it (its mechanism, second layer included) meets its targets."""
    stats = column_statistics(rc, rows, 1.0, default, simulate=True)
    return all(s.get("meets_target") is not False for s in stats)


def _has_target(rc: ResolvedColumn, default: Quality | None) -> bool:
    stats = column_statistics(rc, 1000, 1.0, default, simulate=False)
    return any("target_se" in s and (s.get("target_se") is not None or s.get("target_relative_se") is not None)
               for s in stats)


def min_epsilon(rc: ResolvedColumn, rows: int, rate: float, default: Quality | None,
                step: float = 0.01) -> float | None:
    """Smallest eps (a multiple of ``step``) at which every target of the column is met, or None
    if not up to eps = 50.  A coarse doubling scan from below finds the first eps that meets
    (simulated medians of some mechanisms degrade again at very large eps, so the search does
    not start from the top), then bisection between it and the scan point before it."""
    hi_eps = None
    prev = 0.0
    e = 0.04
    while e <= MAX_COLUMN_EPS * (1 + 1e-12):
        if _meets(rc, e, rows, rate, default):
            hi_eps = e
            break
        prev = e
        e = min(2 * e, MAX_COLUMN_EPS) if e < MAX_COLUMN_EPS else MAX_COLUMN_EPS * 2
    if hi_eps is None:
        return None
    # in units of step; hi meets, lo does not (eps 0 never does)
    lo, hi = int(math.floor(prev / step + 1e-9)), int(round(hi_eps / step))
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _meets(rc, mid * step, rows, rate, default):
            hi = mid
        else:
            lo = mid
    return round(hi * step, 10)


def _mechanism(rc: ResolvedColumn) -> mech.Mechanism:
    assert rc.mechanism is not None, f"column {rc.name} is not privatized"
    return rc.mechanism


def _split_column(rc: ResolvedColumn, rows: int, default: Quality | None) -> tuple[dict[str, Any], float | None]:
    """strategy split: the planner's entry for one column, and the eps it adds to the row's total
    (None: no eps meets its targets)."""
    m = _mechanism(rc)
    if rc.members is not None:
        return {"epsilon": m.epsilon, "note": "joint group: eps kept as in the policy (the sum of its members'); "
                                              "`ldpt plan` compares it with separate columns"}, m.epsilon
    if not _has_target(rc, default):
        return {"epsilon": m.epsilon, "note": "no target: eps kept as in the policy"}, m.epsilon
    if rc.rerandomize_epsilon is not None:
        # two layers: the SE follows both eps, so no single eps is searched; the column adds its
        # composite eps (what one release reveals) to the row's total
        verdict = "meets" if _meets_as_is(rc, rows, default) else "misses"
        note = (f"second layer: eps {rc.permanent_epsilon:g} then rerandomize_epsilon {rc.rerandomize_epsilon:g}, "
                f"composite eps {m.epsilon:.4g} per release, kept as in the policy; it {verdict} the target at "
                f"{rows} rows (raise either eps to lower the SE)")
        return {"epsilon": m.epsilon, "note": note}, m.epsilon
    fixed = m.fixed_epsilon()
    if fixed is not None:
        # the mechanism's own parameters fix the noise (a supplied transition matrix): eps only
        # caps it, so the smallest eps the column can declare is the one the noise actually
        # gives, and more eps cannot help
        eps_fixed = math.ceil(fixed * 100 - 1e-9) / 100   # in the planner's 0.01 steps, rounded up
        meets = _meets(rc, m.epsilon, rows, 1.0, default)
        note = m.fixed_noise_note(meets, rows)
        if meets:
            return {"epsilon": eps_fixed, "mechanism": m.name, "note": note}, eps_fixed
        return {"epsilon": None, "note": note}, None
    eps = min_epsilon(rc, rows, 1.0, default)
    if eps is None:
        return {"epsilon": None, "note": f"no eps up to {MAX_COLUMN_EPS:g} meets the target at {rows} rows"}, None
    return {"epsilon": eps, "mechanism": _mechanism(_with_eps(rc, eps)).name}, eps


def _split_verdict(unmet: list[str], total: float, budget: float, rows: int) -> str:
    if unmet:
        return (f"cannot meet the targets of {', '.join(unmet)} at {rows} rows with any eps up "
                f"to {MAX_COLUMN_EPS:g}; more rows are needed")
    if total > budget * (1 + 1e-12):
        return (f"meets every target with epsilon_per_row {total:g}, above the policy's budget "
                f"{budget:g}: the targets cannot be met within the budget at {rows} rows")
    return f"meets every target with epsilon_per_row {total:g} (budget {budget:g})"


def _sampled_epsilon(rc: ResolvedColumn, rows: int, rate: float, default: Quality | None) -> float | None:
    """strategy sample: the eps one column needs when a share ``rate`` of the rows report it."""
    fixed = _mechanism(rc).fixed_epsilon()
    if fixed is not None:   # fixed noise: needs its own eps, meets or not
        return (math.ceil(fixed * 100 - 1e-9) / 100
                if _meets(rc, _mechanism(rc).epsilon, rows, rate, default) else None)
    return min_epsilon(rc, rows, rate, default)


ProgressCallback = Callable[[int, int | None], None]
"""``on_progress(done, total)``: the steps of a search done so far, and their total (None when not known)."""


class _Steps:
    """The steps of ``suggest``'s search, told to an ``on_progress`` callback after each one."""

    def __init__(self, total: int | None, on_progress: ProgressCallback | None) -> None:
        self.done, self.total, self.on_progress = 0, total, on_progress
        if on_progress is not None:
            on_progress(0, total)   # before the first step: the total

    def advance(self, n: int = 1) -> None:
        """``n`` more steps done (more than one: steps a search found it need not run)."""
        if n <= 0:
            return
        self.done += n
        if self.on_progress is not None:
            self.on_progress(self.done, self.total)


def _sampled_row_epsilon(cols: list[ResolvedColumn], rows: int, m_cols: int, default: Quality | None,
                         steps: _Steps) -> float | None:
    """strategy sample with m = ``m_cols``: the epsilon_per_row meeting every target (None: none does).
    One step per column (the columns left once one cannot meet its targets count as done)."""
    need: list[float] = []
    for i, rc in enumerate(cols):
        eps = _sampled_epsilon(rc, rows, m_cols / len(cols), default)
        if eps is None:
            steps.advance(len(cols) - i)
            return None
        steps.advance()
        need.append(eps)
    return round(max(need) * m_cols, 10)


def _sample_options(cols: list[ResolvedColumn], rows: int, default: Quality | None,
                    steps: _Steps) -> tuple[list[dict[str, Any]], dict[str, Any] | None]:
    """strategy sample: for each m, the epsilon_per_row meeting every target (None: none does), and the best m."""
    best: dict[str, Any] | None = None
    samples: list[dict[str, Any]] = []
    for m_cols in range(1, len(cols) + 1):
        eps_row = _sampled_row_epsilon(cols, rows, m_cols, default, steps)
        samples.append({"sample_columns": m_cols, "epsilon_per_row": eps_row})
        if eps_row is not None and (best is None or eps_row < best["epsilon_per_row"]):
            best = {"sample_columns": m_cols, "epsilon_per_row": eps_row}
    return samples, best


def _sample_compared(cols: list[ResolvedColumn], default: Quality | None) -> bool:
    """Whether the planner compares strategy sample: two privatized columns or more, all with targets."""
    return len(cols) > 1 and all(_has_target(rc, default) for rc in cols)


def _sample_part(cols: list[ResolvedColumn], rows: int, default: Quality | None, unmet: list[str],
                 total: float, steps: _Steps) -> dict[str, Any]:
    """The planner's strategy-sample comparison: each row reports m of d columns at eps_row / m."""
    if not _sample_compared(cols, default):
        return {"verdict": "not compared: strategy sample needs at least two privatized columns, all with targets"}
    samples, best = _sample_options(cols, rows, default, steps)
    out: dict[str, Any] = {"options": samples, "best": best}
    if best is not None and (unmet or best["epsilon_per_row"] < total * (1 - 1e-9)):
        out["verdict"] = (f"strategy sample with sample_columns {best['sample_columns']} would meet every "
                          f"target with epsilon_per_row {best['epsilon_per_row']:g}"
                          + ("" if unmet else f", less than split's {total:g}"))
    else:
        out["verdict"] = "strategy sample would not do better than split here"
    return out


def suggest(policy: LoadedPolicy, rows: int, *, on_progress: ProgressCallback | None = None) -> dict[str, Any]:
    """The smallest per-column eps meeting every target (split), and the smallest
    epsilon_per_row meeting them under strategy sample, for each m.

    ``on_progress(done, total)`` is called with done 0 before the search and after each of its
    steps: one step per privatized column for split, then (when strategy sample is compared) one
    per column for each m, so the total, d + d * d for d privatized columns (d alone when sample
    is not compared), is known before the search starts; the last call has done == total.  The
    result does not depend on it."""
    default = policy.policy.quality
    cols = [rc for rc in policy.columns if rc.mechanism is not None]
    steps = _Steps(len(cols) + (len(cols) ** 2 if _sample_compared(cols, default) else 0), on_progress)
    split: dict[str, Any] = {}
    total = 0.0
    unmet = []
    for rc in cols:
        split[rc.name], eps = _split_column(rc, rows, default)
        steps.advance()
        if eps is None:
            unmet.append(rc.name)
        else:
            total += eps
    budget = policy.policy.budget.epsilon_per_row
    out: dict[str, Any] = {"rows": rows, "split": {"columns": split, "epsilon_per_row": None if unmet else
                                                   round(total, 10)}}
    out["split"]["verdict"] = _split_verdict(unmet, total, budget, rows)
    out["sample"] = _sample_part(cols, rows, default, unmet, total, steps)
    return out


__all__ = ["plan", "suggest", "ProgressCallback", "PlanResult", "PlanColumn", "PlanStatistic", "column_statistics",
           "min_epsilon",
           "frequency_row_variance", "mean_row_variance", "memo_rounding_variance",
           "frequency_row_variance_bound", "mean_row_variance_bound", "simulated_median_se", "distribution_mean_se",
           "DistributionMeanSE", "sample_size",
           "CategoricalColumn", "NumericColumn"]
