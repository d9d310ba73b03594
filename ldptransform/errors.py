"""Errors a user can cause and fix.

Every error here carries a one-paragraph message that says what went wrong, where
(file, column, field) and how to fix it.  The command line prints the message and
exits with ``exit_code`` (2); it never prints a traceback for these.  Messages name
counts and row numbers, never raw values from the data, and never key material.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import ClassVar

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
    """Base class for user-fixable errors (exit code 2)."""

    exit_code: ClassVar[int] = 2

    def message_for(self, flags: Mapping[str, str] | None = None) -> str:
        """The message as a front end shows it: ``flags`` maps Python option names to its own
        (only ``OptionError`` names options; every other error reads the same everywhere)."""
        return str(self)


class PolicyError(LdptError):
    """The policy file is unreadable or does not describe a valid release."""


class DataError(LdptError):
    """The input table does not match the policy (types, domains, missing values)."""


class InputFileError(LdptError):
    """An input file is missing, unreadable or in an unsupported format."""


class KeyFileError(LdptError):
    """The secret key file is missing, malformed or readable by others."""


class OutputExistsError(LdptError):
    """The destination exists and --overwrite was not given."""


class ManifestError(LdptError):
    """The manifest is missing, unreadable or inconsistent with the extract."""


class UsageError(LdptError):
    """Options that contradict each other or do not fit the files given."""


class OutputError(LdptError):
    """An output file could not be written or moved into place."""


class OptionError(UsageError):
    """A Python option out of range or at odds with another, named as the caller wrote it.

    ``text`` names options as ``{name}`` (or ``{name=value}`` for an option with a value):
    ``str(err)`` is ``call: text`` with Python names (``privatize(batch_rows=0): batch_rows must
    be ...``, ``engine='dask'``); ``message_for(flags)`` is the text in a command line's names
    (``--batch-rows must be ...``, ``--engine dask``), for the option names ``flags`` maps."""

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
