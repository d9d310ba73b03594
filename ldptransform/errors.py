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
