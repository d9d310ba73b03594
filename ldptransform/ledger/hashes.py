"""Keyed digests of subjects and values: nothing raw goes into a ledger.

Every digest is 16 bytes (dtype ``S16``), the output of a keyed pseudorandom function (PRF)
built on AES-256 under keys derived from the release key (``SecretKey.subkey``, HMAC-SHA256)
with labels of their own, so digests of one kind never meet another's keys:

- a subject: ``subject_hashes``, labels ("ledger/v3", "subject", ...);
- a value of a column: ``value_hashes``, labels ("ledger/v3", "value", column, ...);
- a memoized column's last value: ``memo_value_hashes``, labels ("ledger/v3", "memo-value",
  column, memo context), a digest of (subject digest, value code).

Subjects and values are hashed with an encrypted CBC-MAC over a prefix-free message (block 0 is
the byte length as a big-endian u64 and eight zero bytes, then the bytes zero-padded to whole
16-byte blocks): ``AES(k_final, CBC-MAC(k_chain, message))``, a PRF on messages of any length.
A memoized value is hashed with the CBC-MAC of the two-block message (value code block, subject
digest), ``AES(k, AES(k, code block) XOR subject digest)``, under a key used for no message of
another length: CBC-MAC on messages of one fixed length is a PRF.  The subject is in the
message so that two subjects with the same value do not share a digest (no equality classes,
hence no frequency analysis, in the ledger).

All rows are hashed at once: one AES-ECB call over the whole batch per block position (the
blocks that depend only on a length or a value code are encrypted once per distinct length or
code), each row stopping after its own blocks, so a row's digest depends only on its own
message.  Collisions of 128-bit PRF outputs are about n^2 / 2^129: negligible for any table
(one in 10^26 at 10^6 subjects).  Without the key the digests cannot be linked to identifiers or
values; with it, anyone can test a guess, so a ledger is as sensitive as the key.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from ..keys import SecretKey
from .errors import LedgerError

HASH_VERSION = "ledger/v3"  # 16-byte AES-based digests (schema 3); schema 2 kept 32-byte digests
DIGEST = np.dtype("S16")
DIGEST_BYTES = DIGEST.itemsize


def _ecb(key: bytes, blocks: np.ndarray) -> np.ndarray:
    """AES-256-ECB of (n, 16) uint8 blocks, into a new (n, 16) array (no intermediate bytes)."""
    n = len(blocks)
    out = np.empty(16 * n + 16, dtype=np.uint8)  # update_into needs room for one block more
    if n:
        enc = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
        enc.update_into(np.ascontiguousarray(blocks, dtype=np.uint8).data, out.data)
    return out[:16 * n].reshape(n, 16)


def _rows(blocks: np.ndarray, which: np.ndarray) -> np.ndarray:
    """``blocks[which]`` of (n, 16) uint8 blocks, gathered as 16-byte items (numpy gathers the
    rows of a 2-D byte array several times slower)."""
    return np.ascontiguousarray(blocks).view("V16").reshape(-1)[which].view(np.uint8).reshape(-1, 16)


def _few_distinct(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(v, return_inverse=True)`` of int64 values, by counting when they span a short
    range (lengths, value codes: linear time, no sort)."""
    if len(v) == 0:
        return v[:0], np.zeros(0, dtype=np.int64)
    lo, hi = int(v.min()), int(v.max())
    if hi - lo >= 1 << 20:
        uniq, inv = np.unique(v, return_inverse=True)
        return uniq, inv.reshape(-1)
    present = np.bincount(v - lo, minlength=hi - lo + 1) > 0
    uniq = np.flatnonzero(present)
    rank = np.cumsum(present) - 1
    return uniq + lo, rank[v - lo]


