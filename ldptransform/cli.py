"""The `ldpt` command line.  Thin: every command calls the Python API and prints.

Exit codes: 0 success; 1 a validation ran and failed; 2 an error you can fix (bad policy,
data, key, paths or options; the message says what and how); 3 an internal error (a bug:
please report it with the traceback, which never shows local variables).
"""

from __future__ import annotations

import json
import sys
import traceback
from contextlib import contextmanager
from enum import Enum
from pathlib import Path
from typing import Iterator, Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from . import __version__
from .errors import LdptError

app = typer.Typer(no_args_is_help=True, add_completion=False, pretty_exceptions_enable=False,
                  help="Release row-level extracts under local differential privacy, and decode them.")
key_app = typer.Typer(no_args_is_help=True, help="Secret key files.")
policy_app = typer.Typer(no_args_is_help=True, help="Policy files.")
app.add_typer(key_app, name="key")
app.add_typer(policy_app, name="policy")

out_console = Console(highlight=False, soft_wrap=True)
err_console = Console(stderr=True, highlight=False, soft_wrap=True)


class TableJson(str, Enum):
    table = "table"
    json = "json"


class TableJsonCsv(str, Enum):
    table = "table"
    json = "json"
    csv = "csv"


@contextmanager
def _user_errors() -> Iterator[None]:
    try:
        yield
    except LdptError as err:
        err_console.print(f"[bold red]Error:[/] {escape(str(err))}", markup=True, highlight=False)
        raise typer.Exit(code=err.exit_code) from None
    except PermissionError as err:
        err_console.print(f"[bold red]Error:[/] permission denied on {escape(str(err.filename))}: check that you "
                          "may read or write it.", markup=True)
        raise typer.Exit(code=2) from None
    except OSError as err:
        where = f" on {err.filename}" if getattr(err, "filename", None) else ""
        err_console.print(f"[bold red]Error:[/] {escape(str(err.strerror or err) + where)}. Check the path, free "
                          "disk space and permissions.", markup=True)
        raise typer.Exit(code=2) from None
    except KeyboardInterrupt:
        err_console.print("interrupted: stopped before finishing; nothing was left at the destination.",
                          markup=False)
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


# -- privatize ------------------------------------------------------------------------------

