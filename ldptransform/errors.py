"""Errors a user can cause and fix.

Every error here carries a one-paragraph message that says what went wrong, where
(file, column, field) and how to fix it.  The command line prints the message and
exits with ``exit_code`` (2); it never prints a traceback for these.  Messages name
counts and row numbers, never raw values from the data, and never key material.
"""

from __future__ import annotations

from typing import ClassVar


class LdptError(Exception):
    """Base class for user-fixable errors (exit code 2)."""

    exit_code: ClassVar[int] = 2


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
