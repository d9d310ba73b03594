"""An empirical, black-box audit of a policy's mechanisms: ``ldpt audit``.

For every privatized column the audit asks the mechanism for worst-case input pairs (a, b)
(``Mechanism.audit_pairs``: two inputs whose report distributions differ most, read off the
exact channel where the mechanism has an uneven one, else two distinct categories or the two
bounds).  It then runs the real release path, ``privatize``, on generated tables of N rows all
equal to a and N rows all equal to b (one table per side, every column at once), under a fresh
key, in a private temporary folder (mode 0700) that is removed afterwards, and reads the
extracts back.  Nothing depends on the extract's row order: every figure is a count of events.

Each report is reduced to an outcome key (``Mechanism.audit_outcomes``: the reported value, or
what the report says about a and b, e.g. whether it supports each of them).  The rows of each
side are split in two halves (rows within a side are exchangeable, so any split will do):

* on the first halves an event E (a set of outcomes: an interval of reported values when the
  outcomes are ordered numbers, or the outcomes with the largest ratio, taken together) is picked,
  the one with the largest approximate lower confidence bound on ln P(E|a)/P(E|b);
* on the second halves, independent of that choice, the exact Clopper-Pearson bounds give a
  lower bound on the likelihood ratio: P(E|a) >= lower(k_a, n_a) and P(E|b) <= upper(k_b, n_b)
  (scipy.stats.beta quantiles), so P(E|a)/P(E|b) >= lower/upper, and eps >= ln(lower/upper).

Both directions (a over b, b over a) of every pair of every column are tested; the confidence
is shared among all of them (Bonferroni), so with probability at least ``confidence`` no bound of
the whole audit is above the truth.  An eps-LDP mechanism satisfies P(E|a) <= e^eps P(E|b) for
every event, so a lower bound above the declared eps is a violation: the audit fails.  A bound at
or below eps proves nothing about privacy (an audit can only find violations, never show their
absence); it shows the real release path did not exceed eps by more than the audit's resolution
at these N rows.

The method follows Z. Ding, Y. Wang, G. Wang, D. Zhang, D. Kifer, "Detecting Violations of
Differential Privacy", ACM CCS 2018 (worst-case inputs, an event chosen on one sample and tested
on a fresh one); the exact binomial bounds are C. J. Clopper, E. S. Pearson, "The Use of
Confidence or Fiducial Limits Illustrated in the Case of the Binomial", Biometrika 1934.
"""

from __future__ import annotations

import hashlib
import math
import os
import shutil
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from .errors import UsageError
from .keys import SecretKey, new_key_file
from .policy import LoadedPolicy, ResolvedColumn
from .results import DictView

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

__all__ = ["AuditResult", "ColumnAudit", "PairTest", "audit", "audit_manifest", "clopper_pearson",
           "ratio_lower_bound", "DEFAULT_ROWS", "DEFAULT_CONFIDENCE"]

DEFAULT_ROWS = 200_000
DEFAULT_CONFIDENCE = 0.99
MIN_ROWS = 200
MAX_ROWS = 50_000_000
MAX_OUTCOMES = 256          # unordered outcomes are pooled into at most this many groups before events are formed
MAX_ORDERED_GROUPS = 64     # ordered ones into at most this many runs of neighbouring values (2080 intervals)
PRIVATE_ENV = "LDPT_PRIVATE_DIR"  # the steward's private folder (io.private_dir): the audit's own while it runs
CHUNK_ROWS = 65_536         # reports are reduced to outcomes this many rows at a time


# -- exact binomial bounds ----------------------------------------------------------------------

def clopper_pearson(k: int, n: int, confidence: float) -> tuple[float, float]:
    """The exact (Clopper-Pearson) two-sided interval for a binomial proportion from k successes in
    n trials at level ``confidence``: each end misses with probability at most (1 - confidence)/2."""
    from scipy.stats import beta

    if n <= 0:
        return 0.0, 1.0
    tail = (1.0 - confidence) / 2.0
    lo = 0.0 if k <= 0 else float(beta.ppf(tail, k, n - k + 1))
    hi = 1.0 if k >= n else float(beta.ppf(1.0 - tail, k + 1, n - k))
    return lo, hi


