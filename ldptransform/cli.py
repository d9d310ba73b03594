"""The `ldpt` command line.  Thin: every command calls the Python API and prints.

Exit codes (errors.ExitCode; README.md and docs/pipelines.md list them): 0 success; 1 a check
ran and failed (validate, ledger verify, audit, policy check --data, report); 2 an error you can
fix (bad policy, data, key, paths or options; the message says what and how); 3 an internal
error (a bug: please report it with the traceback, which never shows local variables); 4 refused
for privacy (lifetime budget exhausted, a nonce reused); 5 the output already exists; 6 the
environment failed (disk full, permission denied writing an output); 130 interrupted. Each error
class carries its code (``exit_code``) and a stable ``kind`` for the JSON log (``--log-format
json``: JSON lines on stderr instead of the usual lines; docs/pipelines.md).
"""

from __future__ import annotations

import contextlib
import errno
import json
import math
import os
import signal
import re
import sys
import threading
import time
import traceback
from collections.abc import Callable, Iterable, Iterator
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
from .errors import EXIT_CODE_MEANINGS, ExitCode, LdptError, OutputError, one_paragraph, terminal_safe

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
    _report_error(ExitCode.INTERRUPTED, "interrupted", text)


def _interrupt_in_chain(err: BaseException) -> bool:
    """Whether ``err`` was caused by an interrupt: Python turns a KeyboardInterrupt raised at some
    points (a class body's ``__set_name__`` while a lazy import runs) into another exception with
    the interrupt as its cause, which is still an interrupt, not a bug."""
    seen: set[int] = set()
    cur: BaseException | None = err
    while cur is not None and id(cur) not in seen:
        if isinstance(cur, KeyboardInterrupt):
            return True
        seen.add(id(cur))
        cur = cur.__cause__ or cur.__context__
    return False


def _forget_unhandled_interrupt() -> None:
    """Clear CPython's mark of an interrupt that escaped code run by ``exec`` of a string (dataclass
    and namedtuple creation do that during lazy imports): under ``python -m`` the interpreter would
    otherwise end itself by SIGINT (exit -2) after our exit 130.  Running any string through
    ``exec`` clears the mark."""
    exec("pass")  # noqa: S102 - a constant string


# -- the JSON log (--log-format json) ---------------------------------------------------------

class LogFormat(StrEnum):
    text = "text"
    json = "json"


_LOG_OPTION = "--log-format"
_LOG_HELP = ("text: the usual lines on stderr; json: JSON lines on stderr instead, one object per line (start, "
             "progress, per-column summaries, then a result or an error record with its exit code; see "
             "docs/pipelines.md). Records may hold steward-only counts, marked steward_only.")


def json_line(obj: Any) -> str:
    """One strict JSON object on one line (a NaN or an infinity is null; non-ASCII escaped)."""
    return json.dumps(_finite(obj), allow_nan=False, separators=(",", ":")) + "\n"


def _utc_now() -> str:
    from datetime import UTC, datetime

    return datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


class RunLog:
    """The records of one command run.  In JSON mode each ``record`` is a line on stderr:
    ``{"event": ..., "command": ..., "time": ..., ...}``; in text mode records are not written."""

    def __init__(self, command: str, json_mode: bool) -> None:
        self.command, self.json = command, json_mode
        self.t0 = time.monotonic()
        self.ended = False  # a result or error record was written
        self.result: dict[str, Any] = {}  # fields of the result record, filled in by the command
        self._lock = threading.Lock()

    def seconds(self) -> float:
        return round(time.monotonic() - self.t0, 3)

    def record(self, event: str, **fields: Any) -> None:
        if not self.json:
            return
        line = json_line({"event": event, "command": self.command, "time": _utc_now(), **fields})
        with self._lock:  # progress may be told from a reader's thread
            sys.stderr.write(line)
            sys.stderr.flush()


_log: list[RunLog | None] = [None]  # the run log of the command running now
_json_requested: list[bool] = [False]  # the command line asks for --log-format json (for usage errors)


def _wants_json_log(argv: list[str]) -> bool:
    return f"{_LOG_OPTION}=json" in argv or any(a == _LOG_OPTION and b == "json" for a, b in zip(argv, argv[1:]))


def _report_error(code: int, kind: str, message: str, **extra: Any) -> None:
    """An error as the run tells it: an ``error`` record in JSON mode, else the usual line."""
    log = _log[0]
    if log is None and _json_requested[0]:
        log = RunLog("ldpt", True)
    if log is not None and log.json:
        log.record("error", exit_code=int(code), kind=kind, message=message, seconds=log.seconds(), **extra)
        log.ended = True
        return
    if code == ExitCode.INTERRUPTED:
        err_console.print(message, markup=False)
    else:
        err_console.print(f"[bold red]Error:[/] {_markup_escape(message)}", markup=True, highlight=False)


class _LogConsole(SafeConsole):
    """stderr in JSON mode: every line a command would print there becomes a ``message`` record."""

    def __init__(self, log: RunLog) -> None:
        import io

        super().__init__(file=io.StringIO(), highlight=False, soft_wrap=True, width=400)
        self._run_log = log

    def print(self, *objects: Any, **kwargs: Any) -> None:
        with self.capture() as cap:
            super().print(*objects, **kwargs)
        text = cap.get().strip("\n")
        if text:
            self._run_log.record("message", text=text)


def _path_text(v: Any) -> Any:
    if isinstance(v, (list, tuple)):
        return [_path_text(x) for x in v]
    return v if isinstance(v, (int, float, bool)) or v is None else str(v)


@contextmanager
def _run_log(command: str, fmt: LogFormat, inputs: dict[str, Any]) -> Iterator[RunLog]:
    """The run of ``command``: in JSON mode a ``start`` record first (command, version, time, the
    inputs as paths), stderr's usual lines as ``message`` records meanwhile, and a ``result`` record
    at the end (exit code, seconds, what the command put in ``log.result``) unless an ``error``
    record ended it.  An internal error (a bug) is an ``error`` record with its traceback."""
    global err_console
    log = RunLog(command, fmt == LogFormat.json)
    saved_console, saved_log = err_console, _log[0]
    _log[0] = log
    if log.json:
        err_console = _LogConsole(log)
    code: int | None = None
    try:
        log.record("start", version=__version__, pid=os.getpid(),
                   inputs={k: _path_text(v) for k, v in inputs.items() if v not in (None, [], ())})
        yield log
        code = ExitCode.OK
    except typer.Exit as ex:
        code = ex.exit_code
        raise
    except KeyboardInterrupt:
        _tell_interrupted(INTERRUPTED)
        raise typer.Exit(code=ExitCode.INTERRUPTED) from None
    except Exception as err:
        if _interrupt_in_chain(err):
            _tell_interrupted(INTERRUPTED)
            raise typer.Exit(code=ExitCode.INTERRUPTED) from None
        if not log.json:
            raise
        _report_error(ExitCode.INTERNAL, "internal", "internal error (a bug); please report it with the traceback",
                      traceback=terminal_safe(traceback.format_exc(limit=20), keep_layout=True))
        raise typer.Exit(code=ExitCode.INTERNAL) from None
    finally:
        if code is not None and not log.ended:
            log.record("result", exit_code=int(code), seconds=log.seconds(), **log.result)
            log.ended = True
        err_console, _log[0] = saved_console, saved_log


