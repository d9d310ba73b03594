"""Decoding: stream extracts, accumulate sufficient statistics, report estimates.

For every privatized column the per-row unbiased estimates are summed, and so are
their squares (and, for joint analyses, products across two columns): that is all the
decoder keeps.  Sufficient statistics add, so batches, files and workers merge by
addition, and memory does not grow with the extract.

Each column's statistics are kept by its mechanism's decoder (``Mechanism.decoder``,
mechanisms/decoders.py); this module streams the extract into them and adds the two-column
statistics:

* categorical / binned: per row and value v, u_v = (1[v in S(y)] - q*)/(p* - q*); the
  sums of u and u^2 follow from the support counts alone.
* numeric: the written value is the per-row unbiased estimate; keep n, sum, sum of squares
  (around the middle of the bounds, for numerical accuracy).
* cross-tab of columns A and B: the average of u_a(y_A) * u_b(y_B) is unbiased for the
  joint share, because the two columns are randomized independently given the row
  (docs/formulas.md section 12); conditional shares and grouped means are ratios of two such
  averages, with delta-method standard errors.
* distribution mechanisms (and binned columns): additive histograms, decoded into a
  distribution with CDF, quantiles and range shares (``distribution.py``).

Rows whose cell is empty (a column not reported by that row under ``budget.strategy:
sample``) are left out of that column's statistics: which rows report a column is chosen
by the keyed PRF independently of the data, so the reporting rows are a random sample of
all rows and their average is unbiased for the whole table.

Nothing is decoded from an extract whose bytes are not the ones its manifest describes (hash
and size, part by part for a dataset: ``check_integrity``, the check validate reports too), and
several extracts merge only when they are different releases with identical specs that are not
releases of the same people with memoized columns (``_check_merge``: their reports repeat, so their
rows are not independent).  Every statistic names its estimand: what it is, then how the release
encoded the values of the columns it reads (``handling``: clipping, bins, missing and unknown
values, from the manifest and its embedded policy).

The standard error is the sample standard deviation of the per-row estimates over
sqrt(n).  For rows drawn at random from a population it is the usual SE of a mean; for
the fixed set of rows in the extract it is slightly conservative (it also counts the
spread of the true values).  Intervals use the normal approximation.
"""

from __future__ import annotations

import contextlib
import contextvars
import math
from dataclasses import dataclass, field
from pathlib import Path
from statistics import NormalDist
from collections.abc import Sequence
from typing import Any
from collections.abc import Callable, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import mechanisms as mech
from .errors import DataError, InputFileError, LdptError, ManifestError, UsageError
from .mechanisms import QuantileDecoder, decoders
from .mechanisms.decoders import CONSISTENCY_METHODS, consistent, norm_additive, norm_mul, norm_sub  # noqa: F401
from .mechanisms.decoders import mean_result as _mean
from .mechanisms.decoders import moments as _moments
from .mechanisms.decoders import numeric_values
from .io import TableSource
from .manifest import ColumnEntry, Manifest, default_manifest_path, load_manifest
from .results import (ColumnResult, CrossTabCell, CrossTabResult, DistributionResult, EstimateResult,
                      GroupedMeanResult, GroupMean, MeanResult, QuantileResult, RangeResult)

DECODE_BATCH_ROWS = 65536
#: how frequency columns are decoded (``estimate(decoder=...)``, ``ldpt estimate --decoder``)
DECODERS = ("projection", "likelihood")


def damaged_extract(where: str, row: int, err: Exception) -> DataError:
    """An extract whose bytes decode to values no release writes (a damaged page, an index out
    of range): refused near ``row``, naming what the reader said in one word."""
    return DataError(f"{where}: the extract's data is damaged and cannot be decoded (read stopped near data row "
                     f"{row}: {type(err).__name__.removeprefix('Arrow')}). Use an intact copy of the release; "
                     "`ldpt validate` compares it with the hash in its manifest.")


def csv_type(dtype: str) -> pa.DataType:
    """The type a CSV extract's column is read back as: the output type its manifest records
    (every integer width, floats and booleans; text otherwise)."""
    if dtype.startswith("dictionary") or dtype in ("string", "large_string"):
        return pa.string()
    try:
        t = pa.type_for_alias(dtype)
    except ValueError:
        return pa.string()
    return t if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t) else pa.string()


# -- per-row estimates ------------------------------------------------------------------------

def reported_mask(arrays: list[pa.Array]) -> np.ndarray | None:
    """Rows whose report is present (None when every row reported)."""
    last = arrays[-1]
    if last.null_count == 0:
        return None
    return np.asarray(pc.is_valid(last).to_numpy(zero_copy_only=False))


def _take(arrays: list[pa.Array], mask: np.ndarray | None) -> list[pa.Array]:
    if mask is None:
        return arrays
    m = pa.array(mask)
    return [a.filter(m) for a in arrays]


# -- one-column statistics: the mechanism's own decoder (mechanisms/decoders.py) ----------------

# the decoders' former names, for the modules and tests that import them from here
CategoricalStats = decoders.FrequencyDecoder
NumericStats = decoders.MeanDecoder
DistributionStats = decoders.DistributionDecoder


def is_distribution(m: mech.Mechanism) -> bool:
    return m.family == "distribution"


def stats_for(entry: ColumnEntry, decoder: str = "projection") -> decoders.Decoder | None:
    """A fresh decoder for a privatized column (None for a public one); a binned column's also
    keeps the co-support counts that the SEs of its ranges and quantiles need.  With ``decoder``
    "likelihood" a frequency column's also keeps the counts its likelihood needs (refused, naming
    the column, when its mechanism has no finite channel: mechanisms/likelihood.py)."""
    if entry.mechanism is None:
        return None
    st = mech.build(entry.mechanism).decoder(joint=entry.type == "binned")
    if decoder == "likelihood" and isinstance(st, decoders.FrequencyDecoder):
        st.use_likelihood(entry.name)
    return st


# -- two-column statistics ------------------------------------------------------------------