def ratio_lower_bound(k_a: int, n_a: int, k_b: int, n_b: int, confidence: float) -> float:
    """A lower bound on P(E|a)/P(E|b) from k_a of n_a and k_b of n_b rows in the event: the lower end
    of a's exact interval over the upper end of b's, each at level ``confidence``.  Each end used
    misses with probability at most (1 - confidence)/2, so the bound holds with probability at
    least ``confidence``."""
    lo_a = clopper_pearson(k_a, n_a, confidence)[0]
    hi_b = clopper_pearson(k_b, n_b, confidence)[1]
    return lo_a / hi_b if hi_b > 0 else math.inf


# -- typed results ------------------------------------------------------------------------------

@dataclass(frozen=True)
class PairTest:
    """One direction of one input pair of a column: the event picked on the first halves and its
    counts and bound on the second halves (the ratio is P(event | first) / P(event | second))."""

    first: str
    second: str
    event: str
    first_in_event: int
    first_rows: int
    second_in_event: int
    second_rows: int
    ratio_lower: float
    epsilon_lower: float

    def to_dict(self) -> dict[str, Any]:
        return {"first": self.first, "second": self.second, "event": self.event,
                "first_in_event": self.first_in_event, "first_rows": self.first_rows,
                "second_in_event": self.second_in_event, "second_rows": self.second_rows,
                "ratio_lower": self.ratio_lower, "epsilon_lower": self.epsilon_lower}


AUDIT_TEST_COLUMNS = ("column", "mechanism", "epsilon", "channel_epsilon", "first", "second", "event",
                      "first_in_event", "first_rows", "second_in_event", "second_rows", "ratio_lower", "epsilon_lower",
                      "status", "column_epsilon_lower")


@dataclass(frozen=True)
class ColumnAudit:
    """The audit of one privatized column: the largest lower bound on eps over its tests, against
    the eps the release states for the column (``epsilon``) and the exact eps of the mechanism's
    channel (``channel_epsilon``, for comparison)."""

    column: str
    mechanism: str
    epsilon: float
    channel_epsilon: float
    epsilon_lower: float
    tests: tuple[PairTest, ...]
    seconds: float

    @property
    def ok(self) -> bool:
        return not self.epsilon_lower > self.epsilon

    @property
    def worst(self) -> PairTest | None:
        return max(self.tests, key=lambda t: t.epsilon_lower, default=None)

    def to_dict(self) -> dict[str, Any]:
        w = self.worst
        return {"column": self.column, "mechanism": self.mechanism, "epsilon": self.epsilon,
                "channel_epsilon": self.channel_epsilon, "epsilon_lower": self.epsilon_lower,
                "status": "pass" if self.ok else "fail", "worst": w.to_dict() if w is not None else None,
                "tests": [t.to_dict() for t in self.tests], "seconds": self.seconds}

    def frame_rows(self) -> list[dict[str, Any]]:
        return [{"column": self.column, "mechanism": self.mechanism, "epsilon": self.epsilon,
                 "channel_epsilon": self.channel_epsilon, **t.to_dict(),
                 "status": "pass" if not t.epsilon_lower > self.epsilon else "fail",
                 "column_epsilon_lower": self.epsilon_lower} for t in self.tests]

    def to_frame(self) -> pd.DataFrame:
        """One row per test of this column (the rows of ``AuditResult.to_frame()`` without the
        audit's own figures)."""
        import pandas as pd

        return pd.DataFrame(self.frame_rows(), columns=list(AUDIT_TEST_COLUMNS))