class _Progress:
    """Progress of a long step: a bar on stderr when it is a terminal (not with ``show=False``),
    ``progress`` records in JSON mode (at most every EVERY seconds, and when a pass ends),
    nothing otherwise.  ``unit`` rows, bytes or steps; ``total`` None when not known."""

    EVERY = 0.5

    def __init__(self, log: RunLog, stage: str, total: int | None, unit: str = "rows", show: bool = True) -> None:
        self.log, self.stage, self.total, self.unit = log, stage, total, unit
        self.done, self.rows, self.passes = 0, 0, 1
        self.bar: Any = None
        self.show = show and not log.json and sys.stderr.isatty()
        self._t0 = self._pass_t0 = time.monotonic()
        self._last = 0.0
        self._told: tuple[int, int] = (-1, -1)  # (done, rows) of the last record
        self._lock = threading.Lock()

    def __enter__(self) -> _Progress:
        if self.show:
            from rich.progress import (BarColumn, DownloadColumn, MofNCompleteColumn, Progress, TextColumn,
                                       TimeElapsedColumn, TimeRemainingColumn)

            count = DownloadColumn() if self.unit == "bytes" else MofNCompleteColumn()
            self.bar = Progress(TextColumn("{task.description}"), BarColumn(), count, TimeElapsedColumn(),
                                TextColumn("left"), TimeRemainingColumn(), console=err_console, transient=True)
            self.bar.start()
            self._task = self.bar.add_task(self.stage, total=self.total)
        return self

    def __exit__(self, *exc: Any) -> None:
        if self.bar is not None:
            self.bar.stop()
        elif exc[0] is None and (self.done, self.rows) != self._told and (self.done or self.rows):
            self._tell(force=True)

    def add(self, n: int) -> None:
        """``n`` more units done (rows: also counted as rows)."""
        with self._lock:
            self.done += n
            if self.unit == "rows":
                self.rows = self.done
            self._tell()

    def add_rows(self, n: int) -> None:
        """``n`` more rows written while the progress counts bytes."""
        if self.unit == "rows":
            self.add(n)
            return
        with self._lock:
            self.rows += n
            if self.bar is not None:
                self._tell()

    def at(self, done: int) -> None:
        """The position in this pass (bytes read so far); a position not past the last one starts a new pass."""
        with self._lock:
            if done <= self.done:
                self.passes += 1
                self._pass_t0 = time.monotonic()
            self.done = done
            self._tell()

    def _tell(self, force: bool = False) -> None:
        if self.bar is not None:
            what = self.stage if self.passes == 1 else f"{self.stage} (pass {self.passes})"
            if self.unit == "bytes" and self.rows:
                what += f", {self.rows} rows written"
            self.bar.update(self._task, completed=self.done, total=self.total, description=what)
            return
        if not self.log.json:
            return
        now = time.monotonic()
        finished = self.total is not None and self.done >= self.total
        if not (force or finished or now - self._last >= self.EVERY) or (self.done, self.rows) == self._told:
            return
        self._last, self._told = now, (self.done, self.rows)
        spent = now - self._pass_t0
        left = (spent * (self.total - self.done) / self.done if self.total is not None and self.done > 0
                else None)
        extra: dict[str, Any] = {"pass": self.passes, "rows_done": self.rows} if self.unit == "bytes" else {}
        self.log.record("progress", stage=self.stage, unit=self.unit, done=self.done, total=self.total,
                        seconds=round(now - self._t0, 3), eta_seconds=None if left is None else round(max(left, 0), 3),
                        **extra)


@contextmanager
def _status(log: RunLog, stage: str, show: bool = True) -> Iterator[None]:
    """A step whose length is not known: a status line with the time spent on a terminal,
    ``progress`` records (seconds so far) every second in JSON mode, nothing otherwise."""
    t0 = time.monotonic()
    if log.json:
        with _every_second(lambda: log.record("progress", stage=stage, unit="seconds", done=None, total=None,
                                              seconds=round(time.monotonic() - t0, 3), eta_seconds=None)):
            yield
        return
    if not (show and sys.stderr.isatty()):
        yield
        return
    with err_console.status(f"{stage} ...") as st, \
            _every_second(lambda: st.update(f"{stage} ... {time.monotonic() - t0:.0f} s")):
        yield


@contextmanager
def _every_second(tick: Callable[[], None]) -> Iterator[None]:
    """Call ``tick`` every second, in a thread of its own, while the block runs."""
    stop = threading.Event()

    def run() -> None:
        while not stop.wait(1.0):
            tick()
    th = threading.Thread(target=run, daemon=True)
    th.start()
    try:
        yield
    finally:
        stop.set()
        th.join()


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
    text = f"{text} Run `{terminal_safe(where)} --help` to see how to use it."
    if _json_requested[0]:
        _report_error(ExitCode.BAD_INPUT, "bad_usage", text)
    else:
        err_console.print(f"Error: {text}", markup=False)


def _tidy_help(cmd: Any) -> None:
    """Help that shows what it says: markup brackets in help texts escaped (so that
    ``[default: ...]`` and ``'ldptransform[dask]'`` are shown, never taken as styles), and flags
    shown as flags (no value type)."""
    import click

    if getattr(cmd, "_ldpt_tidy", False):
        return
    cmd._ldpt_tidy = True
    if cmd.help:
        cmd.help = _markup_escape(cmd.help)
    helper = cmd.get_help_option(click.Context(cmd))
    for param in [*cmd.params, *([helper] if helper is not None else [])]:
        if getattr(param, "help", None):
            param.help = _markup_escape(param.help)
        if getattr(param, "is_flag", False) and not getattr(param, "count", False):
            param.metavar = ""
    for sub in getattr(cmd, "commands", {}).values():
        _tidy_help(sub)


@contextmanager
def _help_width() -> Iterator[None]:
    """Help written to a file or a pipe: laid out 120 wide (never cut at 80 into ellipses)."""
    from typer import rich_utils

    saved = rich_utils.MAX_WIDTH
    if saved is None and not sys.stdout.isatty() and "COLUMNS" not in os.environ:
        rich_utils.MAX_WIDTH = 120
    try:
        yield
    finally:
        rich_utils.MAX_WIDTH = saved


