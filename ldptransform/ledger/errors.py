"""The ledger's errors."""

from __future__ import annotations

from ..errors import LdptError


class LedgerError(LdptError):
    """The ledger file is missing, not a ledger, unsafe, or the call does not fit it."""


class BudgetExhaustedError(LedgerError):
    """Recording a release would take some subjects over their lifetime eps."""


class LedgerDamagedError(LedgerError):
    """The file at the ledger's path is empty, is not a ledger, or is a damaged one (a missing
    table or header row, wrong column types, pages SQLite cannot read).  Such a file is never
    re-created nor changed: a new ledger in its place would forget everyone's spent eps.
    `ldpt ledger verify` reports it as a failed check (exit 1); every other command as a user
    error (exit 2)."""