@dataclass(frozen=True, eq=False)
class AuditResult(DictView):
    """What ``audit`` returns: one ``ColumnAudit`` per privatized column; ``ok`` when no lower bound
    exceeds its column's eps."""

    policy: str
    rows: int
    confidence: float
    test_confidence: float
    columns: tuple[ColumnAudit, ...]
    seconds: float

    @property
    def ok(self) -> bool:
        return all(c.ok for c in self.columns)

    def column(self, name: str) -> ColumnAudit:
        for c in self.columns:
            if c.column == name:
                return c
        raise KeyError(name)

    def to_dict(self) -> dict[str, Any]:
        return {"policy": self.policy, "rows_per_side": self.rows, "confidence": self.confidence,
                "tests": sum(len(c.tests) for c in self.columns), "test_confidence": self.test_confidence,
                "ok": self.ok, "columns": [c.to_dict() for c in self.columns], "seconds": self.seconds}

    def to_frame(self) -> pd.DataFrame:
        """One row per test: column, mechanism, eps (stated), channel_epsilon (the mechanism's
        exact eps), first, second, event, counts, bounds, status; then the audit's own figures,
        the same on every row (policy, rows_per_side, confidence, test_confidence, and the
        column's largest lower bound as column_epsilon_lower)."""
        import pandas as pd

        cols = [*AUDIT_TEST_COLUMNS, "policy", "rows_per_side", "confidence", "test_confidence"]
        run = {"policy": self.policy, "rows_per_side": self.rows, "confidence": self.confidence,
               "test_confidence": self.test_confidence}
        rows = [{**r, **run} for c in self.columns for r in c.frame_rows()]
        return pd.DataFrame(rows, columns=cols)

    __hash__ = None  # type: ignore[assignment]


# -- the generated tables -------------------------------------------------------------------------

_NOT_A_CATEGORY = "<audit: not a declared category>"


def _raw_cell(rc: ResolvedColumn, value: Any) -> tuple[Any, pa.DataType, str]:
    """The raw cell that encodes to the mechanism input ``value`` (a code, or a number in column
    units), its Arrow type and a text for the report."""
    if rc.type in ("categorical", "binned"):
        code = int(value)
        if code == rc.missing_code:
            return None, pa.string() if rc.type == "categorical" else pa.float64(), "<missing>"
        if code == rc.other_code:
            other = _NOT_A_CATEGORY
            while other in rc.labels:
                other += "!"
            return other, pa.string(), "<other>"
        if rc.type == "binned":
            return float(rc.config.bins[code]), pa.float64(), rc.labels[code]
        return rc.labels[code], pa.string(), rc.labels[code]
    v = float(value)
    return v, pa.float64(), f"{v:.10g}"


def _table(lp: LoadedPolicy, cells: dict[str, tuple[Any, pa.DataType]], rows: int, prefix: str) -> pa.Table:
    """A table of ``rows`` identical rows: each privatized column at its cell, the other columns at a
    constant text, the subject key (if any) a distinct identifier per row."""
    names: list[str] = []
    arrays: list[pa.Array] = []
    subject = lp.policy.subject_key
    for rc in lp.columns:
        if rc.name == subject:
            continue
        names.append(rc.name)
        if rc.name in cells:
            v, typ = cells[rc.name]
            arrays.append(pa.nulls(rows, typ) if v is None else pa.repeat(pa.scalar(v, typ), rows))
        else:
            arrays.append(pa.repeat(pa.scalar("audit", pa.string()), rows))
    if subject is not None:
        names.append(subject)
        arrays.append(pa.array(np.char.add(prefix, np.arange(rows).astype(str))))
    return pa.table(arrays, names=names)


def _nonce(seed: str, label: str) -> str:
    return hashlib.sha256(f"ldptransform/audit/v1/{seed}/{label}".encode()).hexdigest()[:32]


def _release(lp: LoadedPolicy, key: SecretKey, table: pa.Table, folder: Path, label: str,
             nonce: str | None) -> Path:
    """Write ``table`` into the private folder and release it with ``privatize``; the extract's path."""
    import pyarrow.parquet as pq

    from .release import privatize

    private, out = folder / "private", folder / "out"
    inp = private / f"input-{label}.parquet"
    pq.write_table(table, inp)
    extract = out / f"extract-{label}.parquet"
    ledger = private / f"ledger-{label}.sqlite3" if lp.policy.budget.lifetime_epsilon is not None else None
    privatize(inp, lp, key, extract, diagnostics_path=private / f"diagnostics-{label}.json", nonce=nonce,
              ledger_path=ledger)
    inp.unlink()
    return extract