class _Commands(TyperGroup):
    """The root command: click's usage errors as one paragraph on stderr (exit 2), SIGTERM as
    an interrupt, and an interrupt anywhere in a command as the one-line message (exit 130)."""

    def main(self, args: Any = None, prog_name: str | None = None, complete_var: str | None = None,
             standalone_mode: bool = True, windows_expand_args: bool = True, **extra: Any) -> Any:
        _tidy_help(self)
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode, windows_expand_args, **extra)
        _interrupt_told[0] = False
        _json_requested[0] = _wants_json_log([str(a) for a in (sys.argv[1:] if args is None else args)])
        with _sigterm_interrupts(), _help_width():
            try:
                rv = super().main(args, prog_name, complete_var, False, windows_expand_args, **extra)
            except _ClickException as err:
                if type(err).__name__ != "NoArgsIsHelpError":  # that one: the help is already shown
                    _usage_error(err)
                sys.exit(int(ExitCode.BAD_INPUT))
            except (typer.Abort, KeyboardInterrupt):
                _tell_interrupted()
                sys.exit(int(ExitCode.INTERRUPTED))
            finally:
                _json_requested[0] = False
        if rv == ExitCode.INTERRUPTED and not _interrupt_told[0]:  # typer's own: an interrupt while it read options
            _tell_interrupted()
        sys.exit(int(rv) if isinstance(rv, int) else 0)

    def invoke(self, ctx: Any) -> Any:
        try:
            return super().invoke(ctx)
        except KeyboardInterrupt:  # outside a command's _user_errors block (those say more)
            _tell_interrupted()
            raise typer.Exit(code=ExitCode.INTERRUPTED) from None


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
                    "allow_partial": "--allow-partial", "idempotent": "--idempotent", "overwrite": "--overwrite",
                    "delimiter": "--delimiter"}


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


# an operating-system error that says the environment failed (exit 6), not the paths given (exit 2);
# one that says a destination is taken is exit 5
_ENVIRONMENT_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT, errno.EACCES, errno.EPERM, errno.EROFS, errno.EIO,
                                 errno.EFBIG, errno.EMFILE, errno.ENFILE, errno.ENOMEM, errno.EBUSY, errno.ETXTBSY,
                                 errno.EXDEV, errno.EPIPE})
_EXISTS_ERRNOS = frozenset({errno.EEXIST, errno.ENOTEMPTY})


def os_error_code(err: OSError) -> tuple[int, str]:
    """The exit code and the log's kind of an OSError that reached the command line."""
    from .errors import OutputExistsError

    code = err.errno if isinstance(err.errno, int) else next(
        (c for t, c in _ERRNO_OF_TYPE if isinstance(err, t)), None)
    if code in _ENVIRONMENT_ERRNOS:
        return OutputError.exit_code, OutputError.kind
    if code in _EXISTS_ERRNOS:
        return OutputExistsError.exit_code, OutputExistsError.kind
    return LdptError.exit_code, "bad_path"


@contextmanager
def _user_errors(flags: dict[str, str] | None = None) -> Iterator[None]:
    try:
        yield
    except LdptError as err:
        # options by their flags, never as a Python call (the demo also passes --nonce on to the release)
        named = err.message_for(flags if flags is not None else _PRIVATIZE_FLAGS)
        _report_error(err.exit_code, err.kind, one_paragraph(named))
        raise typer.Exit(code=int(err.exit_code)) from None
    except OSError as err:
        code, kind = os_error_code(err)
        _report_error(code, kind, os_error_message(err))
        raise typer.Exit(code=code) from None
    except KeyboardInterrupt:
        _tell_interrupted(INTERRUPTED)
        raise typer.Exit(code=ExitCode.INTERRUPTED) from None
    except Exception as err:
        if not _interrupt_in_chain(err):
            raise
        _tell_interrupted(INTERRUPTED)
        raise typer.Exit(code=ExitCode.INTERRUPTED) from None


def _show_table(t: Table, console: Console | None = None) -> None:
    """A table shown whole: no cell is ever cut into an ellipsis (long cells wrap on a terminal);
    written to a file or a pipe, it is laid out as wide as its widest row, so nothing wraps either."""
    console = console if console is not None else out_console
    for col in t.columns:
        col.overflow = "fold"
        col.no_wrap = False
    if console.is_terminal:
        console.print(t)
        return
    from rich.measure import Measurement

    saved = console.width
    console.width = max(saved, Measurement.get(console, console.options.update_width(1 << 20), t).maximum)
    try:
        console.print(t)
    finally:
        console.width = saved


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
    input: str = typer.Argument(..., help="Raw table: a .csv, .tsv or .parquet file (text may be compressed: "
                                ".csv.gz, .csv.zst), or a Parquet dataset (a folder, or an object-store URI such as "
                                "s3://bucket/prefix)."),
    policy: Path = typer.Option(..., "--policy", help="Policy file (YAML or JSON)."),
    key: Path = typer.Option(..., "--key", help="Secret key file made by `ldpt key new`."),
    out: Path = typer.Option(..., "--out", help="Extract to write: a .csv or .parquet file, or a folder path "
                             "(no extension) for a Parquet dataset of parts; missing folders are created."),
    manifest: Path | None = typer.Option(None, "--manifest",
                                         help="Manifest path [default: OUT with .manifest.json]."),
    diagnostics: Path | None = typer.Option(
        None, "--diagnostics", help="Steward-only diagnostics file [default: in the steward's private folder: "
        "$LDPT_PRIVATE_DIR, else the state folder docs/commands.md names]."),
    batch_rows: int = typer.Option(65536, "--batch-rows", min=1, help="Rows per batch (memory; never the output)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing extract and manifest."),
    nonce: str | None = typer.Option(None, "--nonce", help="Reuse a release nonce (from a manifest) to "
                                     "reproduce that release bit for bit."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar on a terminal; only the summary line."),
    ledger: Path | None = typer.Option(
        None, "--ledger", help="Spend ledger to charge this release to (needs the policy's subject_key); a "
        "ledger is used automatically when the policy sets budget.lifetime_epsilon [default: none; with "
        "budget.lifetime_epsilon: ledger.sqlite3 in the private folder, $LDPT_PRIVATE_DIR]."),
    allow_partial: bool = typer.Option(
        False, "--allow-partial", help="With budget.lifetime_epsilon: release only the subjects still within "
        "it (the others' rows stay in place as placeholder rows, reports of random values) instead of refusing "
        "the whole release; the input is then read twice (who is held back is worked out first)."),
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
    idempotent: bool = typer.Option(False, "--idempotent", help="For nightly reruns: an identical release already "
                                    "at OUT (same input, policy, key and nonce record) is a no-op, exit 0, nothing "
                                    "charged or written; a different one there is refused, exit 5. Not with "
                                    "--overwrite."),
    delimiter: str | None = typer.Option(None, "--delimiter", help="The delimiter of a CSV/TSV input: one "
                                         "character, or the word tab; wins over the policy's input.csv_delimiter "
                                         "[default: the policy's; else a tab for .tsv/.tab, a comma otherwise]."),
    log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP),
) -> None:
    """Randomize INPUT column by column under POLICY into OUT, plus a public manifest.

    Example: ldpt privatize survey.csv --policy policy.yaml --key release.key --out extract.parquet
    """
    from .keys import load_key
    from .policy import load_policy
    from .release import privatize as run

    source: str | Path = input if "://" in input else Path(input)
    inputs = {"input": input, "policy": policy, "key": key, "out": out, "manifest": manifest, "ledger": ledger,
              "nonce": nonce}
    with _run_log("privatize", log_format, inputs) as log, _user_errors(_PRIVATIZE_FLAGS):
        lp = load_policy(policy)
        k = load_key(key)
        from .signing import after_release, prepare_release_signing

        sk = None if signing_key is None else prepare_release_signing(  # before anything is written
            signing_key, out, manifest, overwrite=overwrite,
            known=[("input", source if isinstance(source, Path) else None), ("policy file", policy), ("key file", key)])
        prog = _release_progress(log, source, lp, show=not quiet)
        from .io import csv_bytes_read

        token = csv_bytes_read.set(prog.at if prog.unit == "bytes" else None)
        try:
            with prog:
                res = run(source, lp, k, out, manifest_path=manifest, diagnostics_path=diagnostics,
                          batch_rows=batch_rows, overwrite=overwrite, nonce=nonce, on_progress=prog.add_rows,
                          ledger_path=ledger, allow_partial=allow_partial, engine=engine.value, scheduler=scheduler,
                          fragment_rows=part_rows, idempotent=idempotent, delimiter=delimiter)
        finally:
            csv_bytes_read.reset(token)
        already = res.already_published
        signed = "" if already else after_release(res.manifest_path, sk, overwrite=overwrite)
        _privatize_summary(log, res, already, signed)


