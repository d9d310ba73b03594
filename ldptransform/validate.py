"""Release checks: integrity, privacy budget, output alphabet, secrets, and (with the raw
data and the key) bit-for-bit reproduction and calibration of the estimates.

Each check ends as pass, warn or fail; ``ok`` is False when any check fails.

Validation has no side effects: it reads the extract, the manifest and the raw data, and the
re-derivation writes only into a scratch folder it removes (``_reproduce``); the steward's
ledger, the record of release nonces and every release destination stay as they were, so a
release can be re-checked at any later time (tests/test_side_effects.py).
"""

from __future__ import annotations

import json
import math
import re
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from statistics import NormalDist
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import mechanisms as mech
from .distribution import Distribution
from .errors import InputFileError, LdptError, UsageError
from .estimate import Analyses, accumulate, report, rows_told, z_value
from .integrity import check_extract
from .io import TableSource
from .keys import SecretKey
from .manifest import CAUTIONS, DamagedManifest, Manifest, default_manifest_path, load_manifest
from .policy import EPS_TOLERANCE, parse_policy
from .release import (
    encode_binned,
    encode_categorical,
    encode_numeric,
    plan_columns,
    privatize,
)
from .release.columns import input_plans
from .results import (
    CalibrationEntry,
    CalibrationResult,
    Check,
    EstimateResult,
    MeanResult,
    RangeResult,
    ValidationReport,
)
from .signing import check_signature

MIN_CALIBRATION_ROWS = 200  # common practice for a normal approximation of these means; no source
FAMILY_ALPHA = 0.001  # calibration: chance of a false failure over all cells, for a correct release
_HEX = re.compile(r"\b[0-9a-fA-F]{32,}\b")


class _Checks:
    """The checks of one validation as they are made; ``report()`` freezes them."""

    def __init__(self, extract: str, manifest: str) -> None:
        self.extract, self.manifest = extract, manifest
        self.checks: list[Check] = []
        self.calibration: CalibrationResult | None = None

    def add(self, name: str, ok: bool | None, detail: str) -> None:
        self.checks.append(Check(name, None if ok is None else bool(ok), detail))

    def report(self) -> ValidationReport:
        return ValidationReport(self.extract, self.manifest, tuple(self.checks), self.calibration)


def _check_secrets(manifest: Manifest, text: str, key: SecretKey | None, rep: _Checks) -> None:
    allowed = {manifest.extract.sha256, manifest.policy_sha256, manifest.nonce, manifest.key_fingerprint}
    allowed |= {p.sha256 for p in manifest.extract.parts or []}
    stray = [h for h in _HEX.findall(text) if h not in allowed]
    problems = []
    if stray:
        problems.append(f"{len(stray)} long hex string(s) in unexpected places")
    data = json.loads(text)

    def walk(o: Any, path: str) -> None:
        if isinstance(o, dict):
            for k, v in o.items():
                if "key" in k.lower() and k != "key_fingerprint" and not path.startswith("policy"):
                    problems.append(f"a field named {k!r} at {path or 'top level'}")
                walk(v, f"{path}.{k}" if path else k)
        elif isinstance(o, list):
            for v in o:
                walk(v, path)

    walk(data, "")
    if key is not None:
        if key.contains_in(text):
            problems.append("the secret key itself")
        if key.fingerprint() != manifest.key_fingerprint:
            rep.add("key matches", False, "the key given has fingerprint "
                    f"{key.fingerprint()}, the manifest records {manifest.key_fingerprint}: not the release's key")
        else:
            rep.add("key matches", True, f"key fingerprint {manifest.key_fingerprint} matches the manifest")
    rep.add("no key material", not problems, "the manifest holds only the key fingerprint" if not problems else
            "the manifest contains " + "; ".join(problems))


def _channel_issues(manifest: Manifest, issues: list[str]) -> float:
    """Each column's channel against its stated eps; returns the sum of the column epsilons."""
    from .random.variates import exp_lower_bound

    total = 0.0
    for c in manifest.columns:
        if c.mechanism is None:
            continue
        try:
            built = mech.build(c.mechanism)
        except LdptError as err:
            issues.append(f"column {c.name!r}: mechanism spec cannot be rebuilt ({err})")
            continue
        eps = float(c.mechanism.get("epsilon", float("nan")))
        total += eps
        worst = built.max_log_ratio()
        if not worst <= eps + 1e-9:
            issues.append(f"column {c.name!r}: its channel allows a likelihood ratio of e^{worst:.6g}, above its "
                          f"stated eps {eps:g}")
            continue
        # a threshold sampler: the channel its integer thresholds realize, in exact rational
        # arithmetic, against a certified lower bound of e^eps (docs/formulas.md section 10.4)
        realized = built.realized_ratio()
        if realized is not None and not (math.isfinite(eps) and eps > 0 and realized <= exp_lower_bound(eps)):
            issues.append(f"column {c.name!r}: the channel its integer thresholds realize has a worst likelihood "
                          f"ratio of {float(realized):.17g}, not certified to be at most e^eps for its stated eps "
                          f"{eps:g} (exact rational check)")
    return total