class _MessageMAC:
    """The encrypted CBC-MAC of length-prefixed byte strings under two derived keys."""

    __slots__ = ("_chain", "_final")

    def __init__(self, key: SecretKey, *labels: str | bytes) -> None:
        self._chain = key.subkey(HASH_VERSION, *labels, "chain")
        self._final = key.subkey(HASH_VERSION, *labels, "final")

    def digests(self, data: np.ndarray, offs: np.ndarray) -> np.ndarray:
        """Digests (dtype S16) of the n byte strings data[offs[i]:offs[i + 1]]."""
        n = len(offs) - 1
        if n <= 0:
            return np.zeros(0, dtype=DIGEST)
        lens = np.diff(offs)
        # block 0 depends only on the length: encrypted once per distinct length
        uniq_len, which = _few_distinct(lens)
        head = np.zeros((len(uniq_len), 2), dtype=">u8")
        head[:, 0] = uniq_len.astype(np.uint64)
        state = _rows(_ecb(self._chain, head.view(np.uint8).reshape(-1, 16)), which.reshape(-1))
        nblocks = -(-lens // 16)
        width = int(nblocks.max()) * 16
        if width:
            start = int(offs[0])
            total = int(offs[-1]) - start
            raw = np.asarray(data, dtype=np.uint8)[start:start + total]
            if len(uniq_len) == 1:  # identifiers of one length: the bytes are already a matrix
                mat = np.zeros((n, width), dtype=np.uint8)
                mat[:, :int(uniq_len[0])] = raw.reshape(n, int(uniq_len[0]))
            else:  # byte t goes to row r, column t - start(r): flat index t + r * width - start(r)
                mat = np.zeros((n, width), dtype=np.uint8)
                shift = np.arange(n, dtype=np.int64) * width - (offs[:-1] - start)
                mat.reshape(-1)[np.arange(total, dtype=np.int64) + np.repeat(shift, lens)] = raw
            for b in range(width // 16):
                block = mat[:, 16 * b:16 * b + 16]
                active = nblocks > b
                if active.all():
                    state = _ecb(self._chain, state ^ block)
                else:
                    state[active] = _ecb(self._chain, state[active] ^ block[active])
        return _ecb(self._final, state).view(DIGEST).reshape(-1)


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


def subject_hashes(key: SecretKey, subject_values: Any) -> np.ndarray:
    """Keyed digests of subject identifiers: an array of dtype S16 (16-byte digests).

    Use ``arr.tobytes()`` (or ``as_digests``) rather than indexing single elements: numpy
    drops trailing zero bytes when it hands out one S16 element.
    """
    return _MessageMAC(key, "subject").digests(*_encode_values(subject_values, "subject identifiers"))


def subject_digests(key: SecretKey, data: np.ndarray, offs: np.ndarray) -> np.ndarray:
    """``subject_hashes`` of identifiers already given as their UTF-8 bytes (concatenated, with
    n + 1 int64 offsets): the same digests, without converting them again."""
    return _MessageMAC(key, "subject").digests(np.asarray(data, dtype=np.uint8), np.asarray(offs, dtype=np.int64))


def value_hashes(key: SecretKey, column: str, values: Any) -> np.ndarray:
    """Keyed digests of a column's values (per-column keys), dtype S16."""
    return _MessageMAC(key, "value", column).digests(*_encode_values(values, f"values of column {column!r}"))


def memo_value_hashes(key: SecretKey, column: str, context: bytes, subject_h: np.ndarray,
                      codes: np.ndarray) -> np.ndarray:
    """Keyed digests of (subject, value code) for a memoized column, dtype S16, under a per-column
    key that also binds ``context`` (the column's memo context: mechanism spec and grid): the
    CBC-MAC of the two blocks (code as a big-endian i64 after eight zero bytes, subject digest).
    A changed mechanism or grid gives another digest, so the next release is charged, as its
    randomness is fresh."""
    h = as_digests(subject_h)
    n = len(h)
    if n == 0:
        return np.zeros(0, dtype=DIGEST)
    k = key.subkey(HASH_VERSION, "memo-value", column, b"memo-context", context)
    uniq, which = _few_distinct(np.asarray(codes, dtype=np.int64))
    blocks = np.zeros((len(uniq), 2), dtype=">i8")
    blocks[:, 1] = uniq
    first = _ecb(k, blocks.view(np.uint8).reshape(-1, 16))  # once per distinct code
    state = _rows(first, which.reshape(-1))
    state ^= np.ascontiguousarray(h).view(np.uint8).reshape(n, 16)
    return _ecb(k, state).view(DIGEST).reshape(-1)


def equal_digests(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Element-wise equality of two S16 arrays of one length, as two 64-bit words each (numpy
    compares S16 strings, and reduces rows of two, several times slower)."""
    x = np.ascontiguousarray(a).view("<u8").reshape(-1, 2) ^ np.ascontiguousarray(b).view("<u8").reshape(-1, 2)
    return (x[:, 0] | x[:, 1]) == 0


def prefix64(h: np.ndarray) -> np.ndarray:
    """The first 8 bytes of each digest as a big-endian u64: sorts like the digests' leading bytes."""
    return np.ascontiguousarray(np.ascontiguousarray(h).view(np.uint8).reshape(-1, DIGEST_BYTES)[:, :8]).view(
        ">u8").reshape(-1)


def radix_order(keys: np.ndarray) -> np.ndarray:
    """The stable permutation that sorts u64 ``keys``: a least-significant-digit radix sort in
    four 16-bit passes (numpy sorts 16-bit keys by counting, in linear time), faster than
    ``np.argsort`` on a million keys."""
    keys = np.asarray(keys, dtype=np.uint64)
    n = len(keys)
    if n < 1 << 16:  # small: one comparison sort is cheaper than four passes
        return np.argsort(keys, kind="stable")
    order = np.argsort((keys & np.uint64(0xFFFF)).astype(np.uint16), kind="stable")
    for shift in (16, 32, 48):
        digit = ((keys[order] >> np.uint64(shift)) & np.uint64(0xFFFF)).astype(np.uint16)
        order = order[np.argsort(digit, kind="stable")]
    return order


def distinct(h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(the distinct digests in byte order, the place of each given digest among them), as
    ``np.unique(h, return_inverse=True)`` but sorting the 64-bit prefixes (numpy sorts S16
    strings several times slower); digests that share a prefix without being equal (about
    n^2 / 2^65) fall back to sorting whole digests."""
    h = as_digests(h)
    n = len(h)
    if n == 0:
        return h, np.zeros(0, dtype=np.int64)
    keys = prefix64(h)
    if n > 1 and np.all(keys[1:] > keys[:-1]):  # already sorted and distinct (a release's charged subjects)
        return h, np.arange(n, dtype=np.int64)
    order = radix_order(keys)
    ks = keys[order]
    hs = h[order]
    tie = ks[1:] == ks[:-1]
    if not tie.any():  # every subject once (one row per person): no groups to form
        inv = np.empty(n, dtype=np.int64)
        inv[order] = np.arange(n, dtype=np.int64)
        return hs, inv
    words = np.ascontiguousarray(hs).view("<u8").reshape(n, 2)
    same = tie & (words[1:, 1] == words[:-1, 1])
    if (tie & ~same).any():  # two different digests with one prefix: sort whole digests
        uniq, inv = np.unique(h, return_inverse=True)
        return uniq, inv.reshape(-1).astype(np.int64)
    start = np.concatenate([[True], ~same])
    group = np.cumsum(start) - 1
    inv = np.empty(n, dtype=np.int64)
    inv[order] = group
    return hs[start], inv


def as_digests(h: Any, what: str = "subject hashes") -> np.ndarray:
    """Accept S16 / V16 arrays, (n, 16) uint8 arrays or a list of 16-byte strings; return contiguous S16."""
    if isinstance(h, (list, tuple)):
        if any(not isinstance(x, (bytes, bytearray)) or len(x) != DIGEST_BYTES for x in h):
            raise LedgerError(f"{what} must be {DIGEST_BYTES}-byte digests from ledger.subject_hashes.")
        return np.frombuffer(b"".join(h), dtype=DIGEST) if h else np.zeros(0, dtype=DIGEST)
    a = np.asarray(h)
    if a.dtype.kind in "SV" and a.dtype.itemsize == DIGEST_BYTES and a.ndim == 1:
        return np.ascontiguousarray(a).view(DIGEST)
    if a.dtype == np.uint8 and a.ndim == 2 and a.shape[1] == DIGEST_BYTES:
        return np.ascontiguousarray(a).view(DIGEST).reshape(-1)
    raise LedgerError(f"{what} must be {DIGEST_BYTES}-byte digests from ledger.subject_hashes (got an array of "
                      f"dtype {a.dtype} and shape {a.shape}).")