def _is_text_input(path: Path) -> bool:
    """A CSV/TSV file (also compressed: its progress is by the file's bytes read)."""
    from .io import input_kind

    try:
        return input_kind(path).format == "csv"
    except LdptError:
        return False


def _release_progress(log: RunLog, source: str | Path, lp: Any, show: bool) -> _Progress:
    """The release's progress: a CSV file by the bytes read in each pass (its size known), a
    Parquet file or dataset by the rows written (its row count known), else by rows."""
    from .io import TableSource

    if isinstance(source, Path) and _is_text_input(source) and source.is_file():
        return _Progress(log, "privatizing", source.stat().st_size, "bytes", show=show)
    total = None
    if (show and sys.stderr.isatty()) or log.json:
        try:  # only for the total: the release itself names any problem with the input
            total = TableSource(source, csv_null_values=lp.policy.input.csv_null_values,
                                csv_delimiter=lp.policy.input.csv_delimiter).num_rows
        except (LdptError, OSError, ValueError):
            total = None
    return _Progress(log, "privatizing", total, "rows", show=show)


def _column_summaries(res: Any) -> list[dict[str, Any]]:
    """Per privatized column: mechanism and eps, with the steward-only counts of the values
    changed before randomizing (from the release's private diagnostics file)."""
    counts: dict[str, Any] = {}
    try:
        counts = json.loads(Path(res.diagnostics_path).read_text(encoding="utf-8")).get("columns") or {}
    except (OSError, ValueError, AttributeError):
        counts = {}
    out = []
    for c in res.manifest.columns:
        if c.mechanism is None:
            continue
        spec = c.mechanism
        out.append({"column": c.name, "type": c.type, "mechanism": spec.get("mechanism"),
                    "eps": spec.get("epsilon"),
                    "steward_only": counts.get(c.name) if isinstance(counts.get(c.name), dict) else None})
    return out


def _release_cautions(manifest: Any) -> list[str]:
    """The cautions of a release: columns in the clear, the input's row order, CSV cells a spreadsheet runs."""
    public = manifest.privacy.public_columns
    cautions = []
    if public:
        cautions.append(f"{len(public)} column(s) released in the clear, not protected: {', '.join(public)}")
    if manifest.privacy.row_order == "as-input":
        cautions.append("the rows keep the input's order (policy output.row_order: as-input): if the input is "
                        "sorted or grouped by anything, a row's neighbours tell about it")
    csv_caution = _csv_extract_caution(manifest)
    if csv_caution:
        cautions.append(csv_caution.removeprefix("; CAUTION: "))
    return cautions


def _privatize_summary(log: RunLog, res: Any, already: bool, signed: str) -> None:
    """What privatize tells the steward: records in JSON mode, else the summary lines."""
    eps = res.manifest.privacy.epsilon_per_row_used
    outputs = {"extract": str(res.extract_path), "manifest": str(res.manifest_path)}
    if not already:
        outputs["diagnostics"] = str(res.diagnostics_path)  # steward-only
    cautions = _release_cautions(res.manifest)
    if log.json:
        if not already:
            for col in _column_summaries(res):
                log.record("column", **col)
        log.result.update(outputs=outputs, rows=res.manifest.rows, eps=eps, release_id=res.ledger_release_id,
                          ledger=None if res.ledger_path is None else str(res.ledger_path),
                          nonce=res.manifest.nonce, already_published=already, cautions=cautions,
                          steward_only={"values_changed": list(res.column_counts), "warnings": list(res.warnings),
                                        "held_back_subjects": res.held_back_subjects,
                                        "held_back_rows": res.held_back_rows})
        if signed:
            log.result["signature"] = signed
        return
    if already:
        err_console.print(f"already published: {res.extract_path} (manifest {res.manifest_path}) is this very release "
                          f"(nonce {res.manifest.nonce}, eps {eps:g} per row); nothing was written, charged or "
                          "recorded", markup=False)
        return
    caution = "".join(f"; CAUTION: {c}" for c in cautions)
    # steward-only counts of the values changed before randomizing (the diagnostics file has them too)
    changed = "; values changed before randomizing (steward-only): " + "; ".join(res.column_counts) \
        if res.column_counts else ""
    err_console.print(f"privatized {res.manifest.rows} rows into {res.extract_path} (manifest {res.manifest_path}; "
                      f"steward-only diagnostics {res.diagnostics_path}) in {res.seconds:.1f} s, "
                      f"eps {eps:g} per row{caution}{changed}", markup=False)
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