def _row_loss(manifest: Manifest, total: float, issues: list[str]) -> tuple[float, list[str], str, str, str]:
    """A row's privacy loss under the manifest's strategy: (loss, columns whose report_rate does
    not match, and the wording of the budget check)."""
    budget = manifest.privacy.epsilon_per_row_budget
    priv = manifest.privacy
    privatized = [c for c in manifest.columns if c.mechanism is not None]
    if priv.strategy != "sample":
        rates = [c.name for c in manifest.columns if c.report_rate != 1.0]
        return (total, rates, "the column epsilons add up to", "the columns add up to",
                f"the columns use {total:g} of {budget:g} per row (sequential composition)")
    # each row reports m of its d columns (chosen independently of the data): its loss is
    # m x the largest column eps (sequential composition over the reported columns)
    d, m_or_none = priv.privatized_columns, priv.reported_columns
    if d != len(privatized) or m_or_none is None or not 1 <= m_or_none <= d:
        issues.append(f"strategy sample: the manifest says each row reports {m_or_none} of {d} columns, but it "
                      f"describes {len(privatized)} privatized columns")
        m_or_none = d = len(privatized)
    m = m_or_none
    total = m * max((float((c.mechanism or {}).get("epsilon", float("nan"))) for c in privatized), default=0.0)
    rates = [c.name for c in privatized if abs(c.report_rate - m / max(d, 1)) > 1e-12]
    summary = (f"each row reports {m} of {d} columns (chosen independently of the data) at eps up to "
               f"{total / max(m, 1):g} each: {total:g} of {budget:g} per row (sequential composition over the "
               "reported columns)")
    return total, rates, "the reported columns use", "the reported columns use", summary


def _policy_issues(manifest: Manifest, issues: list[str]) -> None:
    """The embedded policy against the manifest: hash, strategy, each column's eps."""
    priv = manifest.privacy
    try:
        lp = parse_policy(manifest.policy, "embedded in the manifest")
        if lp.policy.sha256() != manifest.policy_sha256:
            issues.append("the embedded policy does not match policy_sha256")
        if lp.strategy != priv.strategy or (priv.strategy == "sample" and (
                priv.privatized_columns, priv.reported_columns) != (len(lp.policy.privatized_columns),
                                                                    lp.policy.reported_columns)):
            issues.append("privacy.strategy and the reported columns per row differ from the embedded policy's")
        pol_eps = {rc.name: rc.mechanism.epsilon for rc in lp.columns if rc.mechanism is not None}
        for c in manifest.columns:
            if c.mechanism is not None and abs(pol_eps.get(c.name, -1) - float(c.mechanism["epsilon"])) > 1e-12:
                issues.append(f"column {c.name!r}: mechanism eps differs from the policy's")
    except LdptError as err:
        issues.append(f"the embedded policy is invalid ({err})")


def _check_privacy(manifest: Manifest, rep: _Checks) -> None:
    issues: list[str] = []
    budget = manifest.privacy.epsilon_per_row_budget
    total, rates, adds, used, summary = _row_loss(manifest, _channel_issues(manifest, issues), issues)
    if rates:
        issues.append(f"column(s) {', '.join(map(repr, rates))}: report_rate does not match the strategy")
    if total > budget + EPS_TOLERANCE:
        issues.append(f"{adds} {total:g}, above the stated budget {budget:g} per row")
    if abs(total - manifest.privacy.epsilon_per_row_used) > 1e-9:
        issues.append(f"privacy.epsilon_per_row_used says {manifest.privacy.epsilon_per_row_used:g} but {used} "
                      f"{total:g}")
    _policy_issues(manifest, issues)
    rep.add("privacy budget", not issues,
            f"every channel meets its eps exactly; {summary}" if not issues else "; ".join(issues))


@dataclass(frozen=True)
class _Truth:
    """The raw data's true statistics, encoded as the release encoded them."""

    rows: int
    shares: dict[str, np.ndarray]   # categorical and binned columns: share of rows per code
    means: dict[str, float]         # numeric columns: mean of the clipped, filled values
    masses: dict[str, np.ndarray]   # columns with a distribution: bucket shares of its histogram


def _codes(plan: Any) -> int:
    """Number of codes of a categorical or binned column (its frequency oracle's k)."""
    oracle: Any = plan.rc.mechanism
    return int(oracle.k)


