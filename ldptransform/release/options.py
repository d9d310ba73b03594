"""The options of a release, validated once (``ReleaseOptions.of``) into a frozen dataclass.

A mistake is an ``OptionError`` naming the Python parameters (``privatize(batch_rows=0):
batch_rows must be ...``); the command line shows the same message in its own flag names
(``OptionError.message_for``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..errors import OptionError, UsageError
from ..io import FileFormat, delimiter_option, delimiter_problem, file_format, is_dataset_output
from ..keys import check_nonce, new_nonce
from ..manifest import default_manifest_path
from ..policy import LoadedPolicy

DEFAULT_BATCH_ROWS = 65536
ENGINES = ("local", "dask")


@dataclass(frozen=True)
class ReleaseOptions:
    """Everything ``privatize`` was asked, checked and with its defaults filled in."""

    input: Any                    # a Path, a dataset URI (str) or a dask DataFrame
    out: Path
    manifest_path: Path
    diagnostics_path: Path | None  # None: a fresh name in the private folder (publish.diagnostics_destination)
    batch_rows: int
    fragment_rows: int
    overwrite: bool
    nonce: str
    ledger_path: Path | None       # None: no ledger for this release
    lifetime_epsilon: float | None
    allow_partial: bool
    engine: str
    scheduler: str | None
    dataset_out: bool             # ``out`` names a folder: a Parquet dataset of parts
    fmt_out: FileFormat
    idempotent: bool = False      # an identical release already published is a no-op (release/rerun.py)
    nonce_given: bool = False     # the caller chose the nonce (a rerun must then be of that nonce)
    extract_text: str | None = None  # how the nonce record names the extract (None: its path)
    delimiter: str | None = None  # a text input's delimiter, chosen by the caller (None: io.resolve_delimiter)

    @property
    def memory_kind(self) -> str | None:
        """The kind of an in-memory input (memory.KINDS: a pandas DataFrame, a pyarrow Table or
        RecordBatchReader); None for a path, a URI or a dask DataFrame."""
        if isinstance(self.input, (str, Path)):
            return None
        from ..memory import input_kind

        return input_kind(self.input)

    @property
    def frame_input(self) -> bool:
        """The input is a dask DataFrame (``engine_dask.privatize_frame``)."""
        return not isinstance(self.input, (str, Path)) and self.memory_kind is None

    @property
    def input_text(self) -> str:
        if self.memory_kind is not None:
            from ..memory import KINDS

            return KINDS[self.memory_kind]
        return "a dask DataFrame" if self.frame_input else str(self.input)

    @property
    def out_text(self) -> str:
        """How the steward's records name the extract."""
        return self.extract_text if self.extract_text is not None else str(self.out)

    @classmethod
    def of(cls, input_path: Any, policy: LoadedPolicy, out: Path | str, *, manifest_path: Path | str | None,
           diagnostics_path: Path | str | None, batch_rows: int, overwrite: bool, nonce: str | None,
           ledger_path: Path | str | None, allow_partial: bool, engine: str, scheduler: str | None,
           fragment_rows: int | None, idempotent: bool = False, delimiter: str | None = None) -> ReleaseOptions:
        from ..dataset import DEFAULT_FRAGMENT_ROWS, is_uri

        if isinstance(input_path, (str, Path)) and not is_uri(input_path):
            input_path = Path(input_path)
        out = Path(out)
        dataset_out = is_dataset_output(out)
        fmt_out = "parquet" if dataset_out else file_format(out, "output")
        fragment_rows = DEFAULT_FRAGMENT_ROWS if fragment_rows is None else int(fragment_rows)
        _check_sizes(batch_rows, fragment_rows)
        _check_engine(engine, scheduler, out, dataset_out)
        if idempotent and overwrite:
            raise OptionError("privatize(idempotent=True, overwrite=True)",
                              "{idempotent} and {overwrite} ask for opposite things: {idempotent} keeps an identical "
                              "release already published (and refuses a different one), {overwrite} replaces "
                              "whatever is there with a new release. Give one of them.")
        cap = policy.policy.budget.lifetime_epsilon
        return cls(input=input_path, out=out,
                   manifest_path=Path(manifest_path) if manifest_path else default_manifest_path(out),
                   diagnostics_path=Path(diagnostics_path) if diagnostics_path is not None else None,
                   batch_rows=batch_rows, fragment_rows=fragment_rows, overwrite=overwrite,
                   nonce=_nonce(nonce), ledger_path=_ledger(policy, ledger_path, allow_partial, cap),
                   lifetime_epsilon=cap, allow_partial=allow_partial, engine=engine, scheduler=scheduler,
                   dataset_out=dataset_out, fmt_out=fmt_out, idempotent=idempotent, nonce_given=bool(nonce),
                   delimiter=_delimiter(delimiter))