def _quantile_table(name: str, title: str, qr: Any) -> None:
    """The one quantile of a column whose mechanism tracks a single quantile, and how its interval was made
    (nothing for other columns: ``qr`` None)."""
    if qr is None:
        return
    t = Table(title=title, title_justify="left")
    for h in ("statistic", "estimate", "se", "ci_low", "ci_high"):
        t.add_column(h, justify="left" if h == "statistic" else "right")
    t.add_row(f"{qr.q:g}-quantile", _num(qr.estimate, ".6g"), _num(qr.se, ".4g"), _num(qr.ci_low, ".6g"),
              _num(qr.ci_high, ".6g"))
    _show_table(t)
    _print(escape(f"{name} interval: {qr.method}"))


def _column_tables(name: str, col: ColumnResult) -> None:
    title = escape(f"{name}: {col.type}, {col.mechanism}, eps {col.epsilon:g}" +
                   (f", {col.rows_reported} rows reported" if col.rows_reported is not None else ""))
    if col.family == "frequency" or col.frequencies:   # a numeric column's frequencies: its share missing
        t = Table(title=title, title_justify="left")
        mle = col.decoder == "likelihood"   # the maximum-likelihood share is its own consistent version
        for h in ("value", "share", "se", "ci_low", "ci_high") if mle else \
                ("value", "share", "unbiased", "se", "ci_low", "ci_high"):
            t.add_column(h, justify="left" if h == "value" else "right")
        for f in col.frequencies:
            t.add_row(escape(f.value), *(_num(v, ".4f") for v in ((f.estimate, f.se, f.ci_low, f.ci_high) if mle else
                                                                  (f.consistent, f.estimate, f.se, f.ci_low,
                                                                   f.ci_high))))
        _show_table(t)
        if mle:   # how it converged (the whole method is printed once, above the tables)
            how = re.search(r"NOT converged[^)]*|converged in \d+ updates", col.decoder_method or "")
            _print(escape(f"{name} decoder: likelihood" + (f" ({how.group(0)})" if how else "")))
    if col.mean is not None:
        t = Table(title=title, title_justify="left")
        for h in ("statistic", "estimate", "se", "ci_low", "ci_high"):
            t.add_column(h, justify="left" if h == "statistic" else "right")
        m = col.mean
        t.add_row("mean", _num(m.estimate, ".6g"), _num(m.se, ".4g"), _num(m.ci_low, ".6g"), _num(m.ci_high, ".6g"))
        _show_table(t)
    _quantile_table(name, title, col.quantile)   # family "quantile": the one quantile its mechanism tracks
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
        _show_table(t)
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
    _show_table(t)


def _grouped_mean_table(g: GroupedMeanResult) -> None:
    t = Table(title=escape(f"mean of {g.column} by {g.by} ({g.rows_used} rows; delta-method SE; consistent: the "
                           f"mean clipped into the bounds of {g.column})"), title_justify="left")
    for h in (g.by, "mean", "se", "ci_low", "ci_high", "consistent", "group share"):
        t.add_column(escape(h), justify="left" if h == g.by else "right")
    for row in g.groups:
        m = row.mean
        t.add_row(escape(row.group), _num(m.estimate, ".6g"), _num(m.se, ".4g"), _num(m.ci_low, ".6g"),
                  _num(m.ci_high, ".6g"), _num(row.consistent, ".6g"), _num(row.share, ".4f"))
    _show_table(t)


def _estimate_table(result: EstimateResult) -> None:
    """Render an ``EstimateResult`` as tables (the default output of ``ldpt estimate``)."""
    cm = next((c.consistent_method for c in result.columns.values() if c.consistent_method and c.decoder is None),
              "norm-sub").split(" ")[0]
    _print(escape(f"{result.rows} rows" + (f" from {len(result.extracts)} merged extracts"
                                           if len(result.extracts) > 1 else "") +
                  f"; {result.confidence:.0%} intervals (normal approximation)."))
    if any(c.decoder is None and c.family == "frequency" for c in result.columns.values()):
        _print(escape(f"Frequencies: 'share' is the consistent estimate ({cm}: post-processed to a valid "
                      "distribution, slightly biased); 'unbiased' is the raw unbiased estimate, which may fall "
                      "outside [0, 1], with its SE and interval."))
    mle = next((c for c in result.columns.values() if c.decoder == "likelihood"), None)
    if mle is not None:
        _print(escape("Columns decoded with --decoder likelihood show the maximum-likelihood share as 'share', "
                      f"with its SE and interval; {mle.decoder_method}."))
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


def _rows_of(extracts: list[Path], manifests: list[Path] | None) -> int | None:
    """The rows of the extracts as their manifests say (for the progress; None if one cannot be read:
    the command itself names the problem)."""
    from .manifest import default_manifest_path, load_manifest

    paths = list(manifests) if manifests else [default_manifest_path(Path(e)) for e in extracts]
    try:
        return sum(load_manifest(Path(m)).rows for m in paths)
    except (LdptError, OSError, ValueError):
        return None


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
    decoder: str = typer.Option("projection", "--decoder", help="How frequency columns are decoded: projection "
                                "(unbiased shares) or likelihood (maximum-likelihood shares with parametric-"
                                "bootstrap intervals; docs/decoding.md)."),
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
    log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP),
) -> None:
    """Unbiased frequencies, means, cross-tabs, grouped means and quantiles with SEs and intervals.

    Example: ldpt estimate extract.parquet --crosstab site:role --mean-by pay:site --format json
    """
    from .estimate import estimate as run
    from .estimate import parse_pair, parse_quantiles
    from .io import write_text_atomic

    global out_console
    inputs = {"extracts": list(extracts), "manifests": list(manifest or []), "out": out, "public_key": public_key}
    with _run_log("estimate", log_format, inputs) as log, _user_errors():
        if out is not None:
            _check_estimate_out(out, extracts, manifest, overwrite)
        if public_key is not None:
            from .signing import require_signatures

            require_signatures(extracts, manifest, public_key)
        with _Progress(log, "decoding", _rows_of(extracts, manifest)) as prog:
            result = run(extracts, list(manifest) if manifest else None, confidence=confidence,
                         crosstabs=[parse_pair(x, "--crosstab") for x in crosstab or []],
                         mean_by=[parse_pair(x, "--mean-by") for x in mean_by or []],
                         quantiles=parse_quantiles(quantiles) if quantiles else None,
                         ranges=[_range(x) for x in range_ or []], consistency=consistency,
                         engine=engine.value, scheduler=scheduler, on_progress=prog.add, decoder=decoder)
        log.result.update(rows=result.rows, outputs={"estimates": "stdout" if out is None else str(out)},
                          format=format.value)
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
    log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP),
) -> None:
    """Check a release; exit 0 if every check passes, 1 if one fails.

    Integrity, privacy budget, output alphabet, no key material; with --raw and --key also
    bit-for-bit reproduction and calibration.

    Example: ldpt validate extract.parquet --raw survey.csv --key release.key
    """
    from .estimate import parse_quantiles
    from .validate import validate as run

    inputs = {"extract": extract, "manifest": manifest, "raw": raw, "key": key, "public_key": public_key}
    with _run_log("validate", log_format, inputs) as log:
        with _user_errors():
            k = _steward_key(raw, key, "re-deriving a release")
            with _Progress(log, "decoding", _rows_of([extract], [manifest] if manifest else None)) as prog:
                rep = run(extract, manifest, raw=raw, key=k, confidence=confidence,
                          quantiles=parse_quantiles(quantiles) if quantiles else None,
                          ranges=[_range(x) for x in range_ or []] or None, public_key=public_key,
                          on_progress=prog.add)
        log.result.update(ok=rep.ok, failed=[c.name for c in rep.checks if c.status == "fail"],
                          warned=[c.name for c in rep.checks if c.status == "warn"])
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
            _show_table(t)
            out_console.print("result: " + ("[green]all checks passed[/]" if rep.ok else "[bold red]FAILED[/]"))
        raise typer.Exit(code=ExitCode.OK if rep.ok else ExitCode.CHECK_FAILED)