def _true_stats(raw: Path, manifest: Manifest, dists: dict[str, Distribution] | None = None) -> _Truth:
    """True frequencies and means of the raw data as the policy encodes them (missing values
    filled, values clipped to the bounds, categories coded), and for every column in ``dists``
    the bucket shares its decoded histogram estimates (``Distribution.bucket_counts`` of the
    encoded values).  One streaming pass."""
    dists = dists or {}
    lp = parse_policy(manifest.policy, "embedded in the manifest")
    src = TableSource(raw, csv_null_values=lp.policy.input.csv_null_values, csv_delimiter=lp.policy.input.csv_delimiter)
    plans = [p for p in plan_columns(lp, src.column_names, str(raw)) if p.rc.mechanism is not None]
    counts = {p.rc.name: np.zeros(_codes(p), dtype=np.int64) for p in plans if p.rc.type != "numeric"}
    sums = {p.rc.name: 0.0 for p in plans if p.rc.type == "numeric"}
    masses = {name: np.zeros(len(d.mass)) for name, d in dists.items()}
    # missing: as-answer leaves a missing value NaN: means and distributions are among rows with a value
    present = {p.rc.name: 0 for p in plans if p.rc.type != "categorical"}
    n = 0
    for batch in src.batches([m.rc.name for m in input_plans(plans)], 65536):
        for p in plans:
            name, v = p.rc.name, p.values(batch)  # a joint group: its members' columns (its product codes)
            if p.rc.type == "categorical":
                counts[name] += np.bincount(encode_categorical(v, p, n), minlength=counts[name].size)
                continue
            x = encode_numeric(v, p, n)
            has = ~np.isnan(x)
            present[name] += int(has.sum())
            if p.rc.type == "binned":
                counts[name] += np.bincount(encode_binned(v, p, n), minlength=counts[name].size)
            else:
                sums[name] += float(x[has].sum())
            if name in dists:
                masses[name] += dists[name].bucket_counts(x[has])
        n += batch.num_rows
    d = max(n, 1)
    shares = {k: c / d for k, c in counts.items()}
    shares.update({k: np.array([1.0 - present[k] / d]) for k in sums if present[k] < n})   # the share missing
    return _Truth(n, shares, {k: v / max(present[k], 1) for k, v in sums.items()},
                  {k: m / max(present[k], 1) for k, m in masses.items()})


def validate(extract: Path | str, manifest_path: Path | str | None = None, *, raw: Path | str | None = None,
             key: SecretKey | None = None, confidence: float = 0.95, quantiles: list[float] | None = None,
             ranges: list[tuple[str, float, float]] | None = None,
             public_key: Path | str | None = None,
             on_progress: Callable[[int], None] | None = None) -> ValidationReport:
    """Check a release (``ValidationReport``: ``ok``, ``checks``, and with ``raw`` and ``key``
    the calibration).  The calibration checks every statistic the columns give: frequencies,
    means, the ``quantiles`` (default CALIBRATION_QUANTILES) and, per column with a
    distribution, the ``ranges`` asked for it (COLUMN, LOW, HIGH), else its bounds cut into
    CALIBRATION_RANGE_PARTS equal ranges.  With ``public_key`` (the steward's public signing key
    file) the "signature" check verifies the manifest's signature (signing.check_signature).
    ``on_progress`` is told the extract's rows as they are decoded, batch by batch (a count each time)."""
    _check_calibration_options(raw, quantiles, ranges)
    extract = Path(extract)
    mpath = Path(manifest_path) if manifest_path else default_manifest_path(extract)
    rep = _Checks(str(extract), str(mpath))
    if not extract.exists() and not extract.is_symlink() and not mpath.exists():
        raise InputFileError(f"extract {extract} does not exist, nor its manifest {mpath}. Check the path (an extract "
                             "is the .parquet or .csv file, or the dataset folder, that privatize wrote beside its "
                             "manifest).")
    try:
        manifest = load_manifest(mpath)
    except DamagedManifest as err:  # the manifest itself is what failed: a failed check (exit 1)
        rep.add("manifest", False, str(err))
        _check_origin(rep, raw is not None)
        return rep.report()
    _check_ranges(manifest, ranges or [])
    text = mpath.read_text(encoding="utf-8")
    rep.add("signature", *check_signature(mpath, public_key))
    if not extract.exists():
        rep.add("extract present", False, f"{extract} does not exist")
        _check_origin(rep, raw is not None)
        return rep.report()
    _check_hash(extract, manifest, rep)
    _check_privacy(manifest, rep)
    _check_public(extract, manifest, rep)
    _check_cautions(manifest, rep)
    _check_secrets(manifest, text, key, rep)

    stats: dict[str, Any] | None = None
    try:
        src = TableSource(extract)
        cols_ok = src.column_names == manifest.extract.columns
        rep.add("columns", cols_ok, "the extract has exactly the columns the manifest lists" if cols_ok else
                f"extract columns {src.column_names} differ from the manifest's {manifest.extract.columns}")
        with rows_told(on_progress):
            _, stats, rows = accumulate(extract, mpath, check_alphabet=False)
    except LdptError as err:
        if "rows but manifest" in str(err):
            rep.add("row count", False, str(err))
        else:
            rep.add("extract readable", False, str(err))
        stats = None
    if stats is not None:
        rep.add("row count", True, f"{rows} rows, as the manifest says")
        bad, fits = _scan(extract, mpath, manifest)
        priv = manifest.privacy
        sampled = (f"; every row reports exactly {priv.reported_columns} of the {priv.privatized_columns} privatized "
                   "columns" if priv.strategy == "sample" else "")
        rep.add("output alphabet", not bad,
                "every value lies in its mechanism's output alphabet" + sampled if not bad else
                "values outside the output alphabet: " + ", ".join(f"{k} {v}" for k, v in bad.items()))

    if stats is not None:
        _check_quality(manifest, rows, rep)
        _check_fit(manifest, fits, rep)

    if raw is not None:
        if key is None:
            raise LdptError("--raw needs --key as well: re-deriving the extract takes the release's secret key.")
        _reproduce(Path(raw), extract, manifest, key, rep)
        if stats is not None:
            rep.calibration = _calibrate(Path(raw), manifest, stats, rows, confidence, rep, quantiles, ranges)
    _check_origin(rep, raw is not None)
    return rep.report()