def _outcomes(rc: ResolvedColumn, extract: Path, pair: tuple[Any, Any]) -> np.ndarray:
    """The outcome keys of the column's reports in ``extract`` (rows that did not report removed)."""
    import pyarrow.parquet as pq

    m = rc.mechanism
    assert m is not None
    fields = [f.name for f in m.output_fields(rc.name)]
    t = pq.read_table(extract, columns=fields)
    reported = t.column(fields[0]).is_valid()
    t = t.filter(reported)
    parts = []
    for s in range(0, t.num_rows, CHUNK_ROWS):
        piece = t.slice(s, CHUNK_ROWS)
        parts.append(m.audit_outcomes([piece.column(f).combine_chunks() for f in fields], pair))
    if not parts:
        return np.zeros(0, dtype=float if m.audit_ordered() else object)
    return np.concatenate(parts)


# -- events -------------------------------------------------------------------------------------

@dataclass
class _Outcomes:
    """Outcome groups shared by the four samples (a and b, first and second halves)."""

    counts: dict[str, np.ndarray]      # "a1", "b1", "a2", "b2" -> count per group
    rows: dict[str, int]
    labels: list[str]                  # a text per group
    ordered: bool


def _fmt(key: Any) -> str:
    return f"{key:.6g}" if isinstance(key, (float, np.floating)) else str(key)