# -- report ---------------------------------------------------------------------------------

@app.command()
def report(
    extract: Path = typer.Argument(..., help="Extract (.csv or .parquet, or a dataset folder) written by privatize."),
    out: Path = typer.Option(..., "--out", help="The report to write (NAME.html: one self-contained file)."),
    manifest: Path | None = typer.Option(None, "--manifest", help="Manifest [default: beside the extract]."),
    crosstab: list[str] | None = typer.Option(None, "--crosstab", help="A cross-tab of two categorical columns "
                                              "drawn as heat maps, e.g. site:role (repeatable)."),
    confidence: float = typer.Option(0.95, "--confidence", help="Confidence level of the intervals."),
    raw: Path | None = typer.Option(None, "--raw", help="Raw input (steward only): adds the truth against every "
                                    "estimate; the report is then the steward's, refused beside the partner's files."),
    key: Path | None = typer.Option(None, "--key", help="Secret key (steward only), with --raw."),
    diagnostics: Path | None = typer.Option(None, "--diagnostics", help="With --raw and --key: the release's "
                                            "steward-only diagnostics file, whose counts go in the steward's report."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing report file."),
    log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP),
) -> None:
    """Write a release report people can read: one HTML file, no network needed.

    The privacy statement in plain words, per column its estimand and estimates with interval
    bars, cross-tabs as heat maps, and the quality checks (pass, warn, fail). With --raw and
    --key: the steward's report, with the truth beside the estimates (steward only).

    Example: ldpt report extract.parquet --out report.html --crosstab site:role
    """
    from .estimate import parse_pair
    from .report import release_report

    inputs = {"extract": extract, "manifest": manifest, "raw": raw, "key": key, "out": out, "diagnostics": diagnostics}
    with _run_log("report", log_format, inputs) as log:
        with _user_errors():
            k = _steward_key(raw, key, "the steward's report")
            pairs = [parse_pair(x, "--crosstab") for x in crosstab or []]
            res = release_report(extract, out, manifest, crosstabs=pairs, confidence=confidence, raw=raw, key=k,
                                 diagnostics=diagnostics, overwrite=overwrite)
        log.result.update(res.to_dict())
        who = "the steward's report (STEWARD ONLY: holds true values)" if res.steward else "the partner's report"
        out_console.print(f"wrote {who}: {res.path} ({res.columns} columns, {res.crosstabs} cross-tabs, "
                          f"{res.figures} plots); quality checks: " + ("all passed" if res.checks_ok else "a check "
                          "FAILED (see the report)"), markup=False)
        raise typer.Exit(code=ExitCode.OK if res.checks_ok else ExitCode.CHECK_FAILED)


def _steward_key(raw: Path | None, key: Path | None, what: str) -> Any:
    """The key of --key (None without it); --raw and --key go together."""
    from .keys import load_key

    if (raw is None) != (key is None):
        from .errors import UsageError

        raise UsageError(f"--raw and --key go together: {what} needs both the raw input and the secret key "
                         "(steward only).")
    return load_key(key) if key is not None else None


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

def _data_check_report(report: Any, format: TableJson) -> None:
    """`policy check --data`: the steward-only report of the policy against the raw table, on stdout."""
    if format == TableJson.json:
        sys.stdout.write(json_text(report.to_dict()))
        return
    from .datacheck import STEWARD_ONLY

    c = report.counts()
    out_console.print(f"{STEWARD_ONLY}. {report.policy} against {report.table} ({report.rows} rows): {c['error']} "
                      f"error(s), {c['warning']} warning(s), {c['note']} note(s)", markup=False)
    from .datacheck import example_text

    def examples(f: Any) -> str:
        return "; ".join(f"{r}: {example_text(v)}" for r, v in f.examples)

    if report.findings and out_console.is_terminal:
        t = Table(title=None)
        for h in ("column", "problem", "severity", "rows", "examples (data row: value)", "what a release does"):
            t.add_column(h)
        for f in report.findings:
            t.add_row(escape(f.column if f.column is not None else "-"), f.kind, f.severity,
                      "-" if f.rows is None else str(f.rows), escape(examples(f)), escape(f.message))
        _show_table(t)
    for f in report.findings if not out_console.is_terminal else ():  # plain text: one block per problem
        rows = "" if f.rows is None else f", {f.rows} row(s)"
        out_console.print(f"{f.severity}: column {f.column!r}: {f.kind}{rows}" if f.column is not None else
                          f"{f.severity}: {f.kind}{rows}", markup=False)
        if f.examples:
            out_console.print(f"  examples (data row: value): {examples(f)}", markup=False)
        out_console.print(f"  {f.message}", markup=False)
    out_console.print("data check: " + ("passed (no error or warning)" if report.ok else "FAILED (errors or "
                      "warnings above; fix the table or the policy and check again)"), markup=False)