PARTNER_SIDE_SCOPE = (
    "not proved by these checks: without the raw data and the key they test only that the extract and the "
    "manifest are consistent with each other (hashes, sizes, columns, mechanism specs, budget arithmetic, output "
    "alphabet, fit). Anyone can write such a pair, so a consistent forgery of the eps, the labels or the values "
    "passes them. Only the steward side (validate with --raw and --key: the extract re-derives bit for bit) or a "
    "signature verified with the steward's public key proves that the files are the steward's")


def _check_origin(rep: _Checks, steward: bool) -> None:
    """The "origin" check: what the checks made prove about where the files come from (pass only
    when the re-derivation or a verified signature, with the extract matching the manifest, proves it)."""
    status = {c.name: c.ok for c in rep.checks}
    if status.get("reproduced") is True:
        rep.add("origin", True, "proved on the steward side: the extract re-derives bit for bit from the raw data, "
                "the key and the manifest's nonce, so these are the steward's release of this raw data")
    elif status.get("signature") is True and status.get("extract hash") is True:
        rep.add("origin", True, "the manifest's signature verifies with the steward's public key and the extract "
                "matches the manifest's hashes: these are the files the steward signed (the statistical checks "
                "still test only their consistency)")
    else:
        rep.add("origin", None, PARTNER_SIDE_SCOPE + ("; here the re-derivation did not prove it" if steward else ""))


def _check_public(extract: Path, manifest: Manifest, rep: _Checks) -> None:
    """The columns released in the clear: the ones privacy.public_columns lists must be those the
    manifest's columns describe as public, those the embedded policy releases as public, and those
    of the extract that no privatized column's outputs account for."""
    listed = list(manifest.privacy.public_columns)
    views = {"the manifest's column entries": [c.name for c in manifest.columns if c.type == "public"]}
    try:
        lp = parse_policy(manifest.policy, "embedded in the manifest")
        views["the embedded policy"] = [rc.name for rc in lp.columns if rc.type == "public"
                                        and rc.name != lp.policy.subject_key]
    except LdptError:
        pass  # the privacy budget check reports an invalid embedded policy
    try:
        privatized = {o.name for c in manifest.columns if c.type != "public" for o in c.outputs}
        views["the extract's columns outside every privatized column's outputs"] = [
            n for n in TableSource(extract).column_names if n not in privatized]
    except LdptError:
        pass  # the columns check reports an unreadable extract

    def names(xs: list[str]) -> str:
        return ", ".join(map(repr, sorted(xs))) if xs else "none"

    problems = [f"privacy.public_columns lists {names(listed)}, {where}: {names(xs)}"
                for where, xs in views.items() if sorted(set(xs)) != sorted(set(listed))]
    if len(set(listed)) != len(listed):
        problems.append("privacy.public_columns lists a column twice")
    if problems:
        rep.add("public columns", False, "the columns released in the clear are not the ones the manifest announces: "
                + "; ".join(problems) + ". A column in the clear is NOT protected by local DP; the manifest was "
                "changed or is not this extract's")
    elif listed:
        rep.add("public columns", None, f"{', '.join(listed)} copied in the clear: NOT protected by local DP "
                "(they may identify people, alone or linked to other data)")


def _check_cautions(manifest: Manifest, rep: _Checks) -> None:
    """Every caution the tool writes into a manifest (manifest.CAUTIONS, as release/publish.py
    writes them) is there, word for word."""
    missing = [c for c in CAUTIONS if c not in manifest.cautions]
    extra = [c for c in manifest.cautions if c not in CAUTIONS]
    if missing:
        rep.add("cautions", False, f"{len(missing)} of the {len(CAUTIONS)} cautions the tool writes into every "
                f"manifest are missing or changed (the first: \"{missing[0][:70]}...\"): the manifest was edited; "
                "ask the data steward for the original")
    elif extra:
        rep.add("cautions", None, f"the {len(CAUTIONS)} standard cautions are there, and {len(extra)} more that the "
                "tool does not write (added after the release)")
    else:
        rep.add("cautions", True, f"the manifest carries the {len(CAUTIONS)} cautions the tool writes")