def _delimiter(delimiter: str | None) -> str | None:
    """The caller's delimiter (``io.delimiter_option``: the word tab is a tab), checked."""
    if delimiter is None:
        return None
    if not isinstance(delimiter, str):
        raise OptionError(f"privatize(delimiter={delimiter!r})", "{delimiter} must be one character of text.")
    value = delimiter_option(delimiter)
    problem = delimiter_problem(value)
    if problem is not None:
        raise OptionError(f"privatize(delimiter={delimiter!r})", f"the {{delimiter}} {value!r} {problem}. Give "
                          "another delimiter.")
    return value


def _check_sizes(batch_rows: int, fragment_rows: int) -> None:
    if batch_rows < 1:
        raise OptionError(f"privatize(batch_rows={batch_rows!r})", "{batch_rows} must be a positive number of rows")
    if fragment_rows < 1:
        raise OptionError(f"privatize(fragment_rows={fragment_rows!r})",
                          "the rows per output part ({fragment_rows}) must be a positive number")


def _check_engine(engine: str, scheduler: str | None, out: Path, dataset_out: bool) -> None:
    if engine not in ENGINES:
        raise OptionError(f"privatize(engine={engine!r})", f"{{engine}} {engine!r} is not known; use one of: "
                          f"{', '.join(ENGINES)}.")
    if engine == "dask" and not dataset_out:
        raise OptionError(f"privatize(engine='dask', out={str(out)!r})",
                          f"{{engine='dask'}} writes a Parquet dataset (one part per input fragment, written in "
                          f"parallel): give {{out}} a folder path without a file extension (for example "
                          f"{out.with_suffix('')}/), not the file {out}.")
    if scheduler is not None and engine != "dask":
        raise OptionError(f"privatize(scheduler={scheduler!r}, engine={engine!r})",
                          "{scheduler} applies only with {engine='dask'}.")


def _nonce(nonce: str | None) -> str:
    if not nonce:
        return new_nonce()
    try:
        return check_nonce(nonce, "{nonce}")
    except UsageError as err:
        raise OptionError(f"privatize(nonce={nonce!r})", str(err)) from None


def _ledger(policy: LoadedPolicy, ledger_path: Path | str | None, allow_partial: bool,
            cap: float | None) -> Path | None:
    """The ledger this release is charged to (None: none), checked against the policy."""
    if allow_partial and cap is None:
        raise OptionError("privatize(allow_partial=True)",
                          f"{{allow_partial}} applies only with a lifetime budget: policy {policy.source} does not "
                          "set budget.lifetime_epsilon. Set it, or leave out {allow_partial}.")
    if ledger_path is None and cap is None:
        return None
    call = f"privatize(ledger_path={str(ledger_path) if ledger_path is not None else None!r})"
    if policy.policy.subject_key is None:
        raise OptionError(call, f"{{ledger_path}} needs policy field 'subject_key' (the input column that identifies "
                          f"a person, whose spend the ledger adds up); policy {policy.source} does not set it. Add "
                          "subject_key: COLUMN to the policy, or leave out {ledger_path}.")
    from ..ledger import default_ledger_path

    path = Path(ledger_path) if ledger_path is not None else default_ledger_path()
    if not path.exists() and not path.parent.is_dir():
        raise OptionError(call, f"cannot create ledger {path}: folder {path.parent} does not exist. Create it first "
                          "(private to the steward, like the key), or give another {ledger_path}.")
    return path