@policy_app.command("check")
def policy_check(policy: Path = typer.Argument(..., help="Policy file to check."),
                 data: Path | None = typer.Option(None, "--data", help="Also check the policy against this raw table "
                                                  "(CSV or Parquet, read as a release reads it): every problem of "
                                                  "every column in one pass, with example rows and raw values "
                                                  "(steward only); exit 1 if an error or warning is found."),
                 format: TableJson = typer.Option(TableJson.table, "--format", help="Output format of the data "
                                                  "check (with --data)."),
                 delimiter: str | None = typer.Option(None, "--delimiter", help="The delimiter of a CSV/TSV table "
                                                      "given with --data: one character, or the word tab; wins "
                                                      "over the policy's input.csv_delimiter.")) -> None:
    """Check a policy file and show what each column becomes; with --data, check it against the raw table.

    Example: ldpt policy check policy.yaml --data survey.csv
    """
    from .policy import load_policy

    with _user_errors():
        if (format == TableJson.json or delimiter is not None) and data is None:
            from .errors import UsageError

            flag = "--format json is the shape of" if format == TableJson.json else "--delimiter is for the table of"
            raise UsageError(f"policy check: {flag} the data check; give --data TABLE with it, or leave it out to "
                             "see what each column becomes.")
        lp = load_policy(policy)
        if data is not None:
            from .datacheck import check_data

            report = check_data(lp, data, delimiter=delimiter)
    if data is not None:
        _data_check_report(report, format)
        raise typer.Exit(code=ExitCode.OK if report.ok else ExitCode.CHECK_FAILED)
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
    _show_table(t)
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


@policy_app.command("draft")
def policy_draft(
    table: Path = typer.Argument(..., help="The raw table (CSV or Parquet) to propose a policy for."),
    out: Path | None = typer.Option(None, "--out", help="Where to write the draft (.yaml) [default: the steward's "
                                    "private folder, TABLE-NAME.policy-draft.yaml]; never beside an extract or "
                                    "manifest."),
    min_count: int = typer.Option(20, "--min-count", help="Rows a category needs to be proposed as its own; rarer "
                                  "values go to <other> (20: common practice, no published source)."),
    target_se: float = typer.Option(0.02, "--target-se", help="SE of each frequency share the suggested eps must "
                                    "meet at the table's row count (through the planner)."),
    target_relative_se: float = typer.Option(0.02, "--target-relative-se", help="SE of a mean, as a share of the "
                                             "width of its bounds, the suggested eps must meet."),
    delimiter: str | None = typer.Option(None, "--delimiter", help="The delimiter of a CSV/TSV table: one "
                                         "character, or the word tab; written into the draft's input.csv_delimiter "
                                         "[default: a tab for .tsv/.tab, a comma otherwise]."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing draft at --out."),
) -> None:
    """Write a commented starter policy from a table's profile, for the steward to review line by line.

    Example: ldpt policy draft survey.csv --out ~/private/survey-policy.yaml
    """
    from .starter import draft_policy

    with _user_errors({"min_count": "--min-count", "target_se": "--target-se",
                       "target_relative_se": "--target-relative-se", "delimiter": "--delimiter"}):
        res = draft_policy(table, out, min_count=min_count, target_se=target_se,
                           target_relative_se=target_relative_se, overwrite=overwrite, delimiter=delimiter)
    out_console.print(f"draft policy written to {res.path} (mode 0600; steward-only): {res.rows} rows profiled",
                      markup=False)
    for line in res.summary_lines():
        out_console.print(f"  {line}", markup=False)
    if res.subject_key is not None:
        out_console.print(f"  subject_key proposed (commented out): {terminal_safe(res.subject_key)}", markup=False)
    out_console.print(f"eps per row: {res.epsilon_per_row:g} (the sum of the suggested column eps)", markup=False)
    out_console.print("This is a DRAFT: review every line marked REVIEW with the privacy officer before any "
                      "release (eps is a policy choice; public columns are not protected; columns together can be "
                      "linked), then run `ldpt policy check` on it.", markup=False)


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


def _joint_verdicts(result: dict) -> None:
    """Joint groups of a plan: the joint report against separate columns, per statistic."""
    for c in result["columns"]:
        if c.get("type") == "joint":
            for st in c["statistics"]:
                out_console.print(f"joint group {c['name']}, {st.get('note')}", markup=False)


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
    _show_table(t)
    out_console.print(f"eps per row: {result['epsilon_per_row']:g} of the budget "
                      f"{result['epsilon_per_row_budget']:g} (strategy {result['strategy']})", markup=False)
    _joint_verdicts(result)
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
                                 "policy's quality targets, and compare with budget.strategy sample (a search: "
                                 "it may take minutes; a progress bar on a terminal shows the steps done and the "
                                 "time left)."),
    log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP),
) -> None:
    """Predict each statistic's standard error before a release, against the policy's quality targets.

    Example: ldpt plan --policy policy.yaml --rows 20000 --suggest
    """
    from .plan import plan as make_plan
    from .plan import suggest as make_suggestion
    from .policy import load_policy

    with _run_log("plan", log_format, {"policy": policy, "rows": rows}) as log:
        with _user_errors():
            lp = load_policy(policy)
            result = make_plan(lp, rows).to_dict()
            if suggest:
                with _Progress(log, "suggesting an eps split", None, "steps") as prog:
                    def told(done: int, total: int | None) -> None:
                        prog.total = total   # known before the search: the first call says it
                        prog.add(done - prog.done)

                    result["suggestion"] = make_suggestion(lp, rows, on_progress=told)
        log.result.update(targets_missed=list(result.get("targets_missed", [])),
                          impossible=list(result.get("impossible", [])))
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
    log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP),
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

    with _run_log("audit", log_format, {"policy": policy, "manifest": manifest, "rows": rows}) as log:
        with _user_errors():
            if (policy is None) == (manifest is None):
                raise UsageError("give exactly one of --policy FILE (audit a policy file) and --manifest FILE (audit "
                                 "the policy embedded in a release's manifest).")
            with _status(log, "auditing (releases of generated inputs)"):
                if policy is not None:
                    res = run(load_policy(policy), rows=rows, confidence=confidence)
                else:
                    assert manifest is not None
                    res = audit_manifest(manifest, rows=rows, confidence=confidence)
        log.result.update(ok=res.ok, failed=[c.column for c in res.columns if not c.ok])
        if format == TableJson.json:
            sys.stdout.write(json_text(res.to_dict()))
        else:
            _audit_table(res)
        raise typer.Exit(code=ExitCode.OK if res.ok else ExitCode.CHECK_FAILED)