def _groups(keys_a: np.ndarray, keys_b: np.ndarray, ordered: bool) -> _Outcomes:
    """Split each side in halves, number the distinct outcomes, and pool them into groups using the
    first halves only (ordered: at most MAX_ORDERED_GROUPS runs of neighbouring values with similar
    first-half counts; unordered: the MAX_OUTCOMES - 1 most frequent outcomes, the rest together)."""
    ha, hb = len(keys_a) // 2, len(keys_b) // 2
    samples = {"a1": keys_a[:ha], "b1": keys_b[:hb], "a2": keys_a[ha:], "b2": keys_b[hb:]}
    allk = np.concatenate(list(samples.values()))
    uniq, inv = np.unique(allk, return_inverse=True)
    M = len(uniq)
    bounds = np.cumsum([0] + [len(v) for v in samples.values()])
    ids = {name: inv[bounds[i]: bounds[i + 1]] for i, name in enumerate(samples)}
    first = np.bincount(ids["a1"], minlength=M) + np.bincount(ids["b1"], minlength=M)
    if M <= (MAX_ORDERED_GROUPS if ordered else MAX_OUTCOMES):
        group = np.arange(M)
        labels = [_fmt(u) for u in uniq]
    elif ordered:
        total = max(int(first.sum()), 1)
        group = np.minimum((np.cumsum(first) - first) * MAX_ORDERED_GROUPS // total, MAX_ORDERED_GROUPS - 1)
        group = np.unique(group, return_inverse=True)[1]
        starts = np.flatnonzero(np.diff(np.concatenate([[-1], group])))
        ends = np.concatenate([starts[1:], [M]]) - 1
        labels = [_fmt(uniq[s]) if s == e else f"{_fmt(uniq[s])}..{_fmt(uniq[e])}" for s, e in zip(starts, ends)]
    else:
        top = np.argsort(-first, kind="stable")[: MAX_OUTCOMES - 1]
        group = np.full(M, MAX_OUTCOMES - 1)
        group[top] = np.arange(len(top))
        labels = [_fmt(uniq[t]) for t in top] + ["any other report"]
    G = int(group.max()) + 1 if M else 0
    counts = {name: np.bincount(group[v], minlength=G).astype(np.int64) for name, v in ids.items()}
    return _Outcomes(counts, {name: len(v) for name, v in samples.items()}, labels, ordered)


def _score(ka: np.ndarray, na: int, kb: np.ndarray, nb: int, z: float) -> np.ndarray:
    """Approximate lower confidence bound on ln P(E|a)/P(E|b) (delta method, half-counts added) with
    ``z`` standard errors: used only to pick the event on the first halves, never as the audit's
    figure.  The caller's z adds to the test's own a margin for the number of candidate events
    (the largest of many noisy ratios overstates its event, most for small events)."""
    pa_, pb_ = (ka + 0.5) / (na + 1.0), (kb + 0.5) / (nb + 1.0)
    se = np.sqrt(np.maximum(1.0 / (ka + 0.5) - 1.0 / (na + 1.0) + 1.0 / (kb + 0.5) - 1.0 / (nb + 1.0), 0.0))
    return np.log(pa_) - np.log(pb_) - z * se


def _pick_event(o: _Outcomes, num: str, den: str, z: float) -> tuple[np.ndarray, str]:
    """The groups of the event with the best first-half score for P(E|num)/P(E|den), and its text:
    among the intervals of outcomes when they are ordered numbers, else among the unions of the
    outcomes with the largest first-half ratios."""
    from scipy.stats import norm

    ca, cb = o.counts[num + "1"], o.counts[den + "1"]
    na, nb = o.rows[num + "1"], o.rows[den + "1"]
    G = len(ca)
    candidates = G * (G + 1) // 2 if o.ordered else G
    z = z + float(norm.ppf(1.0 - 0.5 / max(candidates, 1)))
    if o.ordered:
        Ca, Cb = np.concatenate([[0], np.cumsum(ca)]), np.concatenate([[0], np.cumsum(cb)])
        i, j = np.triu_indices(G)
        k = int(np.argmax(_score(Ca[j + 1] - Ca[i], na, Cb[j + 1] - Cb[i], nb, z)))
        lo_g, hi_g = int(i[k]), int(j[k])
        first, last = o.labels[lo_g].split("..")[0], o.labels[hi_g].split("..")[-1]
        text = f"report: {first}" if first == last else f"report in [{first}, {last}]"
        return np.arange(lo_g, hi_g + 1), text
    r = ((ca + 0.5) / (na + 1.0)) / ((cb + 0.5) / (nb + 1.0))
    order = np.argsort(-r, kind="stable")
    best_j = int(np.argmax(_score(np.cumsum(ca[order]), na, np.cumsum(cb[order]), nb, z)))
    groups = order[: best_j + 1]
    names = [o.labels[g] for g in sorted(groups.tolist())]
    more = f" and {len(names) - 6} more" if len(names) > 6 else ""
    text = "report is one of: " + "; ".join(names[:6]) + more if len(names) > 1 else f"report: {names[0]}"
    return groups, text


def _pair_tests(keys_a: np.ndarray, keys_b: np.ndarray, ordered: bool, texts: tuple[str, str],
                confidence: float) -> list[PairTest]:
    from scipy.stats import norm

    o = _groups(keys_a, keys_b, ordered)
    z = float(norm.ppf(1.0 - (1.0 - confidence) / 2.0))
    out = []
    for num, den, first, second in (("a", "b", texts[0], texts[1]), ("b", "a", texts[1], texts[0])):
        n1, n2 = o.rows[num + "2"], o.rows[den + "2"]
        if min(o.rows.values()) == 0 or not len(o.labels):
            out.append(PairTest(first, second, "no reports", 0, n1, 0, n2, 0.0, 0.0))
            continue
        groups, text = _pick_event(o, num, den, z)
        if not ordered:   # outcome texts may speak of the pair's inputs as a and b
            text += f" (a = {texts[0]}, b = {texts[1]})"
        k1 = int(o.counts[num + "2"][groups].sum())
        k2 = int(o.counts[den + "2"][groups].sum())
        ratio = ratio_lower_bound(k1, n1, k2, n2, confidence)
        eps = max(0.0, math.log(ratio)) if ratio > 0 else 0.0
        out.append(PairTest(first, second, text, k1, n1, k2, n2, ratio, eps))
    return out


# -- the audit ----------------------------------------------------------------------------------

def _check_options(rows: int, confidence: float) -> None:
    if isinstance(rows, bool) or not isinstance(rows, int) or not MIN_ROWS <= rows <= MAX_ROWS:
        raise UsageError(f"audit: rows (--rows) must be a whole number of rows per side from {MIN_ROWS} to "
                         f"{MAX_ROWS}, got {rows!r}; the default {DEFAULT_ROWS} resolves about 2% of eps at eps 1.")
    if not (isinstance(confidence, (int, float)) and 0.5 <= confidence < 1):
        raise UsageError(f"audit: confidence (--confidence) must be at least 0.5 and below 1, got {confidence!r}; "
                         f"for example {DEFAULT_CONFIDENCE}.")


def audit(policy: LoadedPolicy, *, rows: int = DEFAULT_ROWS, confidence: float = DEFAULT_CONFIDENCE,
          key: SecretKey | None = None, seed: str | None = None) -> AuditResult:
    """Audit every privatized column of ``policy`` through the real release path (module docstring).

    ``rows`` rows per side and pair; ``confidence`` for the whole audit (shared among its tests).
    By default a fresh key is made in the private temporary folder and every release draws its own
    nonce; tests pass a fixed ``key`` and ``seed`` (the nonces are then derived from it), which
    makes the audit reproducible."""
    _check_options(rows, confidence)
    t0 = time.perf_counter()
    cols = [rc for rc in policy.columns if rc.mechanism is not None]
    if not cols:
        raise UsageError(f"audit: policy {policy.source} privatizes no column (every column is public or "
                         "dropped), so there is nothing to audit.")
    pairs = {rc.name: rc.mechanism.audit_pairs() for rc in cols if rc.mechanism is not None}
    n_tests = 2 * sum(len(p) for p in pairs.values())
    test_conf = 1.0 - (1.0 - confidence) / n_tests
    rounds = max(len(p) for p in pairs.values())
    keys: dict[tuple[str, int], dict[str, np.ndarray]] = {}
    folder = Path(tempfile.mkdtemp(prefix="ldpt-audit-"))
    steward_private = os.environ.get(PRIVATE_ENV)
    try:
        folder.chmod(0o700)
        for sub in ("private", "out"):
            (folder / sub).mkdir(mode=0o700)
        # whatever a release keeps in the steward's private folder by default goes to the audit's own
        os.environ[PRIVATE_ENV] = str(folder / "private")
        k = key if key is not None else new_key_file(folder / "private" / "audit.key")
        for r in range(rounds):
            for side, index in (("a", 0), ("b", 1)):
                cells = {}
                for rc in cols:
                    pair = pairs[rc.name][min(r, len(pairs[rc.name]) - 1)]
                    v, typ, _ = _raw_cell(rc, pair[index])
                    cells[rc.name] = (v, typ)
                label = f"{r}-{side}"
                extract = _release(policy, k, _table(policy, cells, rows, f"{label}-"), folder, label,
                                   _nonce(seed, label) if seed is not None else None)
                for rc in cols:
                    if r < len(pairs[rc.name]):
                        keys.setdefault((rc.name, r), {})[side] = _outcomes(rc, extract, pairs[rc.name][r])
                extract.unlink()
    finally:
        if steward_private is None:
            os.environ.pop(PRIVATE_ENV, None)
        else:
            os.environ[PRIVATE_ENV] = steward_private
        shutil.rmtree(folder, ignore_errors=True)
    results = []
    for rc in cols:
        m = rc.mechanism
        assert m is not None
        t1 = time.perf_counter()
        tests: list[PairTest] = []
        for r, pair in enumerate(pairs[rc.name]):
            texts = (_raw_cell(rc, pair[0])[2], _raw_cell(rc, pair[1])[2])
            got = keys[(rc.name, r)]
            tests += _pair_tests(got["a"], got["b"], m.audit_ordered(), texts, test_conf)
        results.append(ColumnAudit(rc.name, m.name, float(m.epsilon), float(m.max_log_ratio()),
                                   max((t.epsilon_lower for t in tests), default=0.0), tuple(tests),
                                   time.perf_counter() - t1))
    return AuditResult(policy.source, rows, confidence, test_conf, tuple(results), time.perf_counter() - t0)


def audit_manifest(manifest: Path | str, **kwargs: Any) -> AuditResult:
    """Audit the policy embedded in a release's manifest (the mechanisms it resolves to must be the
    ones the manifest records: a release made by another version is refused)."""
    from .errors import ManifestError
    from .manifest import load_manifest
    from .policy import parse_policy

    path = Path(manifest)
    man = load_manifest(path)
    lp = parse_policy(man.policy, f"embedded in manifest {path}")
    recorded = {c.name: c.mechanism for c in man.columns if c.mechanism is not None}
    for rc in lp.columns:
        if rc.mechanism is not None and rc.name in recorded and recorded[rc.name] != rc.mechanism.to_spec():
            raise ManifestError(f"manifest {path}, column {rc.name!r}: the policy embedded in the manifest resolves to "
                                f"mechanism {rc.mechanism.to_spec()!r}, but the release recorded "
                                f"{recorded[rc.name]!r}; audit it with the ldptransform version that made the "
                                "release (the manifest's tool_version), or audit the policy file itself with --policy.")
    return audit(lp, **kwargs)
