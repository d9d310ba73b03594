"""A release report: one self-contained HTML file that people can read.

``release_report`` decodes a release (``estimate``), checks it (``validate``) and writes one HTML
file with no reference to anything outside it (no network, no scripts, no fonts: styles inline,
plots as inline PNG images made with matplotlib):

* the privacy statement in plain words: eps per row and per column; for one yes/no question, how
  far one report can move the odds about a person (by at most e^eps); the sampling and shuffle
  statements when they apply; the columns released in the clear; the manifest's cautions;
* per column what it estimates (its estimand: clipping, fills and missing values named) and the
  estimated distribution or mean, with interval bars;
* cross-tabs as heat maps of the estimated shares beside the heat map of their standard errors;
* the release's quality checks, each marked pass, warn or fail.

With the raw table and the key (``raw``, ``key``) the report is the **steward's**: it adds the
truth against every estimate (``validate``'s calibration) and is marked steward-only on every
page; it is refused beside the partner's files (the extract's and the manifest's folders) and
written with mode 0600.  Everything in the partner's report is computed from the extract and the
manifest alone: what a partner could compute themselves.
"""

from __future__ import annotations

import base64
import html
import io
import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from .errors import UsageError
from .io import write_text_atomic
from .keys import SecretKey
from .manifest import Manifest, default_manifest_path, load_manifest
from .outputs import MANIFEST, check_outputs, check_private_place

REPORT = "report file"
__all__ = ["ReportResult", "release_report"]

_MAX_BARS = 60  # categories drawn per column (all are listed in the table below the plot)


@dataclass(frozen=True)
class ReportResult:
    """What ``release_report`` wrote: the file, whether it is the steward's (with the truth), its
    figures and sections, and whether every quality check passed."""

    path: Path
    steward: bool
    figures: int
    columns: int
    crosstabs: int
    checks_ok: bool

    def to_dict(self) -> dict[str, Any]:
        return {"path": str(self.path), "steward": self.steward, "figures": self.figures, "columns": self.columns,
                "crosstabs": self.crosstabs, "checks_ok": self.checks_ok}

    def to_frame(self) -> Any:
        import pandas as pd

        return pd.DataFrame([self.to_dict()])


def release_report(extract: Path | str, out: Path | str, manifest_path: Path | str | None = None, *,
                   crosstabs: Sequence[tuple[str, str]] = (), confidence: float = 0.95,
                   raw: Path | str | None = None, key: SecretKey | None = None,
                   diagnostics: Path | str | None = None,
                   overwrite: bool = False, title: str | None = None) -> ReportResult:
    """Write the HTML report of a release to ``out`` (see the module docstring).  ``crosstabs``:
    pairs of categorical columns to show as heat maps.  ``raw`` and ``key`` (both or neither):
    the steward's report, with the truth against every estimate; ``diagnostics`` (the
    release's steward-only diagnostics file, with the steward's report only): its per-column
    counts of missing, filled, clipped and unknown values and its warnings."""
    from .estimate import estimate
    from .validate import validate

    extract, out = Path(extract), Path(out)
    mpath = Path(manifest_path) if manifest_path else default_manifest_path(extract)
    if (raw is None) != (key is None):
        raise UsageError("report: the steward's report needs both the raw table (--raw) and the key (--key); give "
                         "both for the steward's report with the truth, or neither for the partner's report.")
    steward = raw is not None
    if diagnostics is not None and not steward:
        raise UsageError("report: the release's diagnostics (--diagnostics) are steward-only: they go only in the "
                         "steward's report; give --raw and --key too, or leave --diagnostics out.")
    known: list[tuple[str, Path | None]] = [("extract", extract), (MANIFEST, mpath)]
    if raw is not None:
        known.append(("raw input", Path(raw)))
    if diagnostics is not None:
        known.append(("diagnostics file", Path(diagnostics)))
    check_outputs([(REPORT, out)], known, overwrite=overwrite)
    if out.suffix.lower() not in (".html", ".htm"):
        raise UsageError(f"report: {out} does not end in .html; name the report file NAME.html.")
    if steward:
        check_private_place("steward's report", out, [("extract", extract), (MANIFEST, mpath)], "--out")
    manifest = load_manifest(mpath)
    diag = _load_diagnostics(Path(diagnostics), manifest) if diagnostics is not None else None
    est = estimate(extract, mpath, confidence=confidence, crosstabs=list(crosstabs))
    checks = validate(extract, mpath, confidence=confidence)
    calibration = None
    if steward:
        assert raw is not None
        calibration = validate(extract, mpath, raw=raw, key=key, confidence=confidence).calibration
    page = _Page(title or f"Release report: {extract.name}", steward)
    _header(page, manifest, extract, est)
    _privacy(page, manifest)
    for name, col in est.columns.items():
        _column(page, manifest, name, col, confidence)
    for ct in est.crosstabs:
        _crosstab(page, ct, confidence)
    _checks(page, checks)
    if calibration is not None:
        _calibration(page, calibration)
    if diag is not None:
        _diagnostics(page, diag)
    text = page.render()
    write_text_atomic(out, text, 0o600 if steward else 0o644)
    return ReportResult(out, steward, page.figures, len(est.columns), len(est.crosstabs), checks.ok)