def _audit_table(res: Any) -> None:
    t = Table(title=escape(f"audit of {res.policy}: {res.rows} rows per side, confidence {res.confidence:g}"),
              title_justify="left")
    for name in ("column", "mechanism", "eps", "eps lower bound", "status", "worst pair and event"):
        t.add_column(name, overflow="fold")
    for c in res.columns:
        w = c.worst
        where = f"{w.first} over {w.second}: {w.event}" if w is not None else ""
        t.add_row(escape(c.column), escape(c.mechanism), f"{c.epsilon:.4g}", f"{c.epsilon_lower:.4f}",
                  "[green]pass[/]" if c.ok else "[bold red]fail[/]", escape(where))
    _show_table(t)
    out_console.print(f"{res.seconds:.1f} s. A lower bound at or below eps does not prove a release private; "
                      "one above eps shows a violation.", markup=False)
    out_console.print("result: " + ("[green]no violation found[/]" if res.ok else "[bold red]VIOLATION[/]"))


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

ledger_app = typer.Typer(no_args_is_help=True, help="The spend ledger (steward only): eps spent per subject "
                         "over releases.")
app.add_typer(ledger_app, name="ledger")


def _ledger_path(ledger: Path | None) -> Path:
    from .ledger import default_ledger_path

    return ledger if ledger is not None else default_ledger_path()


_LEDGER_OPTION_HELP = "Ledger file [default: ledger.sqlite3 in the private folder, $LDPT_PRIVATE_DIR]."


@ledger_app.command("show")
def ledger_show(ledger: Path | None = typer.Option(None, "--ledger", help=_LEDGER_OPTION_HELP),
                format: TableJson = typer.Option(TableJson.table, "--format", help="Output format."),
                log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP)) -> None:
    """Summarize the ledger: releases, eps recorded, per-subject spend (steward only: it depends on the data).

    Example: ldpt ledger show --format json
    """
    from .ledger.report import ledger_summary

    with _run_log("ledger show", log_format, {"ledger": ledger}) as log:
        with _user_errors():
            summary = ledger_summary(_ledger_path(ledger))
        log.result.update(ledger=summary.ledger, releases=summary.releases, head=summary.head)
        if format == TableJson.json:
            sys.stdout.write(json_text(summary.to_dict()))
            return
        _ledger_show_table(summary)


def _ledger_show_table(summary: Any) -> None:
    t = Table(title=escape(f"ledger {summary.ledger}: {summary.releases} release(s)"), title_justify="left")
    for h in ("release", "time (UTC)", "eps per row", "subjects charged", "lifetime eps"):
        t.add_column(h)
    for r in summary.release_list:
        cap = r.lifetime_epsilon
        t.add_row(str(r.id), escape(str(r.time)), f"{r.eps_per_row:g}", str(r.subjects_charged),
                  "-" if cap is None else f"{cap:g}")
    _show_table(t)
    out_console.print(f"eps per row summed over releases: {summary.eps_per_row_summed_over_releases:g}; "
                      f"head hash {summary.head} (keep a copy elsewhere to anchor the chain)", markup=False)
    out_console.print(f"STEWARD ONLY, {summary.steward_only}:", markup=False)
    out_console.print(f"  subjects in the ledger: {summary.subjects}", markup=False)
    if summary.spend_quantiles is not None:
        q = ", ".join(f"q{k} {v:g}" for k, v in summary.spend_quantiles.items())
        out_console.print(f"  eps spent per subject: {q}", markup=False)
    if summary.near_cap is not None:
        near = ", ".join(f"{k} of the cap: {v}" for k, v in summary.near_cap.items())
        out_console.print(f"  subjects near the lifetime eps {summary.lifetime_epsilon:g} (counts): {near}; "
                          f"least remaining eps {summary.least_remaining_eps:g}", markup=False)


@ledger_app.command("verify")
def ledger_verify(ledger: Path | None = typer.Option(None, "--ledger", help=_LEDGER_OPTION_HELP),
                  format: TableJson = typer.Option(TableJson.table, "--format", help="Output format: table (one "
                                                   "line) or json (ok, releases, first_broken, detail, head, "
                                                   "damaged)."),
                  log_format: LogFormat = typer.Option(LogFormat.text, _LOG_OPTION, help=_LOG_HELP)) -> None:
    """Recompute the ledger's hash chain; exit 0 if intact, 1 if broken (naming the first broken release) or damaged.

    Example: ldpt ledger verify --ledger ~/private/ledger.sqlite3
    """
    from .ledger.report import ledger_check

    with _run_log("ledger verify", log_format, {"ledger": ledger}) as log:
        with _user_errors():
            res = ledger_check(_ledger_path(ledger))
        log.result.update(ok=res.ok, releases=res.releases, first_broken=res.first_broken, damaged=res.damaged)
        if format == TableJson.json:
            sys.stdout.write(json_text(res.to_dict()))
        elif res.damaged:  # empty, not a ledger or damaged: a failed check, as a broken chain
            out_console.print(res.detail, markup=False)
        elif res.ok:
            out_console.print(f"ledger {res.ledger}: {res.detail}; head {res.head}", markup=False)
        else:
            where = f"release {res.first_broken}" if res.first_broken is not None else "the ledger"
            out_console.print(f"ledger {res.ledger}: BROKEN at {where}: {res.detail}", markup=False)
        raise typer.Exit(code=ExitCode.OK if res.ok else ExitCode.CHECK_FAILED)


@app.command("exit-codes")
def exit_codes(format: TableJson = typer.Option(TableJson.table, "--format", help="Output format.")) -> None:
    """List ldpt's exit codes and what each means (also in README.md and docs/pipelines.md)."""
    if format == TableJson.json:
        sys.stdout.write(json_text([{"code": int(c), "name": c.name.lower(), "meaning": m}
                                    for c, m in EXIT_CODE_MEANINGS.items()]))
        return
    t = Table(title="exit codes of ldpt", title_justify="left")
    t.add_column("code", justify="right")
    t.add_column("meaning")
    for c, m in EXIT_CODE_MEANINGS.items():
        t.add_row(str(int(c)), escape(m))
    _show_table(t)


def main() -> None:
    try:
        app()
    except SystemExit as done:
        if done.code == ExitCode.INTERRUPTED:
            _forget_unhandled_interrupt()
        raise
    except KeyboardInterrupt:
        sys.stderr.write("interrupted: stopped before finishing.\n")
        _forget_unhandled_interrupt()
        sys.exit(int(ExitCode.INTERRUPTED))
    except Exception as err:  # a bug: show where, never locals (they may hold key material)
        if _interrupt_in_chain(err):  # an interrupt Python wrapped (during a lazy import): not a bug
            sys.stderr.write("interrupted: stopped before finishing.\n")
            _forget_unhandled_interrupt()
            sys.exit(int(ExitCode.INTERRUPTED))
        sys.stderr.write("ldpt: internal error (a bug). Please report it with this traceback:\n")
        sys.stderr.write(terminal_safe(traceback.format_exc(limit=20), keep_layout=True))  # data-derived text too
        sys.exit(int(ExitCode.INTERNAL))


if __name__ == "__main__":
    main()
