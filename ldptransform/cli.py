"""The `ldpt` command line.  Thin: every command calls the Python API and prints.

Exit codes: 0 success; 1 a validation ran and failed; 2 an error you can fix (bad policy,
data, key, paths or options; the message says what and how); 3 an internal error (a bug:
please report it with the traceback, which never shows local variables).
"""

from __future__ import annotations

import contextlib
import errno
import json
import math
import signal
import sys
import traceback
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any

import typer
from rich.console import Console
from rich.markup import escape as _markup_escape
from rich.segment import Segment
from rich.table import Table
from typer.core import TyperGroup

from . import __version__
from .errors import LdptError, one_paragraph, terminal_safe

if TYPE_CHECKING:  # pragma: no cover
    from .results import ColumnResult, CrossTabResult, EstimateResult, GroupedMeanResult, MeanResult

INTERRUPTED = "interrupted: stopped before finishing; nothing was left at the destination."


def escape(text: str) -> str:
    """Text from data or files as a rich markup literal that cannot act on the terminal:
    control characters made visible (errors.terminal_safe), markup brackets escaped."""
    return _markup_escape(terminal_safe(text))


class SafeConsole(Console):
    """A rich console that never lets what it shows act on the terminal: the text of every
    segment it writes (table cells, titles, messages, also a recorded export) has control
    characters made visible (errors.terminal_safe; newlines and tabs kept), while its own
    styles and cursor control stay as rich makes them.  Callers still escape data-derived
    text first (``escape``), so that tables are laid out with the visible form."""

    def print(self, *objects: Any, **kwargs: Any) -> None:  # text first (rich drops a few controls itself)
        super().print(*(terminal_safe(o, keep_layout=True) if isinstance(o, str) else o for o in objects), **kwargs)

    def _render_buffer(self, buffer: Iterable[Segment]) -> str:
        return super()._render_buffer(seg if seg.control else Segment(terminal_safe(seg.text, keep_layout=True),
                                                                          seg.style, seg.control) for seg in buffer)

    def export_text(self, *, clear: bool = True, styles: bool = False) -> str:
        return terminal_safe(super().export_text(clear=clear, styles=styles), keep_layout=True)


_interrupt_told: list[bool] = [False]  # whether this run has printed its interrupted message


def _tell_interrupted(text: str = "interrupted: stopped before finishing.") -> None:
    _interrupt_told[0] = True
    err_console.print(text, markup=False)


def _raise_interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt(f"stopped by signal {signum}")


@contextmanager
def _sigterm_interrupts() -> Iterator[None]:
    """While a command runs, SIGTERM ends it as Ctrl-C does (KeyboardInterrupt: cleanup, the
    one-line interrupted message, exit 130) instead of killing the process silently.  Staged
    outputs (io.StagedFiles) install their own handler meanwhile and restore this one."""
    old: Any = None
    with contextlib.suppress(ValueError, OSError):  # not in the main thread: leave signals alone
        old = signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        yield
    finally:
        if old is not None:
            with contextlib.suppress(ValueError, OSError):
                signal.signal(signal.SIGTERM, old)


# click's base error (typer's own copy of click): every usage error (unknown option, missing
# argument, bad value) derives from it
_ClickException: type[Exception] = next(c for c in typer.BadParameter.__mro__ if c.__name__ == "ClickException")


def _usage_error(err: Any) -> None:
    """click's own errors (unknown option, missing argument, bad value) as one paragraph."""
    ctx = getattr(err, "ctx", None)
    where = ctx.command_path if ctx is not None else "ldpt"
    text = one_paragraph(err.format_message().replace("Value error, ", ""))
    if not text.endswith("."):
        text += "."
    err_console.print(f"Error: {text} Run `{terminal_safe(where)} --help` to see how to use it.", markup=False)


class _Commands(TyperGroup):
    """The root command: click's usage errors as one paragraph on stderr (exit 2), SIGTERM as
    an interrupt, and an interrupt anywhere in a command as the one-line message (exit 130)."""

    def main(self, args: Any = None, prog_name: str | None = None, complete_var: str | None = None,
             standalone_mode: bool = True, windows_expand_args: bool = True, **extra: Any) -> Any:
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode, windows_expand_args, **extra)
        _interrupt_told[0] = False
        with _sigterm_interrupts():
            try:
                rv = super().main(args, prog_name, complete_var, False, windows_expand_args, **extra)
            except _ClickException as err:
                if type(err).__name__ != "NoArgsIsHelpError":  # that one: the help is already shown
                    _usage_error(err)
                sys.exit(2)
            except (typer.Abort, KeyboardInterrupt):
                _tell_interrupted()
                sys.exit(130)
        if rv == 130 and not _interrupt_told[0]:  # typer's own: an interrupt while it read the options
            _tell_interrupted()
        sys.exit(rv if isinstance(rv, int) else 0)

    def invoke(self, ctx: Any) -> Any:
        try:
            return super().invoke(ctx)
        except KeyboardInterrupt:  # outside a command's _user_errors block (those say more)
            _tell_interrupted()
            raise typer.Exit(code=130) from None


app = typer.Typer(cls=_Commands, no_args_is_help=True, add_completion=False, pretty_exceptions_enable=False,
                  help="Release row-level extracts under local differential privacy, and decode them.")
key_app = typer.Typer(no_args_is_help=True, help="Secret key files.")
policy_app = typer.Typer(no_args_is_help=True, help="Policy files.")
app.add_typer(key_app, name="key")
app.add_typer(policy_app, name="policy")

out_console: Console = SafeConsole(highlight=False, soft_wrap=True)
err_console: Console = SafeConsole(stderr=True, highlight=False, soft_wrap=True)


class TableJson(StrEnum):
    table = "table"
    json = "json"


class TableJsonCsv(StrEnum):
    table = "table"
    json = "json"
    csv = "csv"


# the library names its options as Python parameters; these commands name them by their flags
_PRIVATIZE_FLAGS = {"batch_rows": "--batch-rows", "fragment_rows": "--part-rows", "engine": "--engine",
                    "scheduler": "--scheduler", "nonce": "--nonce", "out": "--out", "ledger_path": "--ledger",
                    "allow_partial": "--allow-partial"}