def _check_calibration_options(raw: Path | str | None, quantiles: list[float] | None,
                               ranges: list[tuple[str, float, float]] | None) -> None:
    if (quantiles or ranges) and raw is None:
        raise UsageError("quantiles and ranges choose what the calibration checks, which needs the raw data and the "
                         "key (--raw and --key); give them too, or leave --quantiles and --range out.")
    if quantiles and not all(0 < q < 1 for q in quantiles):
        raise UsageError(f"--quantiles: every value must lie strictly between 0 and 1, got {quantiles}")


def _check_hash(extract: Path, manifest: Manifest, rep: _Checks) -> None:
    """The extract's bytes (or every part of a dataset) against the manifest, and its file name."""
    res = check_extract(extract, manifest)  # integrity.py: shared with estimate
    rep.add("extract hash", res.ok, res.detail)
    if extract.name != manifest.extract.file:
        rep.add("file name", None,
                f"the manifest describes {manifest.extract.file!r}; this file is named {extract.name!r}")


def _check_ranges(manifest: Manifest, ranges: list[tuple[str, float, float]]) -> None:
    """Ranges asked for the calibration must belong to columns that give a distribution."""
    by = {c.name: c for c in manifest.columns if c.mechanism is not None}
    for col, lo, hi in ranges:
        c = by.get(col)
        if c is None or not (c.type == "binned" or mech.build(c.mechanism or {}).family == "distribution"):
            raise UsageError(f"--range: column {col!r} has no distribution in this extract (ranges need a numeric "
                             "column released with bins: or a distribution mechanism such as square-wave or "
                             "hierarchy).")
        if not lo < hi:
            raise UsageError(f"--range {col}:{lo:g}..{hi:g}: give LOW below HIGH")


def _check_quality(manifest: Manifest, rows: int, rep: _Checks) -> None:
    """Predicted SE of each statistic the policy needs at this extract's row count, against the
    policy's quality targets (see plan.py for what is predicted and how)."""
    from .plan import column_statistics
    from .policy import ResolvedColumn

    try:
        lp = parse_policy(manifest.policy, "embedded in the manifest")
    except LdptError:
        rep.add("quality", None, "not checked: the embedded policy is invalid (see the privacy budget check)")
        return
    default = lp.policy.quality
    configs = lp.by_name
    rate = (manifest.privacy.reported_columns or 0) / manifest.privacy.privatized_columns \
        if manifest.privacy.strategy == "sample" and manifest.privacy.privatized_columns else 1.0
    missed, met, lines, unchecked = [], 0, [], []
    for c in manifest.columns:
        if c.mechanism is None or c.name not in configs:
            continue
        # a joint group's entry (type "joint") is judged as the categorical column of its cells (plan.needs_of)
        rc = ResolvedColumn(c.name, c.type, configs[c.name].config,  # type: ignore[arg-type]
                            mechanism=mech.build(c.mechanism))
        for st in column_statistics(rc, rows, rate, default):
            target = st.get("target_se")
            rel = st.get("target_relative_se")
            if target is None and rel is None:
                continue
            want = " and ".join(x for x in (f"SE <= {target:.4g}" if target is not None else "",
                                             f"SE/width <= {rel:.4g}" if rel is not None else "") if x)
            se = st.get("se")
            text = f"{c.name} {st['statistic']}: predicted SE {se:.4g} (target {want})" if se is not None else \
                f"{c.name} {st['statistic']}: no prediction"
            if se is None:  # a target with no prediction is not checked, and never passed
                why = st.get("note") or st.get("se_meaning") or "no prediction"
                unchecked.append(f"{c.name} {st['statistic']}: target {want} not checked ({why})")
            elif st.get("meets_target") is False:
                needed = st.get("rows_needed")
                missed.append(text + (f", needs about {needed} rows" if needed else "") +
                              (" (no eps-LDP mechanism could meet it at this row count)"
                               if st.get("impossible_at_rows") else ""))
            else:
                met += 1
                lines.append(text)
    tail = ("; " + "; ".join(unchecked)) if unchecked else ""
    basis = ("predicted: worst case over data, for medians and the means of distribution mechanisms on skewed "
             "reference data")
    if not missed and not met and not unchecked:
        rep.add("quality", True, "the policy sets no quality targets (quality: {max_se: ...}); nothing to check")
    elif missed:
        rep.add("quality", False, f"{len(missed)} statistic(s) miss their policy target at {rows} rows: " +
                "; ".join(missed) + tail)
    elif unchecked:
        rep.add("quality", None, f"{len(unchecked)} targeted statistic(s) could not be checked at {rows} rows"
                + (f", {met} meet their targets ({basis}): " + "; ".join(lines) if met else "") + tail)
    else:
        rep.add("quality", True, f"all {met} targeted statistic(s) meet their policy targets at {rows} rows "
                f"({basis}): " + "; ".join(lines))


