"""Errors a user can cause and fix.

Every error here carries a one-paragraph message that says what went wrong, where
(file, column, field) and how to fix it.  The command line prints the message and
exits with the class's ``exit_code`` (``ExitCode``: 2 for most, 4 for a refusal for
privacy, 5 for an output that already exists, 6 for a failure of the environment); it
never prints a traceback for these.  ``kind`` names the class in the command line's
JSON log (a stable string, never a Python name).  Messages name counts and row
numbers, never raw values from the data, and never key material.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from enum import IntEnum
from typing import ClassVar


class ExitCode(IntEnum):
    """The exit codes of ``ldpt`` (README.md and docs/pipelines.md list them)."""

    OK = 0
    CHECK_FAILED = 1  # validate, ledger verify or audit ran and a check failed
    BAD_INPUT = 2  # bad input or usage: policy, data, key, manifest, paths, options
    INTERNAL = 3  # a bug: the only case with a traceback
    PRIVACY_REFUSED = 4  # refused for privacy: lifetime budget exhausted, a nonce reused
    OUTPUT_EXISTS = 5  # the output exists (no --overwrite), or a rerun whose published release differs
    ENVIRONMENT = 6  # the environment failed: disk full, permission denied writing an output
    INTERRUPTED = 130  # SIGINT, SIGTERM or SIGHUP


# what each code means, in the words the docs and `ldpt exit-codes` use
EXIT_CODE_MEANINGS: dict[ExitCode, str] = {
    ExitCode.OK: "success (validate, ledger verify, audit, policy check --data, report: every check passed; "
                 "privatize --idempotent: the identical release was already published)",
    ExitCode.CHECK_FAILED: "a check ran and failed (validate, ledger verify, audit, policy check --data, report)",
    ExitCode.BAD_INPUT: "bad input or usage (policy, data, key, manifest, paths, options): fix what the message "
                        "names and run again",
    ExitCode.INTERNAL: "internal error (a bug): a traceback is printed; please report it",
    ExitCode.PRIVACY_REFUSED: "refused for privacy: the lifetime budget of some subjects is exhausted, or a "
                              "release nonce would be reused with other data or another policy",
    ExitCode.OUTPUT_EXISTS: "the output already exists (give --overwrite to replace it), or an --idempotent "
                            "rerun found a different release already published there",
    ExitCode.ENVIRONMENT: "the environment failed: disk full, permission denied or a read-only file system "
                          "while writing an output, or another job writing the same destination",
    ExitCode.INTERRUPTED: "interrupted (Ctrl-C, SIGTERM, SIGHUP): nothing was left at the destination",
}

# Characters a terminal acts on instead of showing: C0 controls, DEL, C1 controls (8-bit CSI,
# OSC ...), the bidirectional marks, embeddings, overrides and isolates that reorder what is
# shown, and the Unicode line and paragraph separators.
_UNSAFE = re.compile("[\x00-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028-\u202e\u2066-\u2069]")
_UNSAFE_KEEP_LAYOUT = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028-\u202e\u2066-\u2069]")


def _visible(m: re.Match[str]) -> str:
    c = ord(m.group())
    return f"\\x{c:02x}" if c < 0x100 else f"\\u{c:04x}"


def terminal_safe(text: str, *, keep_layout: bool = False) -> str:
    """``text`` with every character a terminal would act on (escape sequences that clear the
    screen or set the window title, other control characters, bidi overrides) written as a
    visible escape (``\\x1b``, ``\\u202e``); everything else is kept.  Use it on any text that
    comes from data or files (column and category names, labels, paths, policy text) before it
    is shown.  ``keep_layout``: keep newlines and tabs (for text already laid out for a terminal)."""
    return (_UNSAFE_KEEP_LAYOUT if keep_layout else _UNSAFE).sub(_visible, text)


def one_paragraph(text: str) -> str:
    """A message as one paragraph on a terminal: line breaks and runs of white space (also
    from upstream libraries' messages) collapsed into single spaces, control characters made
    visible (``terminal_safe``)."""
    return terminal_safe(" ".join(text.split()))


class LdptError(Exception):
    """Base class for user-fixable errors (exit code 2 unless a subclass says otherwise)."""

    exit_code: ClassVar[int] = ExitCode.BAD_INPUT
    kind: ClassVar[str] = "bad_input"

    def message_for(self, flags: Mapping[str, str] | None = None) -> str:
        """The message as a front end shows it: ``flags`` maps Python option names to its own
        (only ``OptionError`` names options; every other error reads the same everywhere)."""
        return str(self)


class PolicyError(LdptError):
    """The policy file is unreadable or does not describe a valid release."""

    kind: ClassVar[str] = "bad_policy"


class DataError(LdptError):
    """The input table does not match the policy (types, domains, missing values)."""

    kind: ClassVar[str] = "bad_data"


class InputFileError(LdptError):
    """An input file is missing, unreadable or in an unsupported format."""

    kind: ClassVar[str] = "bad_input_file"


class KeyFileError(LdptError):
    """The secret key file is missing, malformed or readable by others."""

    kind: ClassVar[str] = "bad_key"


class OutputExistsError(LdptError):
    """The destination exists and --overwrite was not given (or an idempotent rerun found a
    different release there)."""

    exit_code: ClassVar[int] = ExitCode.OUTPUT_EXISTS
    kind: ClassVar[str] = "output_exists"


class ManifestError(LdptError):
    """The manifest is missing, unreadable or inconsistent with the extract."""

    kind: ClassVar[str] = "bad_manifest"


class UsageError(LdptError):
    """Options that contradict each other or do not fit the files given."""

    kind: ClassVar[str] = "bad_usage"


class OutputError(LdptError):
    """An output file could not be written or moved into place: the environment failed (disk
    full, permission denied, another job holding the destination)."""

    exit_code: ClassVar[int] = ExitCode.ENVIRONMENT
    kind: ClassVar[str] = "environment"


class OptionError(UsageError):
    """A Python option out of range or at odds with another, named as the caller wrote it.

    ``text`` names options as ``{name}`` (or ``{name=value}`` for an option with a value):
    ``str(err)`` is ``call: text`` with Python names (``privatize(batch_rows=0): batch_rows must
    be ...``, ``engine='dask'``); ``message_for(flags)`` is the text in a command line's names
    (``--batch-rows must be ...``, ``--engine dask``), for the option names ``flags`` maps."""

    kind: ClassVar[str] = "bad_option"

    def __init__(self, call: str, text: str) -> None:
        self.call, self.text = call, text
        super().__init__(f"{call}: {self._render(None)}")

    def _render(self, flags: Mapping[str, str] | None) -> str:
        def one(m: re.Match[str]) -> str:
            name, value = m.group(1), m.group(2)
            if flags is None or name not in flags:
                return name if value is None else f"{name}={value}"
            return flags[name] if value is None else f"{flags[name]} {value.strip(chr(39))}"
        return re.sub(r"\{(\w+)(?:=([^}]*))?\}", one, self.text)

    def __reduce__(self) -> tuple[type, tuple[str, str]]:  # picklable (errors may cross processes)
        return (type(self), (self.call, self.text))

    def message_for(self, flags: Mapping[str, str] | None = None) -> str:
        return self._render(flags) if flags else str(self)


class NonceReusedError(OptionError):
    """A release nonce already used with this key on other input data or another policy: refused
    for privacy (two such releases share their noise, so comparing them shows the changed cells)."""

    exit_code: ClassVar[int] = ExitCode.PRIVACY_REFUSED
    kind: ClassVar[str] = "nonce_refused"