# an operating-system error in plain words, and what to do about it
_ERRNO_WORDS: dict[int, tuple[str, str]] = {
    errno.ENOSPC: ("the disk is full", "free some space or write to another disk"),
    errno.EDQUOT: ("the disk quota is used up", "free some space or write to another disk"),
    errno.EACCES: ("permission denied", "check that you may read or write it"),
    errno.EPERM: ("the operation is not permitted", "check that you may read or write it"),
    errno.EROFS: ("the file system is read-only", "write to another folder"),
    errno.ENOENT: ("no such file or folder", "check the path"),
    errno.EISDIR: ("it is a folder", "give a file path"),
    errno.ENOTDIR: ("a part of the path is not a folder", "check the path"),
    errno.EEXIST: ("it already exists", "choose another path"),
    errno.ENOTEMPTY: ("the folder is not empty", "choose another path"),
    errno.EMFILE: ("too many open files", "raise the limit of open files (ulimit -n) or close other programs"),
    errno.ENFILE: ("too many open files on this machine", "close other programs and try again"),
    errno.ENAMETOOLONG: ("the file name is too long", "choose a shorter path"),
    errno.ELOOP: ("too many symbolic links in the path", "check the path"),
    errno.EXDEV: ("it cannot be moved to another file system", "write on the same disk"),
    errno.EFBIG: ("the file is too large for this file system", "write to another disk"),
    errno.EIO: ("the device failed to read or write", "check the disk, then try again"),
    errno.EBUSY: ("the file or device is busy", "try again later"),
    errno.ETXTBSY: ("the file is busy", "try again later"),
    errno.ENXIO: ("no such device", "check the path"),
    errno.ENODEV: ("no such device", "check the path"),
    errno.ENOMEM: ("out of memory", "use a smaller --batch-rows or free memory"),
    errno.EPIPE: ("the output was closed before everything was written (the program reading it stopped)",
                  "let it read to the end, or write to a file (--out where the command has it)"),
}
_ERRNO_OF_TYPE: tuple[tuple[type[OSError], int], ...] = (
    (FileNotFoundError, errno.ENOENT), (IsADirectoryError, errno.EISDIR), (NotADirectoryError, errno.ENOTDIR),
    (PermissionError, errno.EACCES), (FileExistsError, errno.EEXIST))


def os_error_message(err: OSError) -> str:
    """An OSError as one paragraph: what happened in plain words (never raw errno text such as
    "[Errno 28]"), the path(s) it concerns, and what to do."""
    import re

    code = err.errno if isinstance(err.errno, int) else next(
        (c for t, c in _ERRNO_OF_TYPE if isinstance(err, t)), None)
    # a hidden partial file (io.partial_path) is named by the destination it was written for
    paths = [re.sub(r"(^|/)\.([^/]+)\.ldpt-partial-[^/]*$", r"\1\2", str(p))
             for p in (err.filename, getattr(err, "filename2", None)) if p not in (None, "")]
    if not paths and err.errno is None and len(err.args) == 1 and isinstance(err, FileNotFoundError):
        paths = [str(err.args[0])]  # some libraries give only the path
    where = (" on " + " and ".join(paths)) if paths else ""
    if code in _ERRNO_WORDS:
        what, fix = _ERRNO_WORDS[code]
        return one_paragraph(f"{what}{where}: {fix}.")
    detail = err.strerror if err.strerror else (str(err.args[0]) if err.args and not paths else "")
    detail = re.sub(r"\[errno \d+\]\s*", "", str(detail), flags=re.IGNORECASE).strip().rstrip(".")
    text = f"{detail}{where}" if detail else f"the system refused a file operation{where}"
    return one_paragraph(f"{text}. Check the path, free disk space and permissions.")


@contextmanager
def _user_errors(flags: dict[str, str] | None = None) -> Iterator[None]:
    try:
        yield
    except LdptError as err:
        # options by their flags, never as a Python call (the demo also passes --nonce on to the release)
        named = err.message_for(flags if flags is not None else _PRIVATIZE_FLAGS)
        err_console.print(f"[bold red]Error:[/] {_markup_escape(one_paragraph(named))}",
                          markup=True, highlight=False)
        raise typer.Exit(code=err.exit_code) from None
    except OSError as err:
        err_console.print(f"[bold red]Error:[/] {_markup_escape(os_error_message(err))}", markup=True)
        raise typer.Exit(code=2) from None
    except KeyboardInterrupt:
        _tell_interrupted(INTERRUPTED)
        raise typer.Exit(code=130) from None


def _version(value: bool) -> None:
    if value:
        typer.echo(f"ldptransform {__version__}")
        raise typer.Exit()


@app.callback()
def _root(version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                       help="Print the version and exit.")) -> None:
    """ldpt: privatize a table column by column under a policy, estimate from the extract, validate a release.

    Local differential privacy protects only the privatized columns; eps is a policy choice.
    Follow local law and your organisation's privacy officer; have releases reviewed.
    """


# -- key ----------------------------------------------------------------------------------

@key_app.command("new")
def key_new(path: Path = typer.Argument(..., help="Where to write the key file (must not exist).")) -> None:
    """Write a new 32-byte secret key (mode 0600). Example: ldpt key new ~/private/release.key"""
    from .keys import new_key_file

    with _user_errors():
        key = new_key_file(path)
    err_console.print(f"wrote a new secret key to {path} (fingerprint {key.fingerprint()}). Keep it private and "
                      "backed up: reproducing or auditing a release needs it.", markup=False)


@key_app.command("new-signing")
def key_new_signing(path: Path = typer.Argument(..., help="Where to write the private signing key (must not exist); "
                                                "its public key goes to PATH.pub.")) -> None:
    """Write a new Ed25519 signing key pair: PATH (private, mode 0600) and PATH.pub (for partners).

    Example: ldpt key new-signing ~/private/steward-signing.key (see docs/signing.md)
    """
    from .signing import new_signing_key_file, public_key_path

    with _user_errors():
        key = new_signing_key_file(path)
    err_console.print(f"wrote a new private signing key to {path} and its public key to {public_key_path(path)} "
                      f"(fingerprint {key.fingerprint()}). Keep the private key with the steward, backed up; give "
                      "partners the .pub once, over a channel you trust, and confirm the fingerprint with them.",
                      markup=False)


# -- privatize ------------------------------------------------------------------------------

class Engine(StrEnum):
    local = "local"
    dask = "dask"