FIT_ALPHA = 0.001  # family-wise false-alarm rate of the fit check, over all its tests (Bonferroni)


def _check_fit(manifest: Manifest, fits: dict[str, Any], rep: _Checks) -> None:
    """Goodness of fit of the reports to the declared mechanisms (gof.py): every test of every
    column at level FIT_ALPHA / (number of tests), so that a correct release fails this check
    with probability at most FIT_ALPHA."""
    from .gof import no_fit_reason

    built = {c.name: mech.build(c.mechanism) for c in manifest.columns if c.mechanism is not None}
    tested = {n: f for n, f in fits.items() if f is not None}
    untested = [f"{n} ({no_fit_reason(built[n])})" for n, f in fits.items() if f is None]
    total = sum(f.n_tests for f in tested.values())
    if not total:
        rep.add("fit", None, "no column has a goodness-of-fit test" + (": " + "; ".join(untested) if untested else ""))
        return
    level = FIT_ALPHA / total
    failed: list[str] = []
    passed: list[str] = []
    for name, f in tested.items():
        for r in f.results(level):
            if r.get("tested") is False:
                continue
            line = f"{name}: {r['kind']} p = {r['p_value']:.3g}"
            (passed if r["passed"] else failed).append(line if r["passed"] else f"{line} ({r['detail']}; tested: "
                                                                                 f"{r['test']})")
    scope = (f"{total} test(s) over {len(tested)} column(s), each at level {level:.2g} (family-wise "
             f"{FIT_ALPHA:g}, Bonferroni)")
    tail = ("; not tested: " + "; ".join(untested)) if untested else ""
    if failed:
        rep.add("fit", False, f"the reports do not fit the mechanism the manifest declares (wrong eps, domain or "
                f"parameters?) in {len(failed)} of {scope}: " + "; ".join(failed) + tail)
    else:
        rep.add("fit", True, f"the reports are consistent with the declared mechanisms: {scope}" +
                (": " + "; ".join(passed) if passed else "") + tail)


def _scan(extract: Path, mpath: Path, manifest: Manifest) -> tuple[dict[str, int], dict[str, Any]]:
    """One pass over the extract: reports outside each column's output alphabet, and each
    column's goodness-of-fit statistics (None where the mechanism has no test)."""
    from .estimate import iter_column_arrays, open_extract
    from .gof import fit_stats_for

    _, src, _ = open_extract(extract, mpath)
    built = {c.name: mech.build(c.mechanism) for c in manifest.columns if c.mechanism is not None}
    fits = {n: fit_stats_for(m) for n, m in built.items()}
    bad: dict[str, int] = {}
    priv = manifest.privacy
    for batch, cols in iter_column_arrays(manifest, src):
        per_row = np.zeros(batch.num_rows, dtype=np.int64)
        for name, arrays in cols.items():
            k = 0
            if priv.strategy == "sample":
                # an unreported cell is empty in every output of its column; only reported ones are checked
                nulls = np.stack([np.asarray(pc.is_null(a).to_numpy(zero_copy_only=False)) for a in arrays])
                present = ~nulls.any(axis=0)
                k = int((nulls.any(axis=0) & ~nulls.all(axis=0)).sum())
                per_row += present
                arrays = [a.filter(pa.array(present)) for a in arrays]
            k += built[name].count_invalid(arrays)
            fit = fits[name]
            if fit is not None:
                fit.add(arrays)
            if k:
                bad[name] = bad.get(name, 0) + k
        if priv.strategy == "sample":
            k = int((per_row != priv.reported_columns).sum())
            if k:
                label = (f"rows that do not report exactly {priv.reported_columns} of the {priv.privatized_columns} "
                         "columns")
                bad[label] = bad.get(label, 0) + k
    return bad, fits


