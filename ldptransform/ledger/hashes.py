"""Keyed digests of subjects and values: nothing raw goes into a ledger.

A subject is stored only as a 32-byte keyed digest (the AES-based PRF of
``random.bits.SubjectPRF``, evaluated for a whole batch at once) under keys derived from the
release key with labels of their own ("ledger", "subject-hash/v2"), and a last value only as a
keyed digest of (subject digest, value code) under per-column keys ("ledger", "value-hash/v2",
column, ...).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..keys import SecretKey
from ..random.bits import SubjectPRF
from .errors import LedgerError

_SUBJECT_LABELS = ("ledger", "subject-hash/v2")
_VALUE_LABELS = ("ledger", "value-hash/v2")
DIGEST = np.dtype("S32")


def _encode_values(values: Any, what: str) -> tuple[np.ndarray, np.ndarray]:
    """Values as their UTF-8 text form (42 and "42" are the same subject), returned as
    (concatenated bytes, n + 1 int64 offsets) straight from the Arrow buffers: no per-value
    Python objects."""
    if isinstance(values, (pa.ChunkedArray, pa.Array)):
        arr = values
    else:
        arr = pa.array(np.asarray(values).tolist() if isinstance(values, np.ndarray) and values.dtype.kind in "SV"
                       else values)
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    nulls = arr.null_count
    if nulls:
        raise LedgerError(f"{what}: {nulls} value(s) are missing. Every row charged to the ledger needs a "
                          "subject identifier: fill or drop those rows before the release.")
    if pa.types.is_floating(arr.type):
        raise LedgerError(f"{what}: identifiers are floating-point numbers (type {arr.type}); their text form "
                          "is ambiguous. Read the identifier column as text or whole numbers.")
    if not (pa.types.is_binary(arr.type) or pa.types.is_large_binary(arr.type)):
        try:
            arr = pc.cast(arr, pa.large_string()) if not pa.types.is_large_string(arr.type) else arr
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise LedgerError(f"{what}: values of type {arr.type} cannot be used as identifiers; use text or "
                              "whole numbers.") from None
    binary = pc.cast(arr, pa.large_binary())
    if isinstance(binary, pa.ChunkedArray):
        binary = binary.combine_chunks()
    n = len(binary)
    bufs = binary.buffers()
    offs = np.frombuffer(bufs[1], dtype=np.int64)[binary.offset: binary.offset + n + 1] if n else np.zeros(1, np.int64)
    data = np.frombuffer(bufs[2], dtype=np.uint8) if n and bufs[2] is not None else np.zeros(0, dtype=np.uint8)
    return data, offs


def _keyed_digests(prf: SubjectPRF, data: np.ndarray, offs: np.ndarray,
                   codes: np.ndarray | None = None) -> np.ndarray:
    """32-byte keyed digests of n byte strings (and int64 codes), dtype S32, all rows at once:
    the 128-bit seed of ``SubjectPRF`` (an encrypted CBC-MAC over a length-prefixed, hence
    prefix-free, encoding: a PRF) expanded to four 64-bit words.  Collisions are governed by
    the 128-bit seed (about n^2 / 2^129: negligible for any table)."""
    n = len(offs) - 1
    if n <= 0:
        return np.zeros(0, dtype=DIGEST)
    codes = np.zeros(n, dtype=np.int64) if codes is None else np.asarray(codes, dtype=np.int64)
    words = prf.words(prf.seeds(data, offs, codes), 4)
    return np.ascontiguousarray(words, dtype="<u8").view(DIGEST).reshape(-1)


def subject_hashes(key: SecretKey, subject_values: Any) -> np.ndarray:
    """Keyed hashes of subject identifiers: an array of dtype S32 (32-byte digests).

    Use ``arr.tobytes()`` (or ``as_digests``) rather than indexing single elements: numpy
    drops trailing zero bytes when it hands out one S32 element.
    """
    return _keyed_digests(SubjectPRF(key, *_SUBJECT_LABELS), *_encode_values(subject_values, "subject identifiers"))


def value_hashes(key: SecretKey, column: str, values: Any) -> np.ndarray:
    """Keyed hashes of a column's values (per-column sub-key), dtype S32."""
    return _keyed_digests(SubjectPRF(key, *_VALUE_LABELS, column),
                          *_encode_values(values, f"values of column {column!r}"))


def memo_value_hashes(key: SecretKey, column: str, context: bytes, subject_h: np.ndarray,
                      codes: np.ndarray) -> np.ndarray:
    """Keyed hashes of (subject, value code) for a memoized column, dtype S32, under per-column
    keys that also bind ``context`` (the column's memo context: mechanism spec and grid); the
    message is the subject's keyed hash with the code.  The subject is in the message so that
    two subjects with the same value do not share a hash (no equality classes, hence no
    frequency analysis, in the ledger); a changed mechanism or grid gives another hash, so the
    next release is charged, as its randomness is fresh."""
    h = as_digests(subject_h)
    data = np.frombuffer(h.tobytes(), dtype=np.uint8)
    offs = np.arange(0, 32 * len(h) + 1, 32, dtype=np.int64)
    return _keyed_digests(SubjectPRF(key, *_VALUE_LABELS, column, b"memo-context", context), data, offs, codes)


def as_digests(h: Any, what: str = "subject hashes") -> np.ndarray:
    """Accept S32 / V32 arrays, (n, 32) uint8 arrays or a list of 32-byte strings; return contiguous S32."""
    if isinstance(h, (list, tuple)):
        if any(not isinstance(x, (bytes, bytearray)) or len(x) != 32 for x in h):
            raise LedgerError(f"{what} must be 32-byte digests from ledger.subject_hashes.")
        return np.frombuffer(b"".join(h), dtype=DIGEST) if h else np.zeros(0, dtype=DIGEST)
    a = np.asarray(h)
    if a.dtype.kind in "SV" and a.dtype.itemsize == 32 and a.ndim == 1:
        return np.ascontiguousarray(a).view(DIGEST)
    if a.dtype == np.uint8 and a.ndim == 2 and a.shape[1] == 32:
        return np.ascontiguousarray(a).view(DIGEST).reshape(-1)
    raise LedgerError(f"{what} must be 32-byte digests from ledger.subject_hashes (got an array of dtype "
                      f"{a.dtype} and shape {a.shape}).")
