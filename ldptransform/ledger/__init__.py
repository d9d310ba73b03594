"""The spend ledger (steward only): how much eps each subject has spent over all releases.

    store.py    the SQLite store: opening, columnar state, hash chain, record, verify, show
    schema.py   the file's layout and its checks before use (empty, not a ledger, damaged), SQLite's
                failures in plain words
    charges.py  the charges of a release (per subject, against the lifetime budget)
    hashes.py   keyed digests of subjects and values (nothing raw goes in)
    errors.py   LedgerError, BudgetExhaustedError, LedgerDamagedError
"""

from .charges import (
                    CAP_TOLERANCE,
                    ChargePlan,
                    LedgerCharges,
                    MemoColumn,
                    aggregate,
                    cap_plan,
                    charges_of,
                    check_cap,
)
from .errors import BudgetExhaustedError, LedgerDamagedError, LedgerError
from .hashes import (DIGEST, DIGEST_BYTES, as_digests, distinct, memo_value_hashes, subject_digests, subject_hashes,
                     value_hashes)
from .store import (
                    APPLICATION_ID,
                    BUSY_TIMEOUT_S,
                    DEFAULT_NAME,
                    GENESIS,
                    PART_BYTES,
                    SCHEMA_VERSION,
                    SPEND_NOTE,
                    Ledger,
                    ReleaseMeta,
                    VerifyResult,
                    _decode_spend,
                    _encode_spend,
                    _Index,
                    default_ledger_path,
)

__all__ = ["APPLICATION_ID", "BUSY_TIMEOUT_S", "CAP_TOLERANCE", "DEFAULT_NAME", "DIGEST", "GENESIS", "PART_BYTES",
           "SCHEMA_VERSION", "SPEND_NOTE", "BudgetExhaustedError", "ChargePlan", "Ledger", "LedgerCharges",
           "LedgerDamagedError", "LedgerError", "MemoColumn", "ReleaseMeta", "VerifyResult", "_Index", "_decode_spend",
           "_encode_spend", "aggregate", "as_digests", "cap_plan", "charges_of", "check_cap", "default_ledger_path",
           "DIGEST_BYTES", "distinct", "memo_value_hashes", "subject_digests", "subject_hashes", "value_hashes"]