def _reproduce(raw: Path, extract: Path, manifest: Manifest, key: SecretKey, rep: _Checks) -> None:
    """Re-derive the extract from the raw data, the key and the manifest's nonce, into a fresh
    folder of the steward's private folder (mode 0700, removed afterwards; never beside the
    extract), with a throwaway ledger if the policy has a lifetime budget (the steward's ledger
    is neither charged again nor read: a release re-checks the same after any number of later
    releases), outside the record of release nonces (release/nonces.py).  Without a private
    folder yet, the scratch folder is a fresh 0700 one in the system's temporary folder, so the
    check creates no steward state either."""
    from .io import private_dir, private_dir_location
    from .ledger import BudgetExhaustedError
    from .release.nonces import rederiving

    policy = dict(manifest.policy)
    if "output" not in policy and manifest.privacy.row_order == "as-input":
        policy["output"] = {"row_order": "as-input"}  # a manifest from before the row shuffle: input order
    lp = parse_policy(policy, "embedded in the manifest")
    scratch = private_dir() if private_dir_location().exists() else None
    with tempfile.TemporaryDirectory(prefix="ldpt-validate-", dir=scratch) as tmp, rederiving():
        Path(tmp).chmod(0o700)
        (Path(tmp) / "out").mkdir(mode=0o700)
        out = Path(tmp) / "out" / manifest.extract.file
        ledger = Path(tmp) / "ledger.sqlite3" if lp.policy.budget.lifetime_epsilon is not None else None
        try:
            res = privatize(raw, lp, key, out, manifest_path=Path(tmp) / "out" / "m.json",
                            diagnostics_path=Path(tmp) / "d.json", nonce=manifest.nonce,
                            fragment_rows=manifest.extract.part_rows, ledger_path=ledger,
                            allow_partial=ledger is not None and manifest.privacy.placeholder_rows is not None)
        except BudgetExhaustedError:
            rep.add("reproduced", None, "not checked: re-derived with an empty ledger, the raw data's own rows take "
                    "some people past the policy's lifetime_epsilon, so this raw data cannot be the release's "
                    "input as released (or the release held people back); nothing was charged or written")
            return
        digest = res.manifest.extract.sha256
        specs_same = [c.mechanism for c in res.manifest.columns] == [c.mechanism for c in manifest.columns]
        if digest == manifest.extract.sha256 and specs_same:
            rep.add("reproduced", True, "re-deriving the extract from the raw data, the key and the manifest's nonce "
                    "gives bit-identical " + ("parts" if manifest.extract.parts else "file"))
            return
        try:
            same_values = _same_values(out, extract)
        except LdptError:
            same_values = False
        if same_values and specs_same:
            rep.add("reproduced", None, "every value re-derives identically, but the file bytes differ (written by "
                    "another library version)")
        elif manifest.privacy.placeholder_rows and specs_same:
            rep.add("reproduced", None, "not checked: the release allowed held-back people (--allow-partial), whose "
                    "rows were released as placeholder rows according to the ledger at the time, and the re-derivation "
                    "does not replay the ledger (with nobody held back it gives other values for those rows)")
        else:
            rep.add("reproduced", False, "re-deriving the extract from the raw data and key gives different values: "
                    "the extract, the raw file, the key or the manifest is not the release's")


def _same_values(a_path: Path, b_path: Path, batch_rows: int = 65536) -> bool:
    """Whether two extracts hold the same columns and values, compared batch by batch
    (streaming: memory does not grow with the extract)."""
    from itertools import zip_longest

    a, b = TableSource(a_path), TableSource(b_path)
    if a.column_names != b.column_names:
        return False
    for x, y in zip_longest(a.batches(a.column_names, batch_rows), b.batches(b.column_names, batch_rows)):
        if x is None or y is None or not x.equals(y):
            return False
    return True


CALIBRATION_QUANTILES = [0.25, 0.5, 0.75]  # quantiles checked for every column with a distribution
CALIBRATION_RANGE_PARTS = 4  # range shares checked: the bounds cut into this many equal parts


def _calibration_ranges(dist: Distribution, confidence: float,
                        asked: list[tuple[float, float]]) -> list[tuple[float, float, Any]]:
    """The ranges ``asked`` for a column, or else the bounds of its distribution cut into
    CALIBRATION_RANGE_PARTS equal ranges, each with its share and interval: (low, high,
    distribution.Interval)."""
    if not asked:
        edges = np.linspace(dist.lo, dist.hi, CALIBRATION_RANGE_PARTS + 1)
        asked = [(float(a), float(b)) for a, b in zip(edges[:-1], edges[1:])]
    return [(a, b, dist.range_ci(a, b, confidence)) for a, b in asked]


def _entry(column: str, statistic: str, value: str | None, truth: float, est: Any, z: float,
           estimand: str) -> CalibrationEntry:
    """One statistic against its truth.  score = z x (distance of the truth from the estimate) /
    (the interval's half-width on the truth's side): |estimate - truth| / SE for a normal
    interval, and the same scale for intervals that are not symmetric (quantiles, bootstrap)."""
    e, lo, hi = est.estimate, est.ci_low, est.ci_high
    truth = float(truth)
    if not all(v is not None and math.isfinite(v) for v in (e, lo, hi)):
        return CalibrationEntry(column, statistic, value, truth, e, est.se, lo, hi, None, None, estimand)
    inside = bool(lo <= truth <= hi)
    half = (hi - e) if truth >= e else (e - lo)
    score = z * abs(truth - e) / half if half > 0 else None
    return CalibrationEntry(column, statistic, value, truth, e, est.se, lo, hi, inside, score, estimand)