def _csv_extract_caution(manifest: Any) -> str:
    """A CSV extract that a spreadsheet could act on: labels from the policy that read as formulas,
    and public columns, whose values are written as they are (their cells may hold such text)."""
    if manifest.extract.format != "csv":
        return ""
    from .results import formula_like

    odd = [f"{c.name} ({lab!r})" for c in manifest.columns for lab in (c.labels or []) if formula_like(lab)]
    public = list(manifest.privacy.public_columns)
    if not odd and not public:
        return ""
    what = []
    if odd:
        what.append("labels that start like a formula: " + ", ".join(odd[:5]) + (" ..." if len(odd) > 5 else ""))
    if public:
        what.append("public column(s) written as they are, so any of their cells may: " + ", ".join(public))
    return ("; CAUTION: the CSV extract holds " + "; and ".join(what) + ". A spreadsheet runs a cell that starts "
            "with =, +, - or @ as a formula: tell partners to import it as text, or release the extract as Parquet")


@app.command()
def privatize(
    input: str = typer.Argument(..., help="Raw table: a .csv or .parquet file, or a Parquet dataset (a folder, "
                                "or an object-store URI such as s3://bucket/prefix)."),
    policy: Path = typer.Option(..., "--policy", help="Policy file (YAML or JSON)."),
    key: Path = typer.Option(..., "--key", help="Secret key file made by `ldpt key new`."),
    out: Path = typer.Option(..., "--out", help="Extract to write: a .csv or .parquet file, or a folder path "
                             "(no extension) for a Parquet dataset of parts."),
    manifest: Path | None = typer.Option(None, "--manifest",
                                         help="Manifest path [default: OUT with .manifest.json]."),
    diagnostics: Path | None = typer.Option(
        None, "--diagnostics", help="Steward-only diagnostics file [default: in the private folder, "
        "$LDPT_PRIVATE_DIR or ~/.local/state/ldptransform]."),
    batch_rows: int = typer.Option(65536, "--batch-rows", min=1, help="Rows per batch (memory; never the output)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing extract and manifest."),
    nonce: str | None = typer.Option(None, "--nonce", help="Reuse a release nonce (from a manifest) to "
                                     "reproduce that release bit for bit."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar; only the summary line."),
    ledger: Path | None = typer.Option(
        None, "--ledger", help="Privacy ledger to charge this release to (needs the policy's subject_key) "
        "[default: none, unless the policy sets budget.lifetime_epsilon: then ledger.sqlite3 in the private "
        "folder, $LDPT_PRIVATE_DIR]."),
    allow_partial: bool = typer.Option(
        False, "--allow-partial", help="With budget.lifetime_epsilon: release only the subjects still within "
        "it (the others' rows are left out) instead of refusing the whole release."),
    engine: Engine = typer.Option(Engine.local, "--engine", help="local: this process; dask: parts written "
                                  "in parallel by dask workers (needs OUT to be a folder; pip install "
                                  "'ldptransform[dask]'). Both write the same bytes."),
    scheduler: str | None = typer.Option(None, "--scheduler", help="With --engine dask: address of a running "
                                         "dask scheduler (tls://HOST:PORT, or tcp:// on this machine) "
                                         "[default: a local cluster, one worker per core, at most 8]."),
    part_rows: int = typer.Option(1 << 20, "--part-rows", min=1, help="Dataset output: the most rows per "
                                  "part (Parquet input: whole row groups; never changes the rows' values)."),
    signing_key: Path | None = typer.Option(None, "--signing-key", help="Private signing key (`ldpt key "
                                            "new-signing`): sign the manifest, MANIFEST.sig (docs/signing.md)."),
) -> None:
    """Randomize INPUT column by column under POLICY into OUT, plus a public manifest.

    Example: ldpt privatize survey.csv --policy policy.yaml --key release.key --out extract.parquet
    """
    from .keys import load_key
    from .policy import load_policy
    from .release import privatize as run

    source: str | Path = input if "://" in input else Path(input)
    with _user_errors(_PRIVATIZE_FLAGS):
        lp = load_policy(policy)
        k = load_key(key)
        from .signing import after_release, prepare_release_signing

        sk = None if signing_key is None else prepare_release_signing(  # before anything is written
            signing_key, out, manifest, overwrite=overwrite,
            known=[("input", source if isinstance(source, Path) else None), ("policy file", policy), ("key file", key)])
        show = (not quiet) and sys.stderr.isatty()
        if show:
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

            from .io import TableSource

            total = TableSource(source, csv_null_values=lp.policy.input.csv_null_values,
                                csv_delimiter=lp.policy.input.csv_delimiter).num_rows
            with Progress(TextColumn("privatizing"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                          console=err_console, transient=True) as prog:
                task = prog.add_task("rows", total=total)
                res = run(source, lp, k, out, manifest_path=manifest, diagnostics_path=diagnostics,
                          batch_rows=batch_rows, overwrite=overwrite, nonce=nonce,
                          on_progress=lambda n: prog.advance(task, n), ledger_path=ledger,
                          allow_partial=allow_partial, engine=engine.value, scheduler=scheduler,
                          fragment_rows=part_rows)
        else:
            res = run(source, lp, k, out, manifest_path=manifest, diagnostics_path=diagnostics,
                      batch_rows=batch_rows, overwrite=overwrite, nonce=nonce, ledger_path=ledger,
                      allow_partial=allow_partial, engine=engine.value, scheduler=scheduler,
                      fragment_rows=part_rows)
        signed = after_release(res.manifest_path, sk, overwrite=overwrite)
    public = res.manifest.privacy.public_columns
    caution = (f"; CAUTION: {len(public)} column(s) released in the clear, not protected: {', '.join(public)}"
               if public else "")
    if res.manifest.privacy.row_order == "as-input":
        caution += ("; CAUTION: the rows keep the input's order (policy output.row_order: as-input): if the input "
                    "is sorted or grouped by anything, a row's neighbours tell about it")
    caution += _csv_extract_caution(res.manifest)
    # steward-only counts of the values changed before randomizing (the diagnostics file has them too)
    changed = "; values changed before randomizing (steward-only): " + "; ".join(res.column_counts) \
        if res.column_counts else ""
    err_console.print(f"privatized {res.manifest.rows} rows into {res.extract_path} (manifest {res.manifest_path}; "
                      f"steward-only diagnostics {res.diagnostics_path}) in {res.seconds:.1f} s, "
                      f"eps {res.manifest.privacy.epsilon_per_row_used:g} per row{caution}{changed}", markup=False)
    if signed:  # the manifest's signature, or a stale one left beside it (signing.after_release)
        err_console.print(signed, markup=False)
    for w in res.warnings:  # above 1% of a column's rows changed before randomizing: what to do
        err_console.print(f"WARNING: {w}", markup=False)
    if res.ledger_release_id is not None:
        held = (f"; held back (steward-only, do not publish): {res.held_back_subjects} subject(s) past the lifetime "
                f"budget, {res.held_back_rows} row(s), released as placeholder rows (reports of random values, none "
                "of their data)" if res.held_back_subjects else "")
        err_console.print(f"recorded as release {res.ledger_release_id} in ledger {res.ledger_path}{held}",
                          markup=False)


# -- estimate -------------------------------------------------------------------------------

def _num(v: float | None, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def _print(*args: object) -> None:
    out_console.print(*args)


def _column_tables(name: str, col: ColumnResult) -> None:
    title = escape(f"{name}: {col.type}, {col.mechanism}, eps {col.epsilon:g}" +
                   (f", {col.rows_reported} rows reported" if col.rows_reported is not None else ""))
    if col.family == "frequency" or col.frequencies:   # a numeric column's frequencies: its share missing
        t = Table(title=title, title_justify="left")
        for h in ("value", "share", "unbiased", "se", "ci_low", "ci_high"):
            t.add_column(h, justify="left" if h == "value" else "right")
        for f in col.frequencies:
            t.add_row(escape(f.value), *(_num(v, ".4f") for v in (f.consistent, f.estimate, f.se, f.ci_low,
                                                                  f.ci_high)))
        _print(t)
    if col.mean is not None:
        t = Table(title=title, title_justify="left")
        for h in ("statistic", "estimate", "se", "ci_low", "ci_high"):
            t.add_column(h, justify="left" if h == "statistic" else "right")
        m = col.mean
        t.add_row("mean", _num(m.estimate, ".6g"), _num(m.se, ".4g"), _num(m.ci_low, ".6g"), _num(m.ci_high, ".6g"))
        _print(t)
    if col.distribution is not None:
        d = col.distribution
        t = Table(title=escape(f"{name}: quantiles and ranges ({d.method})"), title_justify="left")
        for h in ("statistic", "estimate", "ci_low", "ci_high"):
            t.add_column(h, justify="left" if h == "statistic" else "right")
        for q in d.quantiles:
            t.add_row(f"quantile {q.q:g}", _num(q.estimate, ".6g"), _num(q.ci_low, ".6g"), _num(q.ci_high, ".6g"))
        for r in d.ranges:
            t.add_row(escape(f"share in [{r.low:g}, {r.high:g})"), _num(r.estimate, ".4f"), _num(r.ci_low, ".4f"),
                      _num(r.ci_high, ".4f"))
        _print(t)
    if col.estimand:  # once per column: what its values are, as the release encoded them
        _print(escape(f"{name} estimand: {col.estimand}"))


def _span(m: MeanResult) -> str:
    return "-" if m.estimate is None else f"{m.ci_low:.3f}..{m.ci_high:.3f}"


def _crosstab_table(x: CrossTabResult) -> None:
    t = Table(title=escape(f"cross-tab {x.rows} x {x.columns} ({x.rows_used} rows): joint share "
                           f"(consistent {x.consistent_method}), unbiased with CI, and share of "
                           f"{x.columns} within {x.rows} (from the consistent joint shares, with the CI of the "
                           "unbiased one)"), title_justify="left")
    for h in (x.rows, x.columns, "joint", "unbiased", "interval", "within row", "interval "):
        t.add_column(escape(h), justify="left" if h in (x.rows, x.columns) else "right")
    for c in x.cells:
        t.add_row(escape(c.row), escape(c.column), _num(c.consistent, ".3f"), _num(c.joint.estimate, ".3f"),
                  _span(c.joint), _num(c.within_consistent, ".3f"), _span(c.within))
    _print(t)


def _grouped_mean_table(g: GroupedMeanResult) -> None:
    t = Table(title=escape(f"mean of {g.column} by {g.by} ({g.rows_used} rows; delta-method SE; consistent: the "
                           f"mean clipped into the bounds of {g.column})"), title_justify="left")
    for h in (g.by, "mean", "se", "ci_low", "ci_high", "consistent", "group share"):
        t.add_column(escape(h), justify="left" if h == g.by else "right")
    for row in g.groups:
        m = row.mean
        t.add_row(escape(row.group), _num(m.estimate, ".6g"), _num(m.se, ".4g"), _num(m.ci_low, ".6g"),
                  _num(m.ci_high, ".6g"), _num(row.consistent, ".6g"), _num(row.share, ".4f"))
    _print(t)


def _estimate_table(result: EstimateResult) -> None:
    """Render an ``EstimateResult`` as tables (the default output of ``ldpt estimate``)."""
    cm = next((c.consistent_method for c in result.columns.values() if c.consistent_method), "norm-sub").split(" ")[0]
    _print(escape(f"{result.rows} rows" + (f" from {len(result.extracts)} merged extracts"
                                           if len(result.extracts) > 1 else "") +
                  f"; {result.confidence:.0%} intervals (normal approximation)."))
    _print(escape(f"Frequencies: 'share' is the consistent estimate ({cm}: post-processed to a valid "
                  "distribution, slightly biased); 'unbiased' is the raw unbiased estimate, which may fall "
                  "outside [0, 1], with its SE and interval."))
    for name, col in result.columns.items():
        _column_tables(name, col)
    for x in result.crosstabs:
        _crosstab_table(x)
    for g in result.grouped_means:
        _grouped_mean_table(g)
    if result.public_columns:
        out_console.print(f"not estimated (public, released in the clear): {', '.join(result.public_columns)}",
                          markup=False)


def _finite(obj: Any) -> Any:
    """``obj`` with every non-finite float (NaN, infinity) as None (JSON null)."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


def json_text(obj: Any) -> str:
    """Strict JSON, as every ``--format json`` writes it: a NaN or an infinity is null (never
    the ``NaN``/``Infinity`` that strict JSON readers refuse)."""
    return json.dumps(_finite(obj), indent=2, allow_nan=False) + "\n"


def _estimate_csv(result: EstimateResult) -> str:
    """``--format csv``: the result's frame written out (``EstimateResult.to_csv``)."""
    return result.to_csv()


def _range(text: str) -> tuple[str, float, float]:
    """``--range COLUMN:LOW..HIGH`` with finite bounds (an infinite or NaN bound is refused)."""
    from .errors import UsageError
    from .estimate import parse_range

    lo_s, sep, hi_s = text.rpartition(":")[2].partition("..")
    try:
        bounds: tuple[float, ...] = (float(lo_s), float(hi_s)) if sep else ()
    except ValueError:
        bounds = ()
    if not all(math.isfinite(b) for b in bounds):
        raise UsageError(f"--range {text!r}: LOW and HIGH must be finite numbers, not inf or nan. For the share up "
                         "to an end of the column, give that end of its bounds (listed in the manifest), e.g. "
                         "--range pay:24000..60000.")
    return parse_range(text)


def _check_estimate_out(out: Path, extracts: list[Path], manifests: list[Path] | None, overwrite: bool) -> None:
    """``estimate --out``: never an extract or manifest it reads (nor inside a dataset extract),
    nor the steward's default ledger or nonce record, and not an existing file without --overwrite."""
    from .io import private_dir_location
    from .ledger.store import DEFAULT_NAME
    from .manifest import default_manifest_path
    from .outputs import ESTIMATES, LEDGER, MANIFEST, check_outputs
    from .release.nonces import STATE_NAME

    known: list[tuple[str, Path | None]] = [("extract", Path(e)) for e in extracts]
    known += [(MANIFEST, Path(m)) for m in manifests] if manifests else \
        [(MANIFEST, default_manifest_path(Path(e))) for e in extracts]
    known += [(LEDGER, private_dir_location() / DEFAULT_NAME), ("nonce record", private_dir_location() / STATE_NAME)]
    check_outputs([(ESTIMATES, out)], known, overwrite=overwrite)


@app.command()
def estimate(
    extracts: list[Path] = typer.Argument(..., help="Extract(s) (.csv or .parquet, or a dataset folder) written "
                                          "by `ldpt privatize`; "
                                          "several extracts with identical mechanism specs are merged."),
    manifest: list[Path] | None = typer.Option(None, "--manifest", help="Manifest(s), one per extract "
                                               "[default: beside each extract]."),
    format: TableJsonCsv = typer.Option(TableJsonCsv.table, "--format", help="Output format."),
    confidence: float = typer.Option(0.95, "--confidence", help="Confidence level of the intervals."),
    crosstab: list[str] | None = typer.Option(None, "--crosstab", help="Cross-tab of two categorical columns, "
                                              "A:B (repeatable)."),
    mean_by: list[str] | None = typer.Option(None, "--mean-by", help="Mean of a numeric column within each "
                                             "category of another, NUM:CAT (repeatable)."),
    quantiles: str | None = typer.Option(None, "--quantiles", help="Quantiles of distribution columns, e.g. "
                                         "0.1,0.5,0.9 [default: 0.5]."),
    range_: list[str] | None = typer.Option(None, "--range", help="Share of a distribution column in "
                                            "[LOW, HIGH), COLUMN:LOW..HIGH (repeatable)."),
    consistency: str = typer.Option("norm-sub", "--consistency", help="Post-processing shown as 'share': "
                                    "norm-sub, norm-mul or norm."),
    out: Path | None = typer.Option(None, "--out", help="Write the result to this file instead of stdout "
                                    "(never over an extract or manifest it reads)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="With --out: replace an existing file."),
    engine: Engine = typer.Option(Engine.local, "--engine", help="local: this process; dask: the parts of a "
                                  "Parquet dataset extract are decoded by dask workers and their sufficient "
                                  "statistics merged (same estimates)."),
    scheduler: str | None = typer.Option(None, "--scheduler", help="With --engine dask: address of a running "
                                         "dask scheduler [default: a local cluster]."),
    public_key: Path | None = typer.Option(None, "--public-key", help="The steward's public signing key (.pub): "
                                           "decode only if every manifest's signature verifies (docs/signing.md)."),
) -> None:
    """Unbiased frequencies, means, cross-tabs, grouped means and quantiles with SEs and intervals.

    Example: ldpt estimate extract.parquet --crosstab site:role --mean-by pay:site --format json
    """
    from .estimate import estimate as run
    from .estimate import parse_pair, parse_quantiles
    from .io import write_text_atomic

    global out_console
    with _user_errors():
        if out is not None:
            _check_estimate_out(out, extracts, manifest, overwrite)
        if public_key is not None:
            from .signing import require_signatures

            require_signatures(extracts, manifest, public_key)
        result = run(extracts, list(manifest) if manifest else None, confidence=confidence,
                     crosstabs=[parse_pair(x, "--crosstab") for x in crosstab or []],
                     mean_by=[parse_pair(x, "--mean-by") for x in mean_by or []],
                     quantiles=parse_quantiles(quantiles) if quantiles else None,
                     ranges=[_range(x) for x in range_ or []], consistency=consistency,
                     engine=engine.value, scheduler=scheduler)
        if format == TableJsonCsv.json:
            text = json_text(result.to_dict())
        elif format == TableJsonCsv.csv:
            text = _estimate_csv(result)
        else:
            if out is None:
                _estimate_table(result)
                return
            import io

            rec = SafeConsole(record=True, width=120, file=io.StringIO())
            saved, out_console = out_console, rec
            try:
                _estimate_table(result)
            finally:
                out_console = saved
            text = rec.export_text()
        if out is not None:
            from .outputs import ESTIMATES, DestinationLock

            with DestinationLock([(ESTIMATES, out)]):
                _check_estimate_out(out, extracts, manifest, overwrite)  # again: a job may have just written it
                write_text_atomic(out, text)
            err_console.print(f"wrote estimates to {out}", markup=False)
        elif format == TableJsonCsv.csv and sys.stdout.isatty():  # CSV on a terminal: nothing acts on it
            sys.stdout.write(terminal_safe(text, keep_layout=True))
        else:
            sys.stdout.write(text)


# -- validate -------------------------------------------------------------------------------

@app.command()
def validate(
    extract: Path = typer.Argument(..., help="Extract to check."),
    manifest: Path | None = typer.Option(None, "--manifest", help="Manifest [default: beside the extract]."),
    raw: Path | None = typer.Option(None, "--raw", help="Raw input (steward only): re-derive and calibrate."),
    key: Path | None = typer.Option(None, "--key", help="Secret key (steward only), with --raw."),
    format: TableJson = typer.Option(TableJson.table, "--format", help="Output format."),
    confidence: float = typer.Option(0.95, "--confidence", help="Interval level used for calibration."),
    quantiles: str | None = typer.Option(None, "--quantiles", help="With --raw: quantiles the calibration "
                                         "checks, e.g. 0.1,0.5,0.9 [default: 0.25,0.5,0.75]."),
    range_: list[str] | None = typer.Option(None, "--range", help="With --raw: a range share the calibration "
                                            "checks, COLUMN:LOW..HIGH (repeatable) [default: each distribution "
                                            "column's bounds cut in four]."),
    public_key: Path | None = typer.Option(None, "--public-key", help="The steward's public signing key (.pub): "
                                           "check the manifest's signature (docs/signing.md)."),
) -> None:
    """Check a release; exit 0 if every check passes, 1 if one fails.

    Integrity, privacy budget, output alphabet, no key material; with --raw and --key also
    bit-for-bit reproduction and calibration.

    Example: ldpt validate extract.parquet --raw survey.csv --key release.key
    """
    from .estimate import parse_quantiles
    from .keys import load_key
    from .validate import validate as run

    with _user_errors():
        if (raw is None) != (key is None):
            from .errors import UsageError

            raise UsageError("--raw and --key go together: re-deriving a release needs both the raw input and the "
                             "secret key (steward only).")
        k = load_key(key) if key is not None else None
        rep = run(extract, manifest, raw=raw, key=k, confidence=confidence,
                  quantiles=parse_quantiles(quantiles) if quantiles else None,
                  ranges=[_range(x) for x in range_ or []] or None, public_key=public_key)
    if format == TableJson.json:
        sys.stdout.write(json_text(rep.to_dict()))
    else:
        t = Table(title=escape(f"validation of {rep.extract} (manifest {rep.manifest})"), title_justify="left")
        t.add_column("check")
        t.add_column("status")
        t.add_column("detail", overflow="fold")
        colors = {"pass": "green", "warn": "yellow", "fail": "bold red"}
        for c in rep.checks:
            t.add_row(escape(c.name), f"[{colors[c.status]}]{c.status}[/]", escape(c.detail))
        out_console.print(t)
        out_console.print("result: " + ("[green]all checks passed[/]" if rep.ok else "[bold red]FAILED[/]"))
    raise typer.Exit(code=0 if rep.ok else 1)


# -- sign -----------------------------------------------------------------------------------

@app.command()
def sign(
    manifest: Path = typer.Argument(..., help="Manifest to sign (written by `ldpt privatize`)."),
    signing_key: Path = typer.Option(..., "--signing-key", help="Private signing key made by `ldpt key new-signing`."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing signature file."),
) -> None:
    """Sign a manifest (steward only): write MANIFEST.sig, an Ed25519 signature over its exact bytes.

    Partners check it with `ldpt validate EXTRACT --public-key KEY.pub` (see docs/signing.md).
    Example: ldpt sign extract.manifest.json --signing-key ~/private/steward-signing.key
    """
    from .signing import load_signing_key, sign_manifest

    with _user_errors():
        sig = sign_manifest(manifest, load_signing_key(signing_key), overwrite=overwrite)
    err_console.print(f"signed {manifest}: wrote {sig}; send it with the manifest and the extract", markup=False)


# -- policy ---------------------------------------------------------------------------------

@policy_app.command("check")
def policy_check(policy: Path = typer.Argument(..., help="Policy file to check.")) -> None:
    """Check a policy file and show what each column becomes. Example: ldpt policy check policy.yaml"""
    from .policy import load_policy

    with _user_errors():
        lp = load_policy(policy)
    t = Table(title=escape(f"{policy}: valid"), title_justify="left")
    any_memo = any(rc.memoize for rc in lp.columns)
    for h in ("column", "type", "mechanism", "eps", "domain") + (("memoized",) if any_memo else ()):
        t.add_column(h)
    for rc in lp.columns:
        m = rc.mechanism
        if rc.type in ("categorical", "binned"):
            dom = f"{len(rc.labels)} categories" + (" + missing" if rc.missing_code is not None else "") + \
                  (" + other" if rc.other_code is not None else "")
        elif rc.type == "numeric":
            dom = f"[{rc.config.domain[0]:g}, {rc.config.domain[1]:g}]"
        else:
            dom = "released in the clear (NOT protected)" if rc.type == "public" else "not released"
        mname = (m.label + (" (auto)" if rc.chosen_because else "")) if m else "-"
        memo = ("-" if not rc.memoize else f"yes (grid {rc.memo_grid})" if rc.memo_grid else "yes")
        if rc.memoize and rc.rerandomize_epsilon is not None:
            memo += f", second layer eps {rc.rerandomize_epsilon:g} (permanent eps {rc.permanent_epsilon:g})"
        t.add_row(escape(rc.name), rc.type, mname, f"{m.epsilon:g}" if m else "-", escape(dom),
                  *((memo,) if any_memo else ()))
    out_console.print(t)
    pol = lp.policy
    if pol.subject_key is not None:
        out_console.print(f"subject_key: {pol.subject_key} (identifies a person for memoized columns and the "
                          "ledger; never released)", markup=False)
    if pol.budget.lifetime_epsilon is not None:
        out_console.print(f"budget.lifetime_epsilon: {pol.budget.lifetime_epsilon:g} per person over all releases "
                          "recorded in the ledger", markup=False)
    if getattr(lp, "strategy", "split") == "sample":
        pol = lp.policy
        out_console.print(f"budget.strategy sample: each row reports {pol.reported_columns} of its "
                          f"{len(pol.privatized_columns)} privatized columns (chosen by the keyed PRF, independent "
                          f"of the data) at eps {pol.sampled_epsilon:g} each", markup=False)
    order = pol.output.row_order
    people = ("one row per person, checked against subject_key" if pol.output.one_row_per_person and
              pol.subject_key is not None else "one row per person, declared" if pol.output.one_row_per_person
              else "rows per person not declared")
    out_console.print(f"output: rows {order}" + ("" if order == "shuffled" else " (CAUTION: the input's order is "
                      "released; a sorted input gives its sort column away)") + f"; {people}", markup=False)
    out_console.print(f"eps per row: {lp.epsilon_total:g} of the budget {lp.policy.budget.epsilon_per_row:g}")


@policy_app.command("schema")
def policy_schema() -> None:
    """Print the JSON Schema of policy files (for editors and linters)."""
    from .policy import policy_json_schema

    sys.stdout.write(json_text(policy_json_schema()))


# -- plan -----------------------------------------------------------------------------------

def _fmt_se(v: object) -> str:
    return "-" if v is None else f"{v:.4g}"


def _plan_row(c: dict, s: dict) -> tuple[str, ...]:
    """One statistic of a planned column as the cells of the plan table."""
    meets = s.get("meets_target")
    if s.get("impossible_at_rows"):
        meets_txt = "no (impossible)"
    else:
        meets_txt = "-" if meets is None else ("yes" if meets else "no")
    target = s.get("target_se")
    if s.get("target_relative_se") is not None:
        target = (f"{_fmt_se(target)}; " if target is not None else "") + f"{s['target_relative_se']:.3g} of width"
    else:
        target = _fmt_se(target)
    se = _fmt_se(s.get("se"))
    if s.get("relative_se") is not None:
        se += f" ({s['relative_se']:.3g} of width)"
    eff = s.get("efficiency")
    return (escape(c["name"]), c["mechanism"], f"{c['epsilon']:g}", s["statistic"], se,
            _fmt_se(s.get("best_possible_se")), target, meets_txt,
            "-" if s.get("rows_needed") is None else str(s["rows_needed"]), "-" if eff is None else f"{eff:.3f}")


def _plan_table(result: dict) -> None:
    t = Table(title=f"Predicted precision at {result['rows']} rows (worst case over data, medians and distribution "
                    "means on skewed reference data; SE as `ldpt estimate` reports it)", title_justify="left")
    for h in ("column", "mechanism", "eps", "statistic", "SE", "best possible", "target", "meets", "rows needed",
              "efficiency"):
        t.add_column(h)
    for c in result["columns"]:
        if "statistics" not in c:
            t.add_row(escape(c["name"]), "-", "-", "-", "-", "-", "-", "-", "-", escape(c.get("note", "")))
            continue
        for st in c["statistics"]:
            t.add_row(*_plan_row(c, st))
    # ten columns do not fit 80 characters: print the table at least 150 wide rather than fold
    # every cell into ellipses (a narrow terminal wraps the lines instead)
    SafeConsole(highlight=False, width=max(out_console.width, 150)).print(t)
    out_console.print(f"eps per row: {result['epsilon_per_row']:g} of the budget "
                      f"{result['epsilon_per_row_budget']:g} (strategy {result['strategy']})", markup=False)
    for item in result["impossible"]:
        err_console.print(f"warning: {item}: no eps-LDP mechanism can meet this target at {result['rows']} rows "
                          "(lower bound); more rows, a looser target or a larger eps is needed", markup=False)
    for item in result["targets_missed"]:
        if item not in result["impossible"]:
            err_console.print(f"warning: {item}: the target is missed at {result['rows']} rows", markup=False)
    s = result.get("suggestion")
    if s:
        out_console.print("Suggested eps split (smallest eps per column that meets its targets):", markup=False)
        for name, v in s["split"]["columns"].items():
            eps = "-" if v.get("epsilon") is None else f"{v['epsilon']:g}"
            out_console.print(f"  {name}: {eps}" + (f" ({v['mechanism']})" if v.get("mechanism") else "") +
                              (f"  [{v['note']}]" if v.get("note") else ""), markup=False)
        out_console.print(f"split: {s['split']['verdict']}", markup=False)
        out_console.print(f"sample: {s['sample']['verdict']}", markup=False)
    out_console.print("An eps is a policy choice, not a technical one: precision targets do not decide it alone. "
                      "Agree it with the organisation's privacy officer.", markup=False)


@app.command()
def plan(
    policy: Path = typer.Option(..., "--policy", help="Policy file (YAML or JSON)."),
    rows: int = typer.Option(..., "--rows", help="Number of table rows the release will have."),
    format: TableJson = typer.Option(TableJson.table, "--format", help="Output format."),
    suggest: bool = typer.Option(False, "--suggest", help="Also suggest the smallest eps per column that meets the "
                                 "policy's quality targets, and compare with budget.strategy sample."),
) -> None:
    """Predict each statistic's standard error before a release, against the policy's quality targets.
    Example: ldpt plan --policy policy.yaml --rows 20000 --suggest"""
    from .plan import plan as make_plan
    from .plan import suggest as make_suggestion
    from .policy import load_policy

    with _user_errors():
        lp = load_policy(policy)
        result = make_plan(lp, rows).to_dict()
        if suggest:
            result["suggestion"] = make_suggestion(lp, rows)
    if format == TableJson.json:
        sys.stdout.write(json_text(result))
    else:
        _plan_table(result)


# -- audit ----------------------------------------------------------------------------------

@app.command()
def audit(
    policy: Path | None = typer.Option(None, "--policy", help="Policy file (YAML or JSON) to audit."),
    manifest: Path | None = typer.Option(None, "--manifest", help="Or a release's manifest: audit the policy "
                                         "embedded in it."),
    rows: int = typer.Option(200_000, "--rows", help="Rows per side (input a, input b) of every pair: more rows, "
                             "finer bounds, longer runs."),
    confidence: float = typer.Option(0.99, "--confidence", help="Confidence of the whole audit (shared among "
                                     "its tests)."),
    format: TableJson = typer.Option(TableJson.table, "--format", help="Output format."),
) -> None:
    """Audit a policy's mechanisms empirically; exit 0 if no lower bound exceeds its column's eps, 1 if one does.

    Runs the real release on generated worst-case inputs (a fresh key, a private temporary
    folder removed afterwards) and gives, per column, a lower bound on eps with Clopper-Pearson
    intervals.  A pass does not prove privacy; a fail shows a violation.

    Example: ldpt audit --policy policy.yaml --rows 200000
    """
    from .audit import audit as run
    from .audit import audit_manifest
    from .errors import UsageError
    from .policy import load_policy

    with _user_errors():
        if (policy is None) == (manifest is None):
            raise UsageError("give exactly one of --policy FILE (audit a policy file) and --manifest FILE (audit the "
                             "policy embedded in a release's manifest).")
        if policy is not None:
            res = run(load_policy(policy), rows=rows, confidence=confidence)
        else:
            assert manifest is not None
            res = audit_manifest(manifest, rows=rows, confidence=confidence)
    if format == TableJson.json:
        sys.stdout.write(json_text(res.to_dict()))
    else:
        t = Table(title=escape(f"audit of {res.policy}: {res.rows} rows per side, confidence {res.confidence:g}"),
                  title_justify="left")
        for name in ("column", "mechanism", "eps", "eps lower bound", "status", "worst pair and event"):
            t.add_column(name, overflow="fold")
        for c in res.columns:
            w = c.worst
            where = f"{w.first} over {w.second}: {w.event}" if w is not None else ""
            t.add_row(escape(c.column), escape(c.mechanism), f"{c.epsilon:.4g}", f"{c.epsilon_lower:.4f}",
                      "[green]pass[/]" if c.ok else "[bold red]fail[/]", escape(where))
        out_console.print(t)
        out_console.print(f"{res.seconds:.1f} s. A lower bound at or below eps does not prove a release private; "
                          "one above eps shows a violation.", markup=False)
        out_console.print("result: " + ("[green]no violation found[/]" if res.ok else "[bold red]VIOLATION[/]"))
    raise typer.Exit(code=0 if res.ok else 1)


# -- demo -----------------------------------------------------------------------------------

def _check_demo_folder(folder: Path, overwrite: bool) -> None:
    """The demo's files (run_demo's layout): none may exist without --overwrite (its key is kept and
    reused, never replaced), and its steward-private folder, if there, must be private (0700)."""
    from .io import private_folder
    from .outputs import DEMO, DIAGNOSTICS, ESTIMATES, EXTRACT, MANIFEST, check_new

    steward, partner = folder / "steward-private", folder / "for-partner"
    if steward.exists():
        private_folder(steward, "demo's steward-only folder")
    extract = partner / "staff_survey_extract.parquet"
    files: list[tuple[str, Path | None]] = [
        (DEMO, steward / "staff_survey.csv"), (DEMO, folder / "staff_survey.yaml"), (EXTRACT, extract),
        (MANIFEST, partner / "staff_survey_extract.manifest.json"), (ESTIMATES, partner / "estimates.json"),
        (DIAGNOSTICS, steward / "release.PRIVATE-diagnostics.json")]
    check_new([(role, p) for role, p in files if p is not None and p.exists()], overwrite)


@app.command()
def demo(dir: Path = typer.Option(Path("demo_out"), "--dir", help="Folder for the demo's files."),
         nonce: str | None = typer.Option(None, "--nonce", help="Reuse a release nonce (to repeat a demo run "
                                          "exactly with the same key)."),
         overwrite: bool = typer.Option(False, "--overwrite", help="Replace the files of an earlier demo run in "
                                        "DIR (its key is kept).")) -> None:
    """Make the demo data (a fictional staff survey), privatize, estimate and validate it."""
    from .demo import run_demo

    with _user_errors():
        _check_demo_folder(dir, overwrite)
        code = run_demo(dir, out_console, err_console, nonce=nonce, show_estimates=_estimate_table)
    raise typer.Exit(code=code)


# -- ledger ---------------------------------------------------------------------------------

ledger_app = typer.Typer(no_args_is_help=True, help="The privacy ledger (steward only): eps spent per subject "
                         "over releases.")
app.add_typer(ledger_app, name="ledger")


def _ledger_path(ledger: Path | None) -> Path:
    from .ledger import default_ledger_path

    return ledger if ledger is not None else default_ledger_path()


_LEDGER_OPTION_HELP = "Ledger file [default: ledger.sqlite3 in the private folder, $LDPT_PRIVATE_DIR]."


@ledger_app.command("show")
def ledger_show(ledger: Path | None = typer.Option(None, "--ledger", help=_LEDGER_OPTION_HELP),
                format: TableJson = typer.Option(TableJson.table, "--format", help="Output format.")) -> None:
    """Summarize the ledger: releases, eps recorded, per-subject spend (steward only: it depends on the data).

    Example: ldpt ledger show --format json
    """
    from .ledger import Ledger

    with _user_errors():
        with Ledger.open(_ledger_path(ledger), create=False, readonly=True) as led:
            summary = led.show()
    if format == TableJson.json:
        sys.stdout.write(json_text(summary))
        return
    t = Table(title=escape(f"ledger {summary['ledger']}: {summary['releases']} release(s)"), title_justify="left")
    for h in ("release", "time (UTC)", "eps per row", "subjects charged", "lifetime eps"):
        t.add_column(h)
    for r in summary["release_list"]:
        cap = r["lifetime_epsilon"]
        t.add_row(str(r["id"]), escape(str(r["time"])), f"{r['eps_per_row']:g}", str(r["subjects_charged"]),
                  "-" if cap is None else f"{cap:g}")
    out_console.print(t)
    out_console.print(f"eps per row summed over releases: {summary['eps_per_row_summed_over_releases']:g}; "
                      f"head hash {summary['head']} (keep a copy elsewhere to anchor the chain)", markup=False)
    out_console.print(f"STEWARD ONLY, {summary['steward_only']}:", markup=False)
    out_console.print(f"  subjects in the ledger: {summary['subjects']}", markup=False)
    if "spend_quantiles" in summary:
        q = ", ".join(f"q{k} {v:g}" for k, v in summary["spend_quantiles"].items())
        out_console.print(f"  eps spent per subject: {q}", markup=False)
    if "near_cap" in summary:
        near = ", ".join(f"{k} of the cap: {v}" for k, v in summary["near_cap"].items())
        out_console.print(f"  subjects near the lifetime eps {summary['lifetime_epsilon']:g} (counts): {near}; "
                          f"least remaining eps {summary['least_remaining_eps']:g}", markup=False)


@ledger_app.command("verify")
def ledger_verify(ledger: Path | None = typer.Option(None, "--ledger", help=_LEDGER_OPTION_HELP)) -> None:
    """Recompute the ledger's hash chain; exit 0 if intact, 1 if broken (naming the first broken release) or damaged.

    Example: ldpt ledger verify --ledger ~/private/ledger.sqlite3
    """
    from .ledger import Ledger, LedgerDamagedError

    with _user_errors():
        try:
            with Ledger.open(_ledger_path(ledger), create=False, readonly=True) as led:
                res = led.verify()
        except LedgerDamagedError as err:  # empty, not a ledger or damaged: a failed check, as a broken chain
            out_console.print(str(err), markup=False)
            raise typer.Exit(code=1) from None
    if res.ok:
        out_console.print(f"ledger {led.path}: {res.detail}; head {res.head}", markup=False)
    else:
        where = f"release {res.first_broken}" if res.first_broken is not None else "the ledger"
        out_console.print(f"ledger {led.path}: BROKEN at {where}: {res.detail}", markup=False)
    raise typer.Exit(code=0 if res.ok else 1)


def main() -> None:
    try:
        app()
    except SystemExit:
        raise
    except KeyboardInterrupt:
        sys.stderr.write("interrupted: stopped before finishing.\n")
        sys.exit(130)
    except Exception:  # a bug: show where, never locals (they may hold key material)
        sys.stderr.write("ldpt: internal error (a bug). Please report it with this traceback:\n")
        sys.stderr.write(terminal_safe(traceback.format_exc(limit=20), keep_layout=True))  # data-derived text too
        sys.exit(3)


if __name__ == "__main__":
    main()