# -- the page ----------------------------------------------------------------------------------

_STYLE = """
body { font-family: sans-serif; max-width: 60em; margin: 2em auto; padding: 0 1em; color: #1b1b1b;
       line-height: 1.45; }
h1 { font-size: 1.6em; } h2 { font-size: 1.3em; border-bottom: 1px solid #ccc; margin-top: 2em; }
h3 { font-size: 1.1em; margin-top: 1.5em; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.92em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: left; vertical-align: top; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.pass { background: #e3f4e1; } .warn { background: #fff4d6; } .fail { background: #fbe0de; }
.steward { background: #7a1010; color: #fff; padding: 0.5em 1em; font-weight: bold; }
.caution { border-left: 4px solid #c77c00; padding: 0.3em 0.8em; background: #fff8ea; }
.estimand { color: #444; font-style: italic; }
img { max-width: 100%; height: auto; }
"""


class _Page:
    def __init__(self, title: str, steward: bool) -> None:
        self.title = title
        self.steward = steward
        self.parts: list[str] = []
        self.figures = 0

    def add(self, raw_html: str) -> None:
        self.parts.append(raw_html)

    def text(self, tag: str, text: str, cls: str | None = None) -> None:
        attr = f' class="{cls}"' if cls else ""
        self.parts.append(f"<{tag}{attr}>{_e(text)}</{tag}>")

    def table(self, head: Sequence[str], rows: Sequence[Sequence[Any]], classes: Sequence[str | None] | None = None
              ) -> None:
        out = ["<table><thead><tr>", *(f"<th>{_e(h)}</th>" for h in head), "</tr></thead><tbody>"]
        for i, row in enumerate(rows):
            cls = classes[i] if classes else None
            out.append(f'<tr class="{cls}">' if cls else "<tr>")
            for v in row:
                out.append(f'<td class="num">{_e(_fmt(v))}</td>' if isinstance(v, (int, float)) and
                           not isinstance(v, bool) else f"<td>{_e(_fmt(v))}</td>")
            out.append("</tr>")
        out.append("</tbody></table>")
        self.parts.append("".join(out))

    def figure(self, fig: Any, alt: str) -> None:
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=96, bbox_inches="tight", metadata={"Software": None})
        _plt().close(fig)
        data = base64.b64encode(buf.getvalue()).decode("ascii")
        self.parts.append(f'<p><img alt="{_e(alt)}" src="data:image/png;base64,{data}"></p>')
        self.figures += 1

    def render(self) -> str:
        banner = ('<p class="steward">STEWARD ONLY: this report holds the raw data\'s true values beside the '
                  "estimates. Never send it to partners; keep it with the raw data.</p>") if self.steward else ""
        return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
                f"<title>{_e(self.title)}</title><style>{_STYLE}</style></head><body>{banner}"
                f"<h1>{_e(self.title)}</h1>" + "\n".join(self.parts) + banner + "</body></html>\n")


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _fmt(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return f"{v:,}"
    if isinstance(v, float):
        return "-" if not math.isfinite(v) else f"{v:.4g}"
    return str(v)


def _plt() -> Any:
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


# -- sections ----------------------------------------------------------------------------------

def _header(page: _Page, m: Manifest, extract: Path, est: Any) -> None:
    page.table(["release", ""], [
        ("extract", f"{extract.name} ({m.extract.format})"),
        ("rows", m.rows),
        ("made", m.created_utc),
        ("tool version", m.tool_version),
        ("confidence of the intervals", f"{est.confidence:.0%}"),
        ("standard errors", est.se_method),
    ])
    page.text("p", f"Report made {datetime.now(UTC).strftime('%Y-%m-%d %H:%M UTC')} from the extract and its "
                   "manifest only" + (" and, for the steward's sections, the raw table and the key." if page.steward
                                      else "."))


def _odds(eps: float) -> tuple[str, str]:
    """(how far one report can move the odds, what a 50/50 belief can become) at ``eps``."""
    bound = math.exp(eps)
    times = f"{bound:,.0f}" if bound >= 100 else f"{bound:.3g}"
    belief = bound / (1 + bound)
    return f"x {times}", f"{belief:.0%}" if belief < 0.99 else f"{belief:.3%}" if belief < 0.99999 else "nearly 100%"


def _privacy(page: _Page, m: Manifest) -> None:
    p = m.privacy
    page.text("h2", "What this release protects, in plain words")
    page.text("p", "Every row of this extract was randomized on its own, by a published randomizer, before the "
                   "extract left the data steward (local differential privacy). The noise is deliberate: it hides "
                   "any one person's answers, and the estimates below undo its average effect, with honest "
                   "intervals.")
    row_odds, row_belief = _odds(p.epsilon_per_row_used)
    page.text("p", f"Each row is protected at eps = {p.epsilon_per_row_used:g} in all (the policy's budget is "
                   f"{p.epsilon_per_row_budget:g} per row; {p.composition}). Whatever a person's true values, each "
                   f"possible released row is at most e^eps ({row_odds.removeprefix('x ')}) times more likely under "
                   "them than under any other values.")
    if p.strategy == "sample" and p.reported_columns and p.privatized_columns:
        page.text("p", f"Each row reports only {p.reported_columns} of its {p.privatized_columns} privatized columns "
                       "(chosen at random, independently of the data); the others are left empty.")
    page.text("p", "Per column, for one yes/no question asked at the column's eps: seeing a person's report can "
                   "multiply the odds of a yes (against a no) by at most e^eps, so a partner who thought a yes as "
                   "likely as a no beforehand can afterwards believe it with at most the certainty shown. Several "
                   f"columns of one row add up: the whole row moves the odds by at most {row_odds} "
                   f"(a 50/50 belief becomes at most {row_belief}).")
    rows: list[tuple[Any, ...]] = []
    for c in m.columns:
        if c.type == "public":
            rows.append((c.name, "released in the clear", "-", "NOT protected", "NOT protected"))
            continue
        mech = c.mechanism or {}
        eps = float(mech.get("epsilon", float("nan")))
        odds, belief = _odds(eps) if math.isfinite(eps) else ("-", "-")
        rows.append((c.name, mech.get("mechanism", "-"), eps, odds, belief))
    page.table(["column", "randomizer", "eps", "one report moves the odds at most", "a 50/50 belief becomes at most"],
               rows)
    central = p.central or {}
    if central.get("applies") and central.get("epsilon") is not None:
        page.text("p", f"The rows are also shuffled in a keyed order independent of the data, so the extract as a "
                       f"whole is ({central['epsilon']:.3g}, {central.get('delta', 0):.2g})-differentially private "
                       f"in the central sense for {central.get('rows', m.rows):,} rows "
                       f"({central.get('source', '')}).")
    elif p.row_order == "shuffled":
        why = f" A stronger statement for the extract as a whole (shuffling) {central['reason']}" \
            if central.get("reason") else ""
        page.text("p", "The rows are listed in a keyed order independent of the data (shuffled)." + why)
    else:
        page.text("p", "The rows keep the input's order: that order is itself released.", "caution")
    if p.public_columns:
        page.text("p", "Columns released in the clear are not protected by local differential privacy: "
                       + ", ".join(p.public_columns) + ". They can help single people out when combined with "
                       "other data (linkage).", "caution")
    page.text("h3", "Cautions")
    cautions = list(m.cautions) + [
        "eps is a policy choice, not a guarantee of safety: what is acceptable is for the organisation's privacy "
        "officer, under local law, after qualified review.",
        "Estimates for small groups or rare values are noisy: read the intervals, not only the estimates.",
    ]
    page.add("<ul>" + "".join(f"<li>{_e(c)}</li>" for c in cautions) + "</ul>")


def _column(page: _Page, m: Manifest, name: str, col: Any, confidence: float) -> None:
    plt = _plt()
    page.text("h2", f"Column {name}")
    page.text("p", f"{col.type}, randomized by {col.mechanism or '-'} at eps {_fmt(col.epsilon)}"
                   + (f"; {col.rows_reported:,} rows report it" if col.rows_reported is not None else ""))
    if col.estimand:
        page.text("p", f"Estimates: {col.estimand}", "estimand")
    freqs = list(col.frequencies)
    if freqs:
        shown = freqs[:_MAX_BARS]
        fig, ax = plt.subplots(figsize=(7, 0.32 * len(shown) + 1.0))
        ys = list(range(len(shown)))[::-1]
        est = [f.estimate or 0.0 for f in shown]
        lo = [max(0.0, (f.estimate or 0) - (f.ci_low if f.ci_low is not None else (f.estimate or 0))) for f in shown]
        hi = [max(0.0, (f.ci_high if f.ci_high is not None else (f.estimate or 0)) - (f.estimate or 0)) for f in shown]
        ax.barh(ys, est, xerr=[lo, hi], color="#4c78a8", ecolor="#222", capsize=2)
        ax.set_yticks(ys, [str(f.value) for f in shown])
        ax.axvline(0, color="#888", lw=0.8)
        ax.set_xlabel(f"estimated share of rows, with {confidence:.0%} intervals")
        page.figure(fig, f"estimated shares of {name} with intervals")
        if len(freqs) > _MAX_BARS:
            page.text("p", f"The plot shows the first {_MAX_BARS} of {len(freqs)} values; the table lists all.")
        page.table(["value", "estimated share", "SE", "interval low", "interval high", "share (consistent)"],
                   [(f.value, f.estimate, f.se, f.ci_low, f.ci_high, f.consistent) for f in freqs])
    if col.mean is not None:
        mn = col.mean
        page.table(["statistic", "estimate", "SE", "interval low", "interval high", "note"],
                   [("mean", mn.estimate, mn.se, mn.ci_low, mn.ci_high, mn.note or "")])
    dist = col.distribution
    if dist is not None and dist.mass:
        fig, ax = plt.subplots(figsize=(7, 2.6))
        edges = list(dist.edges)
        widths = [b - a for a, b in zip(edges[:-1], edges[1:])]
        ax.bar(edges[:-1], list(dist.mass), width=widths, align="edge", color="#72b7b2", edgecolor="#333", lw=0.4)
        ax.set_xlabel(f"{name}" + (f" (bounds {col.bounds[0]:g} to {col.bounds[1]:g})" if col.bounds else ""))
        ax.set_ylabel("estimated share")
        page.figure(fig, f"estimated distribution of {name}")
        if dist.quantiles:
            page.table(["quantile", "estimate", "SE", "interval low", "interval high"],
                       [(f"{q.q:g}", q.estimate, q.se, q.ci_low, q.ci_high) for q in dist.quantiles])


def _crosstab(page: _Page, ct: Any, confidence: float) -> None:
    import numpy as np

    plt = _plt()
    rows = list(dict.fromkeys(c.row for c in ct.cells))
    cols = list(dict.fromkeys(c.column for c in ct.cells))
    est = np.full((len(rows), len(cols)), np.nan)
    se = np.full((len(rows), len(cols)), np.nan)
    for c in ct.cells:
        i, j = rows.index(c.row), cols.index(c.column)
        est[i, j] = c.joint.estimate if c.joint.estimate is not None else np.nan
        se[i, j] = c.joint.se if c.joint.se is not None else np.nan
    page.text("h2", f"Cross-tab {ct.rows} by {ct.columns}")
    page.text("p", f"Estimated share of all {ct.rows_used:,} rows in each cell (left) and its standard error "
                   f"(right); a cell's {confidence:.0%} interval is about the estimate plus or minus "
                   f"{_z(confidence):.2f} standard errors.")
    fig, axes = plt.subplots(1, 2, figsize=(max(7.0, 1.2 * len(cols) * 2 + 2), 0.5 * len(rows) + 1.6))
    for ax, data, label, cmap in ((axes[0], est, "estimated share", "viridis"), (axes[1], se, "standard error",
                                                                                "magma")):
        im = ax.imshow(data, cmap=cmap, aspect="auto")
        ax.set_xticks(range(len(cols)), cols, rotation=45, ha="right")
        ax.set_yticks(range(len(rows)), rows)
        ax.set_title(label)
        fig.colorbar(im, ax=ax, shrink=0.8)
        if len(rows) * len(cols) <= 100:
            finite = data[np.isfinite(data)]
            lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
            for i in range(len(rows)):
                for j in range(len(cols)):
                    if np.isfinite(data[i, j]):
                        light = (data[i, j] - lo) / (hi - lo or 1.0) > 0.6  # the colour maps end light
                        ax.text(j, i, f"{data[i, j]:.3f}", ha="center", va="center", fontsize=7,
                                color="k" if light else "w")
    page.figure(fig, f"heat maps of the cross-tab of {ct.rows} by {ct.columns}")
    page.table([ct.rows, ct.columns, "estimated share", "SE", "interval low", "interval high"],
               [(c.row, c.column, c.joint.estimate, c.joint.se, c.joint.ci_low, c.joint.ci_high) for c in ct.cells])


def _z(confidence: float) -> float:
    from statistics import NormalDist

    return NormalDist().inv_cdf(0.5 + confidence / 2)


def _checks(page: _Page, rep: Any) -> None:
    page.text("h2", "Quality checks")
    page.text("p", "The release's integrity and fitness checks (ldpt validate): pass, warn (worth a look) or fail.")
    page.table(["check", "status", "detail"], [(c.name, c.status, c.detail) for c in rep.checks],
               [c.status for c in rep.checks])


def _calibration(page: _Page, cal: Any) -> None:
    plt = _plt()
    page.text("h2", "Steward only: the truth against the estimates")
    page.text("p", f"{cal.inside} of {cal.statistics} statistics ({cal.share_inside:.1%}) have the true value inside "
                   f"their {cal.confidence:.0%} interval; the largest standardized error is {cal.max_abs_z:.2f} "
                   f"({cal.max_abs_z_at}; limit {cal.z_limit:.2f}).")
    entries = [e for e in cal.entries if e.estimate is not None]
    if entries:
        fig, ax = plt.subplots(figsize=(5, 5))
        truth = [e.truth for e in entries]
        est = [e.estimate for e in entries]
        err = [1.96 * (e.se or 0.0) for e in entries]
        ax.errorbar(truth, est, yerr=err, fmt="o", ms=3, color="#4c78a8", ecolor="#999", lw=0.8)
        lo, hi = min(truth + est), max(truth + est)
        ax.plot([lo, hi], [lo, hi], color="#c00", lw=0.8)
        ax.set_xlabel("true value (raw table)")
        ax.set_ylabel("estimate from the extract")
        page.figure(fig, "true values against estimates")
    page.table(["column", "statistic", "value", "truth", "estimate", "interval low", "interval high", "inside"],
               [(e.column, e.statistic, e.value or "", e.truth, e.estimate, e.ci_low, e.ci_high, e.inside)
                for e in cal.entries],
               ["pass" if e.inside else "fail" if e.inside is False else None for e in cal.entries])


def _load_diagnostics(path: Path, manifest: Manifest) -> dict[str, Any]:
    """The release's diagnostics file, checked to be this release's (its nonce)."""
    import json

    from .errors import InputFileError

    try:
        d = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as err:
        why = "it does not exist" if isinstance(err, FileNotFoundError) else "it cannot be read as JSON"
        raise InputFileError(f"report: diagnostics file {path}: {why}. Give the .PRIVATE-diagnostics.json file "
                             "privatize wrote for this release (privatize prints its path).") from None
    if not isinstance(d, dict) or not isinstance(d.get("columns"), dict) or d.get("nonce") != manifest.nonce:
        raise InputFileError(f"report: diagnostics file {path} is not the diagnostics of this release (its nonce is "
                             "not the manifest's). Give the diagnostics file privatize wrote for this extract.")
    return d


def _diagnostics(page: _Page, d: dict[str, Any]) -> None:
    page.text("h2", "Steward only: what the release did to the data")
    page.text("p", "Counts from the release's steward-only diagnostics: the values the policy changed before "
                   "randomizing (missing values filled or kept as their own category, values clipped to the "
                   "bounds, unknown categories counted as <other>).")
    cols = [(name, c) for name, c in d["columns"].items() if isinstance(c, dict)]
    keys = sorted({k for _, c in cols for k, v in c.items() if isinstance(v, (int, float)) and not isinstance(v, bool)})
    page.table(["column", *[k.replace("_", " ") for k in keys]], [(name, *[c.get(k, "-") for k in keys])
                                                                  for name, c in cols])
    warnings = [str(w) for w in d.get("warnings", []) or []]
    if warnings:
        page.add("<ul>" + "".join(f'<li class="warn">{_e(w)}</li>' for w in warnings) + "</ul>")