def _calibration_entries(est: EstimateResult, truth: _Truth, z: float, confidence: float,
                         ranges: list[tuple[str, float, float]]) -> list[CalibrationEntry]:
    out: list[CalibrationEntry] = []
    for name, col in est.columns.items():
        for f, t in zip(col.frequencies, truth.shares.get(name, ())):
            out.append(_entry(name, "frequency", f.value, t, f, z, f.estimand))
        d = col.distribution
        mean = col.mean
        if (d is not None and d.source is not None and name in truth.means
                and (mean is None or mean.ci_low is None or mean.ci_high is None)):
            # a distribution column's mean, with the interval of Distribution.mean_ci
            iv = d.source.mean_ci(confidence)
            mean = MeanResult(iv.estimate, iv.se, iv.lo, iv.hi, note=iv.method,
                              estimand=mean.estimand if mean is not None else f"mean of {name} among all rows, from "
                              "the estimated distribution")
        if mean is not None and name in truth.means:
            out.append(_entry(name, "mean", None, truth.means[name], mean, z, mean.estimand))
        if d is not None and d.source is not None and name in truth.masses:
            src = d.source
            true_dist = Distribution(src.edges, truth.masses[name], method="raw data", n=truth.rows,
                                     centers=src.centers)
            for q in d.quantiles:
                out.append(_entry(name, "quantile", repr(q.q), true_dist.quantile(q.q), q, z, q.estimand))
            for lo, hi, iv in _calibration_ranges(src, confidence, [(a, b) for c, a, b in ranges if c == name]):
                r = RangeResult(lo, hi, iv.estimate, iv.se, iv.lo, iv.hi, iv.method)
                out.append(_entry(name, "range share", f"{lo:g}..{hi:g}", true_dist.range_share(lo, hi), r, z,
                                  f"share of rows with {name} in [{lo:g}, {hi:g}) among all rows"))
    return out


def _calibrate(raw: Path, manifest: Manifest, stats: dict[str, Any], rows: int, confidence: float,
               rep: _Checks, quantiles: list[float] | None = None,
               ranges: list[tuple[str, float, float]] | None = None) -> CalibrationResult:
    """Every statistic the columns give (frequencies, means, quantiles, range shares) against
    the truth from the raw data, encoded as the release encoded it.  A correct release fails
    with probability about FAMILY_ALPHA: each score is held to the Bonferroni limit over all
    judged statistics.  Quantiles and range shares are checked against the raw column's
    histogram over the release's buckets (linear within each): what the release estimates."""
    an = Analyses(quantiles=list(quantiles or CALIBRATION_QUANTILES))
    est = report(manifest, stats, rows, confidence, an)
    dists = {n: c.distribution.source for n, c in est.columns.items()
             if c.distribution is not None and c.distribution.source is not None}
    truth = _true_stats(raw, manifest, dists)
    z = z_value(confidence)
    entries = _calibration_entries(est, truth, z, confidence, list(ranges or []))
    judged = [e for e in entries if e.score is not None]
    with_interval = [e for e in entries if e.inside is not None]
    inside = sum(bool(e.inside) for e in with_interval)
    total = len(with_interval)
    worst = max(judged, key=lambda e: e.score or 0.0) if judged else None
    worst_at = "-" if worst is None else f"{worst.column}" + (
        f"={worst.value}" if worst.statistic == "frequency" else f" {worst.statistic}" +
        (f" {worst.value}" if worst.value is not None else ""))
    max_z = 0.0 if worst is None else float(worst.score or 0.0)
    crit = NormalDist().inv_cdf(1 - FAMILY_ALPHA / (2 * max(len(judged), 1)))
    ok: bool | None = max_z <= crit
    share = inside / total if total else float("nan")
    small = rows < MIN_CALIBRATION_ROWS
    if small or not judged:
        # too few rows for the normal approximation, or no statistic with an interval: report, do not judge
        ok = None
    plural = {"frequency": "frequencies", "mean": "means", "quantile": "quantiles", "range share": "range shares"}
    tally = {k: sum(e.statistic == k for e in with_interval) for k in plural}
    covered = ", ".join(f"{v} {plural[k] if v != 1 else k}" for k, v in tally.items() if v)
    unjudged = [e for e in entries if e.inside is None]
    tail = (f"; not judged ({len(unjudged)}, no interval): " + ", ".join(
        f"{e.column} {e.statistic}" for e in unjudged[:6]) + (", ..." if len(unjudged) > 6 else "")) if unjudged else ""
    rep.add("calibration", ok, (f"only {rows} rows, too few to judge calibration (needs {MIN_CALIBRATION_ROWS}); "
                                if small else "") +
            ("no statistic of the release has an interval, so calibration is not judged; " if not judged else "") +
            f"{inside} of {total} true values ({share:.1%}) lie inside their {confidence:.0%} intervals ({covered}; "
            "quantiles and range shares against the raw column's histogram over the release's buckets); largest "
            f"|z| {max_z:.2f} ({worst_at}), limit {crit:.2f} (family-wise {FAMILY_ALPHA:g}, Bonferroni over "
            f"{len(judged)} statistics)" + tail)
    return CalibrationResult(total, inside, share, confidence, max_z, worst_at, crit, tuple(entries))