@app.command()
def privatize(
    input: Path = typer.Argument(..., help="Raw table, .csv or .parquet."),
    policy: Path = typer.Option(..., "--policy", help="Policy file (YAML or JSON)."),
    key: Path = typer.Option(..., "--key", help="Secret key file made by `ldpt key new`."),
    out: Path = typer.Option(..., "--out", help="Extract to write, .csv or .parquet."),
    manifest: Optional[Path] = typer.Option(None, "--manifest", help="Manifest path [default: OUT with .manifest.json]."),
    diagnostics: Optional[Path] = typer.Option(
        None, "--diagnostics", help="Steward-only diagnostics file [default: in the private folder, "
        "$LDPT_PRIVATE_DIR or ~/.local/state/ldptransform]."),
    batch_rows: int = typer.Option(65536, "--batch-rows", min=1, help="Rows per batch (memory; never the output)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing extract and manifest."),
    nonce: Optional[str] = typer.Option(None, "--nonce", help="Reuse a release nonce (from a manifest) to "
                                        "reproduce that release bit for bit."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar; only the summary line."),
) -> None:
    """Randomize INPUT column by column under POLICY into OUT, plus a public manifest.

    Example: ldpt privatize survey.csv --policy policy.yaml --key release.key --out extract.parquet
    """
    from .keys import load_key
    from .policy import load_policy
    from .release import privatize as run

    with _user_errors():
        lp = load_policy(policy)
        k = load_key(key)
        show = (not quiet) and sys.stderr.isatty()
        if show:
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

            from .io import TableSource

            total = TableSource(input, csv_null_values=lp.policy.input.csv_null_values,
                                csv_delimiter=lp.policy.input.csv_delimiter).num_rows
            with Progress(TextColumn("privatizing"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                          console=err_console, transient=True) as prog:
                task = prog.add_task("rows", total=total)
                res = run(input, lp, k, out, manifest_path=manifest, diagnostics_path=diagnostics,
                          batch_rows=batch_rows, overwrite=overwrite, nonce=nonce,
                          on_progress=lambda n: prog.advance(task, n))
        else:
            res = run(input, lp, k, out, manifest_path=manifest, diagnostics_path=diagnostics,
                      batch_rows=batch_rows, overwrite=overwrite, nonce=nonce)
    public = res.manifest.privacy.public_columns
    caution = (f"; CAUTION: {len(public)} column(s) released in the clear, not protected: {', '.join(public)}"
               if public else "")
    err_console.print(f"privatized {res.manifest.rows} rows into {res.extract_path} (manifest {res.manifest_path}; "
                      f"steward-only diagnostics {res.diagnostics_path}) in {res.seconds:.1f} s, "
                      f"eps {res.manifest.privacy.epsilon_per_row_used:g} per row{caution}", markup=False)


# -- estimate -------------------------------------------------------------------------------

def _num(v: float | None, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def _estimate_table(result: dict) -> None:
    out_console.print(f"{result['rows']} rows; {result['confidence']:.0%} intervals (normal approximation). "
                      "Estimates are unbiased and may fall slightly outside [0, 1]; 'consistent' is the "
                      "Norm-Sub projection to a valid distribution.")
    for name, col in result["columns"].items():
        title = escape(f"{name}: {col['type']}, {col['mechanism']}, eps {col['epsilon']:g}")
        if "frequencies" in col:
            t = Table(title=title, title_justify="left")
            for h in ("value", "estimate", "se", "ci_low", "ci_high", "consistent"):
                t.add_column(h, justify="left" if h == "value" else "right")
            for f in col["frequencies"]:
                t.add_row(escape(f["value"]), *(_num(f[k], ".4f") for k in ("estimate", "se", "ci_low", "ci_high",
                                                                    "consistent")))
        else:
            t = Table(title=title, title_justify="left")
            for h in ("statistic", "estimate", "se", "ci_low", "ci_high"):
                t.add_column(h, justify="left" if h == "statistic" else "right")
            m = col["mean"]
            t.add_row("mean", _num(m["estimate"], ".6g"), _num(m["se"], ".4g"), _num(m["ci_low"], ".6g"),
                      _num(m["ci_high"], ".6g"))
        out_console.print(t)
    if result.get("public_columns"):
        out_console.print(f"not estimated (public, released in the clear): {', '.join(result['public_columns'])}",
                          markup=False)


def _estimate_csv(result: dict) -> str:
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["column", "type", "mechanism", "epsilon", "statistic", "value", "estimate", "se", "ci_low",
                "ci_high", "consistent"])
    for name, col in result["columns"].items():
        if "frequencies" in col:
            for f in col["frequencies"]:
                w.writerow([name, col["type"], col["mechanism"], col["epsilon"], "frequency", f["value"],
                            repr(f["estimate"]), repr(f["se"]), repr(f["ci_low"]), repr(f["ci_high"]),
                            repr(f["consistent"])])
        else:
            m = col["mean"]
            w.writerow([name, col["type"], col["mechanism"], col["epsilon"], "mean", "", repr(m["estimate"]),
                        repr(m["se"]), repr(m["ci_low"]), repr(m["ci_high"]), ""])
    return buf.getvalue()


@app.command()
def estimate(
    extract: Path = typer.Argument(..., help="Extract (.csv or .parquet) written by `ldpt privatize`."),
    manifest: Optional[Path] = typer.Option(None, "--manifest", help="Manifest [default: beside the extract]."),
    format: TableJsonCsv = typer.Option(TableJsonCsv.table, "--format", help="Output format."),
    confidence: float = typer.Option(0.95, "--confidence", help="Confidence level of the intervals."),
    out: Optional[Path] = typer.Option(None, "--out", help="Write the result to this file instead of stdout."),
) -> None:
    """Unbiased frequencies and means with standard errors and confidence intervals.

    Example: ldpt estimate extract.parquet --format json
    """
    from .estimate import estimate as run
    from .io import write_text_atomic

    with _user_errors():
        result = run(extract, manifest, confidence=confidence)
        if format == TableJsonCsv.json:
            text = json.dumps(result, indent=2) + "\n"
        elif format == TableJsonCsv.csv:
            text = _estimate_csv(result)
        else:
            if out is not None:
                rec = Console(record=True, width=120, file=open("/dev/null", "w"))
                global out_console
                saved, out_console = out_console, rec
                try:
                    _estimate_table(result)
                finally:
                    out_console = saved
                text = rec.export_text()
            else:
                _estimate_table(result)
                return
        if out is not None:
            write_text_atomic(out, text)
            err_console.print(f"wrote estimates to {out}", markup=False)
        else:
            sys.stdout.write(text)


# -- validate -------------------------------------------------------------------------------

@app.command()
def validate(
    extract: Path = typer.Argument(..., help="Extract to check."),
    manifest: Optional[Path] = typer.Option(None, "--manifest", help="Manifest [default: beside the extract]."),
    raw: Optional[Path] = typer.Option(None, "--raw", help="Raw input (steward only): re-derive and calibrate."),
    key: Optional[Path] = typer.Option(None, "--key", help="Secret key (steward only), with --raw."),
    format: TableJson = typer.Option(TableJson.table, "--format", help="Output format."),
    confidence: float = typer.Option(0.95, "--confidence", help="Interval level used for calibration."),
) -> None:
    """Check a release; exit 0 if every check passes, 1 if one fails.

    Integrity, privacy budget, output alphabet, no key material; with --raw and --key also
    bit-for-bit reproduction and calibration.

    Example: ldpt validate extract.parquet --raw survey.csv --key release.key
    """
    from .keys import load_key
    from .validate import validate as run

    with _user_errors():
        if (raw is None) != (key is None):
            from .errors import UsageError

            raise UsageError("--raw and --key go together: re-deriving a release needs both the raw input and the "
                             "secret key (steward only).")
        k = load_key(key) if key is not None else None
        rep = run(extract, manifest, raw=raw, key=k, confidence=confidence)
    if format == TableJson.json:
        sys.stdout.write(json.dumps(rep.as_dict(), indent=2) + "\n")
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


# -- policy ---------------------------------------------------------------------------------

@policy_app.command("check")
def policy_check(policy: Path = typer.Argument(..., help="Policy file to check.")) -> None:
    """Check a policy file and show what each column becomes. Example: ldpt policy check policy.yaml"""
    from .policy import load_policy

    with _user_errors():
        lp = load_policy(policy)
    t = Table(title=escape(f"{policy}: valid"), title_justify="left")
    for h in ("column", "type", "mechanism", "eps", "domain"):
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
        mname = (m.name + (" (auto)" if rc.chosen_because else "")) if m else "-"
        t.add_row(escape(rc.name), rc.type, mname, f"{m.epsilon:g}" if m else "-", escape(dom))
    out_console.print(t)
    out_console.print(f"eps per row: {lp.epsilon_total:g} of the budget {lp.policy.budget.epsilon_per_row:g}")


@policy_app.command("schema")
def policy_schema() -> None:
    """Print the JSON Schema of policy files (for editors and linters)."""
    from .policy import policy_json_schema

    sys.stdout.write(json.dumps(policy_json_schema(), indent=2) + "\n")


# -- demo -----------------------------------------------------------------------------------

@app.command()
def demo(dir: Path = typer.Option(Path("demo_out"), "--dir", help="Folder for the demo's files."),
         nonce: Optional[str] = typer.Option(None, "--nonce", help="Reuse a release nonce (to repeat a demo run "
                                             "exactly with the same key).")) -> None:
    """Make the demo data (a fictional staff survey), privatize, estimate and validate it."""
    from .demo import run_demo

    with _user_errors():
        code = run_demo(dir, out_console, err_console, nonce=nonce)
    raise typer.Exit(code=code)


def main() -> None:
    try:
        app()
    except SystemExit:
        raise
    except KeyboardInterrupt:
        sys.stderr.write("interrupted; nothing was left at the destination\n")
        sys.exit(130)
    except Exception:  # a bug: show where, never locals (they may hold key material)
        sys.stderr.write("ldpt: internal error (a bug). Please report it with this traceback:\n")
        traceback.print_exc(limit=20)
        sys.exit(3)


if __name__ == "__main__":
    main()