@dataclass
class CrossStats:
    """Cross-tab of two categorical (or binned) columns: sums over rows where both reported."""

    a: mech.FrequencyOracle
    b: mech.FrequencyOracle
    n: int = 0
    S: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum u_a u_b          (ka, kb)
    SS: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum (u_a u_b)^2      (ka, kb)
    T: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum u_a^2 u_b        (ka, kb)  cov(joint, marginal a)
    SA: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum u_a              (ka,)
    SAA: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum u_a^2            (ka,)

    def __post_init__(self) -> None:
        ka, kb = self.a.k, self.b.k
        for name, shape in (("S", (ka, kb)), ("SS", (ka, kb)), ("T", (ka, kb)), ("SA", (ka,)), ("SAA", (ka,))):
            if getattr(self, name) is None:
                setattr(self, name, np.zeros(shape))

    def add(self, arrays_a: list[pa.Array], arrays_b: list[pa.Array]) -> None:
        ua = self.a.row_estimates(arrays_a)
        ub = self.b.row_estimates(arrays_b)
        ua2, ub2 = ua * ua, ub * ub
        self.n += ua.shape[0]
        self.S += ua.T @ ub
        self.SS += ua2.T @ ub2
        self.T += ua2.T @ ub
        self.SA += ua.sum(axis=0)
        self.SAA += ua2.sum(axis=0)

    def merge(self, o: CrossStats) -> None:
        self.n += o.n
        for name in ("S", "SS", "T", "SA", "SAA"):
            setattr(self, name, getattr(self, name) + getattr(o, name))

    def report(self, z: float, method: str, rows: str = "", columns: str = "",
               encoding: Sequence[str] = ()) -> CrossTabResult:
        """The cells; ``encoding`` holds the encoding clauses of both columns (``handling``), added
        to every estimand.  Beside the raw estimates: the joint shares made consistent (``method``,
        as the frequencies: non-negative, summing to 1) and the within-row shares computed from
        them (each row's consistent shares divided by their sum; None where that sum is 0)."""
        n = self.n
        if n < 2:
            return CrossTabResult(rows, columns, n, (), method)
        joint, joint_se = _moments(self.S, self.SS, n)
        marg, marg_se = _moments(self.SA, self.SAA, n)
        cons = consistent(joint.ravel(), method).reshape(joint.shape)
        cons_rows = cons.sum(axis=1)
        # conditional share of b within a: R = joint / marginal_a, delta method
        cov = (self.T - self.S * self.SA[:, None] / n) / (n - 1) / n
        var_j, var_m = joint_se ** 2, (marg_se ** 2)[:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            R = joint / marg[:, None]
            var_R = (var_j - 2 * R * cov + R ** 2 * var_m) / marg[:, None] ** 2
        cells = []
        for i, la in enumerate(self.a.categories):
            for j, lb in enumerate(self.b.categories):
                ok = marg[i] > 0 and np.isfinite(var_R[i, j])
                jt = _mean(joint[i, j], joint_se[i, j], z, _with(f"share of rows with {_is(rows, la)} and "
                           f"{_is(columns, lb)} among all rows", *encoding))
                r_est, r_se = (R[i, j], math.sqrt(max(var_R[i, j], 0.0))) if ok else (None, None)
                within = _mean(r_est, r_se, z, _with(f"share of rows with {_is(columns, lb)} among rows with "
                                                     f"{_is(rows, la)}", *encoding))
                w_cons = float(cons[i, j] / cons_rows[i]) if cons_rows[i] > 0 else None
                cells.append(CrossTabCell(la, lb, jt, float(cons[i, j]), within, w_cons))
        return CrossTabResult(rows, columns, n, tuple(cells), method)


@dataclass
class PairCrossStats(CrossStats):
    """Cross-tab of two members of one joint group: the cells of the group's report summed over its
    other members (docs/formulas.md section 22), so a cell's per-row estimate is the sum of the
    group's per-row cell estimates, and the row's marginal the sum over the column's values; the
    report (SEs, shares within a row by the delta method) is that of ``CrossStats``."""

    layout: Any = None
    pair: tuple[int, int] = (0, 1)

    def add(self, arrays_a: list[pa.Array], arrays_b: list[pa.Array]) -> None:
        for u in self.layout.row_slices(arrays_a):
            w = self.layout.project(u, self.pair)       # (n, ka, kb): the pair's cells
            ua = w.sum(axis=2)
            self.n += u.shape[0]
            self.S += w.sum(axis=0)
            self.SS += (w * w).sum(axis=0)
            self.T += np.einsum("na,nab->ab", ua, w)
            self.SA += ua.sum(axis=0)
            self.SAA += (ua * ua).sum(axis=0)


def _joint_members(manifest: Manifest) -> dict[str, tuple[ColumnEntry, int]]:
    """Member column -> (its joint group's entry, its place among the members)."""
    return {m.name: (e, i) for e in manifest.columns if e.type == "joint" for i, m in enumerate(e.members or [])}


def _layout(entry: ColumnEntry) -> Any:
    from .joint import Layout

    return Layout.of(entry, mech.build(entry.mechanism or {}))  # type: ignore[arg-type]


def _member_entry(group: ColumnEntry, index: int) -> ColumnEntry:
    """A joint group's member as a column entry of its own (for its estimands and result): its type,
    labels and bins, and the group's mechanism (what randomized it)."""
    m = (group.members or [])[index]
    return ColumnEntry(name=m.name, type=m.type, mechanism=group.mechanism, labels=m.labels, bins=m.bins, outputs=[],
                       report_rate=group.report_rate)


@dataclass
class GroupMeanStats:
    """Mean of a numeric column within each category of another: ratio of two unbiased
    averages, sum(y u_a)/sum(u_a), with a delta-method SE."""

    group: mech.FrequencyOracle
    shift: float
    n: int = 0
    A: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum (y-s) u_a
    AA: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum (y-s)^2 u_a^2
    C: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum (y-s) u_a^2
    SA: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum u_a
    SAA: np.ndarray = field(default=None)  # type: ignore[arg-type]  # sum u_a^2

    def __post_init__(self) -> None:
        for name in ("A", "AA", "C", "SA", "SAA"):
            if getattr(self, name) is None:
                setattr(self, name, np.zeros(self.group.k))

    def add(self, arrays_y: list[pa.Array], arrays_g: list[pa.Array]) -> None:
        y = numeric_values(arrays_y) - self.shift
        u = self.group.row_estimates(arrays_g)
        u2 = u * u
        self.n += y.size
        self.A += y @ u
        self.AA += (y * y) @ u2
        self.C += y @ u2
        self.SA += u.sum(axis=0)
        self.SAA += u2.sum(axis=0)

    def merge(self, o: GroupMeanStats) -> None:
        self.n += o.n
        for name in ("A", "AA", "C", "SA", "SAA"):
            setattr(self, name, getattr(self, name) + getattr(o, name))

    def report(self, z: float, what: str = "", by: str = "", bounds: tuple[float, float] | None = None,
               encoding: Sequence[str] = ()) -> tuple[GroupMean, ...]:
        """Per group: the mean of the numeric column ``what`` among the rows of the group (``by``
        names the grouping column; ``encoding`` holds both columns' encoding clauses).  Beside
        each raw ratio, its consistent version: the ratio clipped into the column's ``bounds``
        (a mean of values within the bounds lies within them)."""
        n = self.n
        cats = self.group.categories

        def estimand(g: str) -> str:
            return _with(f"mean of {what} among rows with {_is(by, g)}", *encoding)

        if n < 2:
            return tuple(GroupMean(g, _mean(None, None, z, estimand(g)), None) for g in cats)
        num, num_se = _moments(self.A, self.AA, n)
        den, den_se = _moments(self.SA, self.SAA, n)
        cov = (self.C - self.A * self.SA / n) / (n - 1) / n
        out = []
        for i, g in enumerate(cats):
            if den[i] <= 0:
                out.append(GroupMean(g, _mean(None, None, z, estimand(g)), float(den[i]),
                                     "the estimated share of this group is not positive: no mean"))
                continue
            R = num[i] / den[i]
            var = (num_se[i] ** 2 - 2 * R * cov[i] + R ** 2 * den_se[i] ** 2) / den[i] ** 2
            note = ("the group's share is not clearly above 0: the ratio and its SE are unreliable"
                    if den[i] - z * den_se[i] <= 0 else None)
            est = float(self.shift + R)
            cons = est if bounds is None else float(min(max(est, bounds[0]), bounds[1]))
            out.append(GroupMean(g, _mean(est, math.sqrt(max(var, 0.0)), z, estimand(g)), float(den[i]),
                                 note, cons))
        return tuple(out)


# -- reading ---------------------------------------------------------------------------------

def check_integrity(extract: Path, mpath: Path, manifest: Manifest) -> None:
    """Refuse an extract whose bytes are not the ones its manifest describes (hash and size; of
    every part, for a dataset extract): decoded with another release's manifest (another eps,
    categories or bounds) its estimates and intervals would be wrong without any sign."""
    from .integrity import check_extract

    res = check_extract(extract, manifest)
    if not res.ok:
        raise ManifestError(f"extract {extract} does not match manifest {mpath}: {res.detail}. Decoded with "
                            "the wrong manifest (another release's eps, categories or bounds) or from altered bytes, "
                            "its estimates and intervals would be wrong, so estimate refuses the pair. Use the "
                            "manifest written with this extract (by default beside it, named "
                            f"{default_manifest_path(extract).name}), or ask the data steward for an intact copy of "
                            f"both; `ldpt validate {extract} --manifest {mpath}` lists what differs.")


def open_extract(extract: Path, manifest_path: Path | None, *,
                 verify: bool = False) -> tuple[Manifest, TableSource, Path]:
    """The manifest, a reader of the extract and the manifest's path; with ``verify``, first
    refuse an extract whose hash or size disagrees with the manifest (``check_integrity``)."""
    extract = Path(extract)
    mpath = Path(manifest_path) if manifest_path else default_manifest_path(extract)
    from .dataset import is_uri

    if not is_uri(str(extract)) and not extract.exists() and not extract.is_symlink():
        raise InputFileError(f"extract {extract} does not exist. Check the path (an extract is the .parquet or .csv "
                             "file, or the dataset folder, that privatize wrote beside its manifest).")
    manifest = load_manifest(mpath)
    if verify:
        check_integrity(extract, mpath, manifest)
    src = TableSource(extract)
    missing = [c for c in manifest.extract.columns if c not in src.column_names]
    if missing:
        raise ManifestError(f"extract {extract} lacks column(s) {', '.join(map(repr, missing))} that manifest {mpath} "
                            "describes. Check that the extract and the manifest belong to the same release.")
    return manifest, src, mpath


def iter_column_arrays(manifest: Manifest, src: TableSource,
                       batch_rows: int = DECODE_BATCH_ROWS) -> Iterator[tuple[pa.RecordBatch, dict[str, list]]]:
    """Yield (batch, {column name: [output arrays]}) for every privatized column."""
    entries = [c for c in manifest.columns if c.mechanism is not None]
    names = [o.name for c in entries for o in c.outputs]
    types = {o.name: csv_type(o.dtype) for c in entries for o in c.outputs}
    for batch in src.batches(names, batch_rows, csv_types=types):
        yield batch, {c.name: [_chunk(batch.column(o.name)) for o in c.outputs] for c in entries}


def _chunk(a: Any) -> pa.Array:
    return a.combine_chunks() if isinstance(a, pa.ChunkedArray) else a


def parse_pair(text: str, option: str) -> tuple[str, str]:
    parts = text.split(":")
    if len(parts) != 2 or not parts[0] or not parts[1]:
        raise UsageError(f"{option} takes two column names joined by a colon (e.g. site:role), got {text!r}")
    return parts[0], parts[1]


@dataclass
class Analyses:
    """What to compute beyond one-column frequencies and means."""

    crosstabs: list[tuple[str, str]] = field(default_factory=list)
    mean_by: list[tuple[str, str]] = field(default_factory=list)
    quantiles: list[float] = field(default_factory=lambda: [0.5])
    ranges: list[tuple[str, float, float]] = field(default_factory=list)
    consistency: str = "norm-sub"
    decoder: str = "projection"   # frequency columns: "projection" (unbiased) or "likelihood" (MLE)


def parse_range(text: str) -> tuple[str, float, float]:
    try:
        col, span = text.rsplit(":", 1)
        lo_s, hi_s = span.split("..")
        lo, hi = float(lo_s), float(hi_s)
    except ValueError:
        raise UsageError(f"--range takes COLUMN:LOW..HIGH (e.g. pay:40000..60000), got {text!r}") from None
    if not col or not lo < hi:
        raise UsageError(f"--range {text!r}: give a column and LOW below HIGH")
    return col, lo, hi


def parse_quantiles(text: str) -> list[float]:
    try:
        qs = [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise UsageError(f"--quantiles takes numbers between 0 and 1 separated by commas (e.g. 0.1,0.5,0.9), "
                         f"got {text!r}") from None
    if not qs or any(not 0 < q < 1 for q in qs):
        raise UsageError(f"--quantiles: every value must lie strictly between 0 and 1, got {text!r}")
    return qs


def _spec_signature(m: Manifest) -> list[Any]:
    return [(c.name, c.type, c.mechanism, c.labels, c.bins, [(o.name, o.dtype) for o in c.outputs],
             getattr(c, "report_rate", None)) for c in m.columns]


def _check_analyses(manifest: Manifest, an: Analyses) -> None:
    by = {c.name: c for c in manifest.columns}
    members = _joint_members(manifest)
    by.update({m: _member_entry(e, i) for m, (e, i) in members.items()})

    def need(name: str, option: str, kinds: tuple[str, ...]) -> ColumnEntry:
        c = by.get(name)
        if c is None or c.mechanism is None:
            known = ", ".join(n for n, e in by.items() if e.mechanism is not None)
            raise UsageError(f"{option}: {name!r} is not a privatized column of this extract (privatized: {known}).")
        family = "categorical" if mech.build(c.mechanism).family == "frequency" else "numeric"
        if family not in kinds:
            raise UsageError(f"{option}: column {name!r} is {c.type} ({c.mechanism['mechanism']}); this analysis "
                             f"needs a {' or '.join(kinds)} column.")
        return c

    pairs = [("--crosstab", a, b) for a, b in an.crosstabs] + [("--mean-by", y, g) for y, g in an.mean_by]
    pairs = [pr for pr in pairs if not (pr[1] in members and pr[2] in members   # one group's members: one report
                                        and members[pr[1]][0].name == members[pr[2]][0].name)]
    if pairs and getattr(manifest.privacy, "strategy", "split") == "sample" and \
            getattr(manifest.privacy, "reported_columns", None) == 1:
        raise UsageError(f"{pairs[0][0]} {pairs[0][1]}:{pairs[0][2]}: this release uses budget.strategy sample with "
                         "one reported column per row, so no row reports two columns and joint analyses are "
                         "impossible (except between members of one joint group, which share one report). Use "
                         "one-column estimates, or a release with sample_columns of 2 or more.")
    for a, b in an.crosstabs:
        need(a, "--crosstab", ("categorical",))
        need(b, "--crosstab", ("categorical",))
        if a == b:
            raise UsageError("--crosstab needs two different columns")
    for y, g in an.mean_by:
        _check_mean_by(y, need(y, "--mean-by", ("numeric",)).mechanism or {})
        need(g, "--mean-by", ("categorical",))
    for col, _, _ in an.ranges:
        e = by.get(col)
        if e is None or e.mechanism is None or not (e.type == "binned" or is_distribution(mech.build(e.mechanism))):
            raise UsageError(f"--range: column {col!r} has no distribution in this extract (ranges need a numeric "
                             "column released with bins: or a distribution mechanism such as square-wave or "
                             "hierarchy).")
    if an.decoder not in DECODERS:
        raise UsageError(f"--decoder must be one of {', '.join(DECODERS)}, got {an.decoder!r}")
    if an.consistency not in CONSISTENCY_METHODS:
        raise UsageError(f"--consistency must be one of {', '.join(CONSISTENCY_METHODS)}, got {an.consistency!r}")


def _check_mean_by(y: str, spec: dict[str, Any]) -> None:
    """--mean-by reads the per-row value reports of ``y``: refused for a distribution mechanism and for
    a mechanism whose value reports are not the rows' values (``grouped_mean_refusal``)."""
    m = mech.build(spec)
    if is_distribution(m):
        raise UsageError(f"--mean-by: column {y!r} uses {spec['mechanism']}, which estimates distributions; "
                         "its mean comes from the distribution (see its 'distribution' entry), not per row.")
    why = m.grouped_mean_refusal()
    if why:
        raise UsageError(f"--mean-by: column {y!r} cannot be averaged within groups: {why}.")


@dataclass
class Accumulated:
    manifest: Manifest
    rows: int
    columns: dict[str, Any]
    crosstabs: dict[tuple[str, str], CrossStats]
    mean_by: dict[tuple[str, str], GroupMeanStats]
    extracts: list[str]
    groups: dict[str, Any] = field(default_factory=dict)   # joint group -> joint.GroupStats (members' marginals)


def _empty_stats(manifest: Manifest, an: Analyses) -> Accumulated:
    entries = {c.name: c for c in manifest.columns if c.mechanism is not None}
    cols: dict[str, Any] = {name: stats_for(e, an.decoder) for name, e in entries.items()}
    from .joint import GroupStats, MemberView

    members = _joint_members(manifest)
    layouts = {e.name: _layout(e) for e in manifest.columns if e.type == "joint"}

    def oracle(name: str) -> Any:   # a column's frequency oracle, or a member's view of its group
        if name in members:
            return MemberView(layouts[members[name][0].name], name)
        return cols[name].mechanism

    xt: dict[tuple[str, str], CrossStats] = {}
    for a, b in an.crosstabs:
        ga, gb = members.get(a), members.get(b)
        if ga is not None and gb is not None and ga[0].name == gb[0].name:   # one group: its cells
            xt[(a, b)] = PairCrossStats(oracle(a), oracle(b), layout=layouts[ga[0].name], pair=(ga[1], gb[1]))
        else:
            xt[(a, b)] = CrossStats(oracle(a), oracle(b))
    mb = {(y, g): GroupMeanStats(oracle(g), cols[y].shift) for y, g in an.mean_by}
    groups = {name: GroupStats(lay) for name, lay in layouts.items()}
    return Accumulated(manifest, 0, cols, xt, mb, [], groups)


# Told the rows decoded, batch by batch (``on_progress`` of estimate and validate; rows_told)
_rows_told: contextvars.ContextVar[Callable[[int], None] | None] = contextvars.ContextVar("ldpt_rows_told",
                                                                                          default=None)


@contextlib.contextmanager
def rows_told(on_progress: Callable[[int], None] | None) -> Iterator[None]:
    """Inside this block every batch of rows decoded is told to ``on_progress`` (its row count)."""
    token = _rows_told.set(on_progress)
    try:
        yield
    finally:
        _rows_told.reset(token)


def _add_batches(acc: Accumulated, batches: Iterator[tuple[pa.RecordBatch, dict[str, list]]], check_alphabet: bool,
                 where: str, row0: int = 0) -> None:
    """Add decoded batches to ``acc`` (``where`` names the extract and manifest in errors)."""
    entries = {c.name: c for c in acc.manifest.columns if c.mechanism is not None}
    sources = {m: e.name for m, (e, _) in _joint_members(acc.manifest).items()}
    tell = _rows_told.get()
    for batch, arrays in batches:
        masks = {name: reported_mask(a) for name, a in arrays.items()}
        for name, arrs in arrays.items():
            st = acc.columns[name]
            mine = _take(arrs, masks[name])
            if check_alphabet:
                bad = st.mechanism.count_invalid(mine)
                if bad:
                    raise DataError(f"{where}: column {name!r} has {bad} value(s) outside the output alphabet of "
                                    f"its mechanism ({(entries[name].mechanism or {}).get('mechanism')}) near data row "
                                    f"{row0 + acc.rows + 1}. The extract was altered or does not belong to its "
                                    "manifest; run `ldpt validate` for details.")
            st.add(mine)
        for name, gst in acc.groups.items():
            gst.add(_take(arrays[name], masks[name]))
        for (a, b), st in acc.crosstabs.items():   # a joint group's member reads its group's reports
            a_, b_ = sources.get(a, a), sources.get(b, b)
            both = _both(masks[a_], masks[b_], batch.num_rows)
            st.add(_take(arrays[a_], both), _take(arrays[b_], both))
        for (y, g), st in acc.mean_by.items():
            g_ = sources.get(g, g)
            both = _both(masks[y], masks[g_], batch.num_rows)
            st.add(_take(arrays[y], both), _take(arrays[g_], both))
        acc.rows += batch.num_rows
        if tell is not None:
            tell(batch.num_rows)


def _merge_into(total: Accumulated, acc: Accumulated) -> None:
    for name, st in acc.columns.items():
        total.columns[name].merge(st)
    for k, st in acc.crosstabs.items():
        total.crosstabs[k].merge(st)
    for k, st in acc.mean_by.items():
        total.mean_by[k].merge(st)
    for gname, gst in acc.groups.items():
        total.groups[gname].merge(gst)
    total.rows += acc.rows


def accumulate_fragment(manifest: Manifest, an: Analyses, fs: Any, frag: Any, batch_rows: int,
                        check_alphabet: bool, where: str) -> Accumulated:
    """The sufficient statistics of one part of a dataset extract (what a dask worker runs)."""
    from .dataset import read_fragment
    from .io import _rebatch

    entries = [c for c in manifest.columns if c.mechanism is not None]
    names = [o.name for c in entries for o in c.outputs]
    acc = _empty_stats(manifest, an)
    batches = ((b, {c.name: [_chunk(b.column(o.name)) for o in c.outputs] for c in entries})
               for b in _rebatch(read_fragment(fs, frag, names, batch_rows), batch_rows))
    _add_batches(acc, batches, check_alphabet, where, frag.row0)
    return acc


def _accumulate_one(extract: Path, manifest_path: Path | None, an: Analyses, batch_rows: int,
                    check_alphabet: bool, engine: str = "local", scheduler: str | None = None,
                    verify: bool = True) -> Accumulated:
    manifest, src, mpath = open_extract(extract, manifest_path, verify=verify)
    _check_analyses(manifest, an)
    acc = _empty_stats(manifest, an)
    where = f"extract {extract} (manifest {mpath})"
    try:
        _read_into(acc, manifest, an, src, batch_rows, check_alphabet, where, engine, scheduler, extract)
    except LdptError:
        raise
    except (pa.ArrowException, IndexError, OverflowError, ValueError) as err:
        # the bytes decode to values no release writes (a damaged page, an index out of range)
        raise damaged_extract(where, acc.rows + 1, err) from None
    acc.extracts = [str(extract)]
    if acc.rows != manifest.rows:
        raise ManifestError(f"extract {extract} has {acc.rows} rows but manifest {mpath} says {manifest.rows}. The "
                            "files do not belong together, or the extract is incomplete; run `ldpt validate`.")
    return acc


def _read_into(acc: Accumulated, manifest: Manifest, an: Analyses, src: TableSource, batch_rows: int,
               check_alphabet: bool, where: str, engine: str, scheduler: str | None, extract: Any) -> None:
    if engine == "dask":
        if src.dataset is None:
            raise UsageError(f"--engine dask reads a Parquet dataset extract (a folder of parts); {extract} is one "
                             "file: use --engine local.")
        from .engine_dask import map_fragments

        parts = map_fragments(accumulate_fragment, manifest, an, src.dataset, batch_rows, check_alphabet, where,
                              scheduler)
        tell = _rows_told.get()
        for part in parts:
            _merge_into(acc, part)
            if tell is not None:
                tell(part.rows)
    else:
        _add_batches(acc, iter_column_arrays(manifest, src, batch_rows), check_alphabet, where)


def _both(a: np.ndarray | None, b: np.ndarray | None, n: int) -> np.ndarray | None:
    if a is None and b is None:
        return None
    return (np.ones(n, bool) if a is None else a) & (np.ones(n, bool) if b is None else b)


def memoized_columns(manifest: Manifest) -> list[str]:
    """Privatized columns whose reports are memoized (``memoize: true`` in the embedded policy,
    or a manifest note saying so): the same person sends the same report in every release."""
    return [c.name for c in manifest.columns if c.mechanism is not None and
            (_policy_column(manifest, c.name).get("memoize") is True or (c.note or "").startswith("memoized"))]


def _same_people(a: Manifest, b: Manifest) -> bool:
    """Releases of the same people, as far as the manifests tell: the same key (fingerprint) and
    the same subject_key column, with memoized columns (whose reports repeat across releases)."""
    sk_a, sk_b = (a.policy or {}).get("subject_key"), (b.policy or {}).get("subject_key")
    return (a.key_fingerprint == b.key_fingerprint and sk_a is not None and sk_a == sk_b
            and bool(memoized_columns(a)) and bool(memoized_columns(b)))


def _check_merge(extracts: list[Path], manifests: list[Path | None]) -> None:
    """Before decoding anything: several extracts merge only if they are different releases
    with identical specs, and not releases of the same people with memoized columns."""
    seen: list[tuple[Path, Manifest]] = []
    for ex, mp in zip(extracts, manifests):
        m = load_manifest(Path(mp) if mp else default_manifest_path(ex))
        for _, m0 in seen:
            if m.nonce == m0.nonce or m.extract.sha256 == m0.extract.sha256:
                raise UsageError(f"{ex} is the same release as an extract given before it (same nonce or same "
                                 "file): merging a release with itself would count its rows twice. Give each "
                                 "release once.")
        if seen and _spec_signature(m) != _spec_signature(seen[0][1]):
            raise UsageError(f"cannot merge {ex} with {seen[0][0]}: their manifests describe different columns "
                             "or mechanism specs (names, eps, categories, bounds, output columns must all be equal; "
                             "only the nonce, time and hashes may differ). Estimate them separately.")
        sequential = [c.name for c in m.columns if c.mechanism is not None and mech.build(c.mechanism).sequential]
        if seen and sequential:
            raise UsageError(f"cannot merge {ex} with {seen[0][0]}: column(s) {', '.join(map(repr, sequential))} use a "
                             "sequential mechanism, whose thresholds each release set from its own earlier reports; "
                             "added together, the reports of two releases no longer replay to the thresholds either "
                             "one used, so the merged estimate would be wrong. Estimate each release on its own.")
        for ex0, m0 in seen:
            if _same_people(m, m0):
                cols = ", ".join(map(repr, memoized_columns(m)))
                raise UsageError(
                    f"cannot merge {ex} with {ex0}: both are releases of the same people (the same key, fingerprint "
                    f"{m.key_fingerprint}, and the same subject_key {(m.policy or {}).get('subject_key')!r}) with "
                    f"memoized column(s) {cols}. A person whose value did not change sends the same memoized report "
                    "in every release, so the rows of the two releases are not independent and the merged standard "
                    "errors would be too small (for unchanged values, by about the square root of the number of "
                    "releases). Estimate each release on its own (one `ldpt estimate` per extract), or merge only "
                    "releases of different people (released under different keys).")
        seen.append((ex, m))


def accumulate_many(extracts: list[Path], manifests: list[Path | None] | None = None, *,
                    analyses: Analyses | None = None, batch_rows: int = DECODE_BATCH_ROWS,
                    check_alphabet: bool = True, engine: str = "local",
                    scheduler: str | None = None, verify: bool = True) -> Accumulated:
    """Accumulate one or more extracts; extracts must share their mechanism specs, be different
    releases and not releases of the same people with memoized columns (``_check_merge``).  With
    ``verify`` (the default) an extract whose hash or size disagrees with its manifest is
    refused (``check_integrity``)."""
    an = analyses or Analyses()
    if not extracts:
        raise UsageError("give at least one extract")
    manifests = manifests or [None] * len(extracts)
    if len(manifests) != len(extracts):
        raise UsageError("give one --manifest per extract (or none, to use the default beside each extract)")
    paths = [Path(ex) for ex in extracts]
    if len(paths) > 1:
        _check_merge(paths, manifests)
    total: Accumulated | None = None
    for ex, mp in zip(paths, manifests):
        acc = _accumulate_one(ex, Path(mp) if mp else None, an, batch_rows, check_alphabet, engine, scheduler,
                              verify)
        if total is None:
            total = acc
            continue
        _merge_into(total, acc)
        total.extracts.append(str(ex))
    assert total is not None
    return total


def accumulate(extract: Path, manifest_path: Path | None = None, *, batch_rows: int = DECODE_BATCH_ROWS,
               check_alphabet: bool = True, verify: bool = False) -> tuple[Manifest, dict[str, Any], int]:
    """One extract, one-column statistics only (used by validate, which checks the extract's
    hash itself and reports it: so no refusal here unless ``verify``)."""
    acc = accumulate_many([extract], [manifest_path], batch_rows=batch_rows, check_alphabet=check_alphabet,
                          verify=verify)
    return acc.manifest, acc.columns, acc.rows


# -- reporting -------------------------------------------------------------------------------

def z_value(confidence: float) -> float:
    if not 0 < confidence < 1:
        raise UsageError(f"--confidence must be between 0 and 1 (e.g. 0.95), got {confidence}")
    return NormalDist().inv_cdf(0.5 + confidence / 2)


def _interval_fields(iv: Any) -> tuple[Any, Any, Any, Any, Any]:
    """distribution.Interval -> (estimate, se, ci_low, ci_high, method); bounds that are not
    numbers (no interval can be stated, or no rows) become None."""
    lo = iv.lo if iv.lo is not None and math.isfinite(iv.lo) else None
    hi = iv.hi if iv.hi is not None and math.isfinite(iv.hi) else None
    return iv.estimate, iv.se, lo, hi, iv.method


# -- what each statistic estimates (from the manifest and its embedded policy) ----------------

def _is(column: str, label: str) -> str:
    from .policy import MISSING_LABEL, OTHER_LABEL

    if label == MISSING_LABEL:
        return f"{column} missing"
    if label == OTHER_LABEL:
        return f"{column} not one of its listed categories"
    return f"{column} = {label}"


def _policy_column(manifest: Manifest, name: str) -> dict[str, Any]:
    cols = (manifest.policy or {}).get("columns") or {}
    c = cols.get(name) if isinstance(cols, dict) else None
    return c if isinstance(c, dict) else {}


def _num_text(v: Any) -> str:
    return f"{v:g}" if isinstance(v, (int, float)) and not isinstance(v, bool) else str(v)


def _missing_clause(name: str, missing: Any, as_category: str) -> str:
    """How the release handled a missing value of column ``name`` (the policy's ``missing``)."""
    if missing in (None, "error"):
        return f"no {name} missing (the release refuses missing values)"
    if missing == "as-category":
        return f"missing {name} counted as {as_category}"
    if missing == "as-answer":
        return f"missing {name} kept as its own answer ({as_category})"
    if isinstance(missing, dict) and "fill" in missing:
        return f"missing {name} replaced by {_num_text(missing['fill'])}"
    shown = ", ".join(f"{k}: {_num_text(v)}" for k, v in missing.items()) if isinstance(missing, dict) else missing
    return f"missing {name} handled as the policy says (missing: {shown})"


def handling(manifest: Manifest, entry: ColumnEntry) -> list[str]:
    """What the release did to a privatized column's values before randomizing them, read from
    the manifest (its mechanism spec, bins and embedded policy): clipping to the bounds, the
    bins, missing and unknown values.  One clause each; every statistic of the column is about
    the values so encoded."""
    from .policy import MISSING_LABEL, OTHER_LABEL

    if entry.type == "joint":   # a joint group: its members' clauses, in order
        return [c for i in range(len(entry.members or [])) for c in handling(manifest, _member_entry(entry, i))]
    cfg = _policy_column(manifest, entry.name)
    name = entry.name
    out: list[str] = []
    if entry.type in ("numeric", "binned"):
        bounds = (entry.mechanism or {}).get("bounds")
        if entry.bins:
            bounds = (entry.bins[0], entry.bins[-1])
        if bounds is not None:
            lo, hi = bounds
            out.append(f"{name} clipped to [{lo:g}, {hi:g}]" if cfg.get("out_of_bounds", "clip") == "clip"
                       else f"every {name} within [{lo:g}, {hi:g}] (the release refuses values outside)")
        if entry.bins:
            out.append(f"{name} in {len(entry.bins) - 1} bins with edges {', '.join(f'{e:g}' for e in entry.bins)} "
                       "(the last bin includes its upper edge)")
        out.append(_missing_clause(name, cfg.get("missing"), f"the bin {MISSING_LABEL}" if entry.bins
                                   else "a randomized missing flag"))
    else:
        out.append(_missing_clause(name, cfg.get("missing"), MISSING_LABEL))
        unknown = cfg.get("unknown")
        out.append(f"{name} values not among its listed categories counted as {OTHER_LABEL}" if unknown ==
                   "as-category" else f"every {name} among its listed categories (the release refuses others)")
    return out


def column_estimand(manifest: Manifest, entry: ColumnEntry) -> str:
    """The column's clauses joined: what its values are, as the release encoded them."""
    return "; ".join(handling(manifest, entry))


def _with(text: str, *clauses: str) -> str:
    """A statistic's estimand: what it is, then the encoding clauses of the columns it reads."""
    return "; ".join([text, *[c for c in clauses if c]])


MLE_CLAUSE = "estimated by maximum likelihood (on the simplex; biased toward its interior at small n)"
LIKELIHOOD_CONSISTENT = ("none needed: the maximum-likelihood shares are non-negative and sum to 1, so 'share' is "
                         "the estimate itself")


def _frequency_estimands(manifest: Manifest, entry: ColumnEntry, labels: list[str], how: str = "") -> list[str]:
    from .policy import MISSING_LABEL

    enc = column_estimand(manifest, entry)
    if entry.type == "joint":   # a cell: one label per member (joint_label: a JSON array)
        import json

        names = [m.name for m in entry.members or []]
        return [_with("share of rows with " + " and ".join(_is(n, v) for n, v in zip(names, json.loads(lab)))
                      + " among all rows", enc) for lab in labels]
    if entry.type == "binned":
        return [_with(f"share of rows with {entry.name} {'missing' if lab == MISSING_LABEL else 'in bin ' + lab} "
                      "among all rows", how, enc) for lab in labels]
    return [_with(f"share of rows with {_is(entry.name, lab)} among all rows", how, enc) for lab in labels]


def _distribution_result(dist: Any, an: Analyses, col: str, confidence: float, enc: str,
                         among: str = "all rows") -> DistributionResult:
    buckets = f"read off its histogram over {len(dist.mass)} buckets, linear within each"
    qs = tuple(QuantileResult(q, *_interval_fields(dist.quantile_ci(q, confidence)),
                              estimand=_with(f"{q:g}-quantile of {col} among {among} ({buckets})", enc))
               for q in an.quantiles)
    rngs = tuple(RangeResult(lo, hi, *_interval_fields(dist.range_ci(lo, hi, confidence)),
                             estimand=_with(f"share of rows with {col} in [{lo:g}, {hi:g}) among {among} ({buckets})",
                                            enc))
                 for c, lo, hi in an.ranges if c == col)
    hist = dist.histogram()
    cdf = [float(v) for v in np.atleast_1d(dist.cdf(np.asarray(hist["edges"])))]
    method = getattr(dist, "method", "")
    if getattr(dist, "no_interval", None):
        method = f"{method}; {dist.no_interval}"
    return DistributionResult(method, qs, rngs, tuple(hist["edges"]), tuple(hist["mass"]), tuple(cdf), source=dist,
                              among=among)


def _distribution_mean(d: Any, confidence: float, estimand: str) -> MeanResult:
    """The mean of a decoded distribution with its SE and interval (``Distribution.mean_ci``)."""
    iv = d.mean_ci(confidence)
    if iv.se is None or not math.isfinite(iv.estimate):
        return MeanResult(float(d.mean()), note=f"mean of the estimated distribution; no interval ({iv.method})",
                          estimand=estimand)
    return MeanResult(float(iv.estimate), float(iv.se), float(iv.lo), float(iv.hi),
                      note=f"mean of the estimated distribution; interval: {iv.method}", estimand=estimand)


def _decoded_frequencies(st: decoders.FrequencyDecoder, manifest: Manifest, entry: ColumnEntry, confidence: float,
                         z: float, an: Analyses, rows: int, head: dict[str, Any]) -> tuple[Any, ...]:
    """A frequency column's shares: unbiased (projection), or with ``--decoder likelihood`` the
    maximum-likelihood shares (mechanisms/likelihood.py), whose decoder and method go into ``head``."""
    labels = list(st.mechanism.categories)
    if not st.likelihood:
        return st.frequencies(z, an.consistency, rows, _frequency_estimands(manifest, entry, labels))
    freqs, how = st.likelihood_frequencies(confidence, rows, _frequency_estimands(manifest, entry, labels, MLE_CLAUSE))
    head.update(decoder="likelihood", decoder_method=how)
    return freqs


def _bin_estimates(st: decoders.FrequencyDecoder, confidence: float) -> tuple[Any, Any]:
    """A binned column's bin shares and their covariance: unbiased with the exact covariance, or the
    maximum-likelihood shares with the covariance of their bootstrap replicates."""
    if st.likelihood:
        return st.likelihood_shares(confidence)
    return st.estimates()[0], st.covariance()


def _bin_method(st: decoders.FrequencyDecoder) -> dict[str, str]:
    if not st.likelihood:
        return {}
    return {"method": "maximum-likelihood bin shares (--decoder likelihood; on the simplex, biased toward its interior "
                      "at small n); intervals from the covariance of the parametric bootstrap replicates, reaching the "
                      "bin edges (normal approximation)"}


def _consistent_text(st: decoders.FrequencyDecoder, an: Analyses) -> str:
    if st.likelihood:
        return LIKELIHOOD_CONSISTENT
    return f"{an.consistency} (post-processed to a valid distribution; biased, for display)"


def _column_result(entry: ColumnEntry, st: decoders.Decoder, manifest: Manifest, rows: int, confidence: float, z: float,
                   an: Analyses) -> ColumnResult:
    spec = entry.mechanism or {}
    enc = column_estimand(manifest, entry)
    head: dict[str, Any] = {"name": entry.name, "type": entry.type, "mechanism": spec.get("mechanism"),
                            "epsilon": spec.get("epsilon"), "rows_reported": st.n if st.n != rows else None,
                            "estimand": enc}
    bounds = spec.get("bounds")
    bounds = None if bounds is None else tuple(bounds)
    if isinstance(st, decoders.FrequencyDecoder):
        labels = list(st.mechanism.categories)
        freqs = _decoded_frequencies(st, manifest, entry, confidence, z, an, rows, head)
        dist = None
        if entry.type == "binned" and entry.bins is not None and st.n > 1:
            from .distribution import binned_distribution
            from .policy import MISSING_LABEL

            shares, cov = _bin_estimates(st, confidence)
            assert shares is not None and cov is not None  # st.n > 1
            among = "all rows"
            if MISSING_LABEL in labels:   # missing: as-answer: the distribution among rows with a value
                shares, cov = decoders.shares_without(shares, cov, labels.index(MISSING_LABEL))
                among = "rows with a value"
            if shares is not None and cov is not None:
                prefix_se = np.sqrt(np.maximum(np.diag(np.cumsum(np.cumsum(cov, axis=0), axis=1)), 0.0))
                d = binned_distribution(np.asarray(entry.bins, float), shares, prefix_se, cov=cov, n=st.n,
                                        **_bin_method(st))
                if among != "all rows":
                    d.method += ("; among rows with a value: the bin shares divided by their sum (delta-method "
                                 "covariance)")
                dist = _distribution_result(d, an, entry.name, confidence, enc, among)
        return ColumnResult(**head, family="frequency", frequencies=freqs, consistent_method=_consistent_text(st, an),
                            distribution=dist)
    if isinstance(st, decoders.MissingDistributionDecoder):   # missing: as-answer, a distribution mechanism
        share = st.missing_share(z, rows, _with(f"share of rows with {entry.name} missing among all rows", enc))
        mean = dist = None
        if st.n > 1:
            d = st.distribution()
            mean = _distribution_mean(d, confidence, _with(f"mean of {entry.name} among rows with a value (from the "
                                                           "estimated distribution)", enc))
            dist = _distribution_result(d, an, entry.name, confidence, enc, "rows with a value")
        return ColumnResult(**head, family="distribution", bounds=bounds, frequencies=(share,), mean=mean,
                            distribution=dist)
    if isinstance(st, decoders.DistributionDecoder):
        mean = dist = None
        if st.n > 1:
            d = st.distribution()
            mean = _distribution_mean(d, confidence, _with(f"mean of {entry.name} among all rows (from the estimated "
                                                           "distribution)", enc))
            dist = _distribution_result(d, an, entry.name, confidence, enc)
        return ColumnResult(**head, family="distribution", bounds=bounds, mean=mean, distribution=dist)
    if isinstance(st, QuantileDecoder):   # one quantile, tracked by its mechanism (its family's decoder)
        qe = st.quantile(confidence)
        qres = QuantileResult(qe.q, qe.estimate, qe.se, qe.lo, qe.hi, qe.method,
                              estimand=_with(f"{qe.q:g}-quantile of {entry.name} among all rows (from one-bit tests at "
                                             "thresholds set in phases; --quantiles does not apply)", enc))
        return ColumnResult(**head, family="quantile", bounds=bounds, quantile=qres)
    if isinstance(st, decoders.MissingAnswerDecoder):   # missing: as-answer without bins
        share = st.missing_share(z, rows, _with(f"share of rows with {entry.name} missing among all rows", enc))
        return ColumnResult(**head, family="mean", bounds=bounds, frequencies=(share,),
                            mean=st.mean(z, _with(f"mean of {entry.name} among rows with a value", enc)))
    assert isinstance(st, decoders.MeanDecoder)
    return ColumnResult(**head, family="mean", bounds=bounds,
                        mean=st.mean(z, _with(f"mean of {entry.name} among all rows", enc)))


def _member_result(group: str, res: ColumnResult) -> ColumnResult:
    """A joint group's member's result, its estimands saying that they are its group's cells summed."""
    from dataclasses import replace

    clause = f"the marginal of joint group {group} (the sum of its cells with each value)"
    freqs = tuple(replace(f, estimand=_with(f.estimand, clause)) for f in res.frequencies)
    return replace(res, frequencies=freqs, estimand=_with(res.estimand, clause))


def _bounds(entry: ColumnEntry) -> tuple[float, float] | None:
    b = (entry.mechanism or {}).get("bounds")
    return None if b is None else (float(b[0]), float(b[1]))


SE_METHOD = ("sample standard deviation of the per-row unbiased estimates / sqrt(rows); normal-approximation "
             "intervals; ratios (shares within a group, grouped means) by the delta method")


def report(manifest: Manifest, stats: dict[str, Any], rows: int, confidence: float,
           analyses: Analyses | None = None, acc: Accumulated | None = None) -> EstimateResult:
    """The typed result of accumulated statistics (``EstimateResult``; ``to_dict()`` is the JSON
    shape of ``ldpt estimate --format json``)."""
    an = analyses or Analyses()
    z = z_value(confidence)
    entries = {e.name: e for e in manifest.columns}
    columns = {}
    for e in manifest.columns:
        if stats.get(e.name) is None:
            continue
        columns[e.name] = _column_result(e, stats[e.name], manifest, rows, confidence, z, an)
        if e.type == "joint" and acc is not None and e.name in acc.groups:   # its members' marginals
            for i, m in enumerate(e.members or []):
                entries[m.name] = _member_entry(e, i)
                columns[m.name] = _member_result(e.name, _column_result(
                    entries[m.name], acc.groups[e.name].member(m.name), manifest, rows, confidence, z, an))
    crosstabs: tuple[CrossTabResult, ...] = ()
    grouped: tuple[GroupedMeanResult, ...] = ()
    extracts: tuple[str, ...] = ()
    if acc is not None:
        crosstabs = tuple(st.report(z, an.consistency, a, b, handling(manifest, entries[a]) +
                                    handling(manifest, entries[b])) for (a, b), st in acc.crosstabs.items())
        grouped = tuple(GroupedMeanResult(y, g, st.n, st.report(z, y, g, _bounds(entries[y]),
                                                                handling(manifest, entries[y]) +
                                                                handling(manifest, entries[g])))
                        for (y, g), st in acc.mean_by.items())
        extracts = tuple(acc.extracts)
    public = tuple(c.name for c in manifest.columns if c.type == "public")
    return EstimateResult(rows, confidence, columns, SE_METHOD, crosstabs, grouped, extracts, public)


def estimate(extract: Path | str | Sequence[Path | str], manifest_path: Path | str | Sequence | None = None, *,
             confidence: float = 0.95, batch_rows: int = DECODE_BATCH_ROWS,
             crosstabs: list[tuple[str, str]] | None = None, mean_by: list[tuple[str, str]] | None = None,
             quantiles: list[float] | None = None, ranges: list[tuple[str, float, float]] | None = None,
             consistency: str = "norm-sub", engine: str = "local", scheduler: str | None = None,
             on_progress: Callable[[int], None] | None = None, decoder: str = "projection") -> EstimateResult:
    """Unbiased frequencies and means (and the requested joint analyses, quantiles and
    ranges) with SE and CI, as an ``EstimateResult`` (``to_dict()``: the JSON shape of
    ``ldpt estimate --format json``; ``to_frame()``: one row per statistic).  ``extract`` may
    be a list: extracts with identical mechanism specs are merged by adding their sufficient
    statistics.  ``on_progress`` is told the rows decoded, batch by batch (a count each time).
    ``decoder``: how frequency columns (categorical and binned) are decoded: "projection" (the
    unbiased shares) or "likelihood" (maximum-likelihood shares by iterative Bayesian update, with
    parametric-bootstrap SEs and intervals; mechanisms/likelihood.py, docs/decoding.md)."""
    z_value(confidence)
    extracts: list[Any] = list(extract) if isinstance(extract, (list, tuple)) else [extract]
    manifests: list[Any] | None
    if isinstance(manifest_path, (list, tuple)):
        manifests = list(manifest_path)
    else:
        manifests = [manifest_path] * len(extracts) if manifest_path and len(extracts) == 1 else \
            ([None] * len(extracts) if manifest_path is None else None)
        if manifests is None:
            raise UsageError("with several extracts, give one --manifest per extract or none")
    an = Analyses(crosstabs=list(crosstabs or []), mean_by=list(mean_by or []),
                  quantiles=list(quantiles) if quantiles else [0.5], ranges=list(ranges or []),
                  consistency=consistency, decoder=decoder)
    if engine not in ("local", "dask"):
        raise UsageError(f"--engine {engine!r} is not known; use local or dask.")
    with rows_told(on_progress):
        acc = accumulate_many([Path(e) for e in extracts], manifests, analyses=an, batch_rows=batch_rows,
                              engine=engine, scheduler=scheduler)
    return report(acc.manifest, acc.columns, acc.rows, confidence, an, acc)
