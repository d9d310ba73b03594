"""The ledger's errors."""

from __future__ import annotations

from typing import ClassVar

from ..errors import ExitCode, LdptError


class LedgerError(LdptError):
    """The ledger file is missing, not a ledger, unsafe, or the call does not fit it."""

    kind: ClassVar[str] = "bad_ledger"


class BudgetExhaustedError(LedgerError):
    """Recording a release would take some subjects over their lifetime eps: refused for privacy."""

    exit_code: ClassVar[int] = ExitCode.PRIVACY_REFUSED
    kind: ClassVar[str] = "budget_refused"


class LedgerDamagedError(LedgerError):
    """The file at the ledger's path is empty, is not a ledger, or is a damaged one (a missing
    table or header row, wrong column types, pages SQLite cannot read).  Such a file is never
    re-created nor changed: a new ledger in its place would forget everyone's spent eps.
    `ldpt ledger verify` reports it as a failed check (exit 1); every other command as a user
    error (exit 2)."""

    kind: ClassVar[str] = "ledger_damaged"
