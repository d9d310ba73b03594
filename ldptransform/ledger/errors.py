"""The ledger's errors."""

from __future__ import annotations

from ..errors import LdptError


class LedgerError(LdptError):
    """The ledger file is missing, not a ledger, unsafe, or the call does not fit it."""


class BudgetExhaustedError(LedgerError):
    """Recording a release would take some subjects over their lifetime eps."""
