"""Secret keys, release nonces and the keyed pseudorandom function (PRF).

The PRF is the only source of release noise.  It is AES-256 in counter mode under a
sub-key derived (HMAC-SHA256) from the steward's secret key, the release nonce, the
column name and a purpose label.  The 128-bit counter block of row ``r`` and block
``b`` is ``r * blocks_per_row + b``, so the words a row receives depend only on
(key, nonce, column, purpose, global row index) and never on how rows are batched or
split across workers.  numpy's generators are not used for release noise: they are
fast but predictable.

Keys are 32 bytes from the operating system's CSPRNG, stored as one line of hex
under a header line, in a file created with mode 0600.  The manifest carries only a
fingerprint (an HMAC of a fixed label), never the key.
"""

from __future__ import annotations

import hashlib
import hmac
import math
import os
import secrets
import stat
from pathlib import Path

import numpy as np
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from .errors import KeyFileError, UsageError

KEY_HEADER = "ldptransform secret key v1"
KEY_BYTES = 32
NONCE_BYTES = 16
PRF_VERSION = "aes256-ctr/hmac-sha256-subkeys/v1"
_U53 = 1.0 / (1 << 53)


class SecretKey:
    """32 bytes of secret key material.  Never printed, logged or serialized."""

    __slots__ = ("_raw",)

    def __init__(self, raw: bytes) -> None:
        if len(raw) != KEY_BYTES:
            raise KeyFileError(f"a secret key must be {KEY_BYTES} bytes, got {len(raw)}")
        self._raw = bytes(raw)

    def __repr__(self) -> str:
        return "SecretKey(<redacted>)"

    __str__ = __repr__

    def __reduce__(self):  # keys must not travel by pickle by accident
        raise TypeError("SecretKey cannot be pickled")

    @classmethod
    def generate(cls) -> "SecretKey":
        return cls(secrets.token_bytes(KEY_BYTES))

    def fingerprint(self) -> str:
        """A public identifier of the key: HMAC(key, label), 16 hex characters."""
        return hmac.new(self._raw, b"ldptransform/key-fingerprint/v1", hashlib.sha256).hexdigest()[:16]

    def subkey(self, *labels: str | bytes) -> bytes:
        msg = b"ldptransform/prf/v1"
        for label in labels:
            b = label.encode("utf-8") if isinstance(label, str) else label
            msg += len(b).to_bytes(4, "big") + b  # length-prefixed: no ambiguity
        return hmac.new(self._raw, msg, hashlib.sha256).digest()

    def contains_in(self, text: str) -> bool:
        """True if this key's material appears in ``text`` (hex or base64 forms)."""
        import base64

        forms = {self._raw.hex(), self._raw.hex().upper(), base64.b64encode(self._raw).decode(),
                 base64.urlsafe_b64encode(self._raw).decode().rstrip("=")}
        return any(f in text for f in forms)


def new_key_file(path: Path) -> SecretKey:
    """Write a new key to ``path`` with mode 0600.  Refuses to overwrite."""
    path = Path(path)
    if path.exists():
        raise KeyFileError(
            f"key file {path} already exists; ldpt never overwrites a key (releases made with it "
            "could no longer be reproduced or audited). Choose another path, or move the old key "
            "away yourself if you really mean to retire it.")
    if not path.parent.exists():
        raise KeyFileError(f"cannot create key file {path}: folder {path.parent} does not exist. "
                           "Create the folder first (keep it private to the steward).")
    key = SecretKey.generate()
    text = f"{KEY_HEADER}\n{key._raw.hex()}\n"
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except OSError as err:
        raise KeyFileError(f"cannot create key file {path}: {err.strerror}. "
                           "Check that the folder is writable.") from None
    try:
        os.fchmod(fd, 0o600)
        os.write(fd, text.encode("ascii"))
        os.fsync(fd)
    finally:
        os.close(fd)
    return key


def shared_access(st: os.stat_result) -> str | None:
    """For a file that must stay private to its owner (key, ledger): None if no other user may
    read or write it, else how it is open ("mode 0644"), for the caller's message."""
    return f"mode {stat.S_IMODE(st.st_mode):04o}" if st.st_mode & 0o077 else None


def load_key(path: Path) -> SecretKey:
    """Read a key file; refuse a missing, malformed or group/other-readable one."""
    path = Path(path)
    try:
        st = path.stat()
    except FileNotFoundError:
        raise KeyFileError(f"key file {path} does not exist. Create one with `ldpt key new {path}` "
                           "(and keep it: the same key is needed to reproduce or audit a release).") from None
    except OSError as err:
        raise KeyFileError(f"cannot read key file {path}: {err.strerror}.") from None
    if not stat.S_ISREG(st.st_mode):
        raise KeyFileError(f"key file {path} is not a regular file. Point --key at the file made by `ldpt key new`.")
    open_to = shared_access(st)
    if open_to:
        raise KeyFileError(
            f"key file {path} can be read or written by other users ({open_to}). "
            f"A secret key must be private to the steward: run `chmod 600 {path}` and consider whether "
            "the key has been exposed (if so, make a new one with `ldpt key new`).")
    try:
        text = path.read_text(encoding="ascii")
    except (OSError, UnicodeDecodeError):
        raise KeyFileError(f"key file {path} is not a key file written by `ldpt key new` "
                           "(it is not plain ASCII text).") from None
    lines = [ln.strip() for ln in text.strip().splitlines()]
    if len(lines) != 2 or lines[0] != KEY_HEADER:
        raise KeyFileError(f"key file {path} is malformed: expected the line '{KEY_HEADER}' followed by "
                           f"{2 * KEY_BYTES} hex characters. Use a file made by `ldpt key new`.")
    try:
        raw = bytes.fromhex(lines[1])
    except ValueError:
        raw = b""
    if len(raw) != KEY_BYTES:
        raise KeyFileError(f"key file {path} is malformed: its second line must be {2 * KEY_BYTES} hex "
                           "characters. Use a file made by `ldpt key new`.")
    return SecretKey(raw)


def new_nonce() -> str:
    return secrets.token_hex(NONCE_BYTES)


def check_nonce(nonce: str, where: str = "--nonce") -> str:
    try:
        raw = bytes.fromhex(nonce)
    except ValueError:
        raw = b""
    if len(raw) != NONCE_BYTES:
        raise UsageError(f"{where} must be {2 * NONCE_BYTES} hex characters (the 'nonce' field of the "
                         "manifest of the release to reproduce).")
    return raw.hex()


_ZEROS: list[memoryview] = [memoryview(bytes(0))]


def _zeros(nbytes: int) -> memoryview:
    """A read-only zero buffer of ``nbytes`` (one shared buffer, grown to the largest size asked)."""
    z = _ZEROS[0]
    if len(z) < nbytes:
        z = memoryview(bytes(nbytes))
        _ZEROS[0] = z
    return z[:nbytes]


class KeyedStream:
    """Pseudorandom 64-bit words for one (key, nonce, column, purpose) stream.

    ``words(row_start, n_rows, per_row)`` returns an array of shape (n_rows, per_row)
    of uint64 words for global rows ``row_start .. row_start+n_rows-1``.  ``per_row``
    is rounded up to an even number internally (one AES block gives two words);
    callers must always ask with the same ``per_row`` for a stream.
    """

    __slots__ = ("_cipher_key", "label")

    def __init__(self, key: SecretKey, nonce: str, *path: str) -> None:
        self._cipher_key = key.subkey(bytes.fromhex(nonce), *path)
        self.label = "/".join(path)

    def __repr__(self) -> str:
        return f"KeyedStream({self.label!r})"

    def words(self, row_start: int, n_rows: int, per_row: int) -> np.ndarray:
        blocks = (per_row + 1) // 2
        if n_rows == 0:
            return np.zeros((0, per_row), dtype=np.uint64)
        first = row_start * blocks
        iv = first.to_bytes(16, "big")
        enc = Cipher(algorithms.AES(self._cipher_key), modes.CTR(iv)).encryptor()
        nbytes = 16 * blocks * n_rows
        # encrypt a shared zero buffer straight into the result (update_into needs room for one
        # block more): no zero-filled input and no copy of the output for each call
        out = np.empty(nbytes // 8 + 2, dtype="<u8")
        enc.update_into(_zeros(nbytes), out.view(np.uint8))
        return out[: nbytes // 8].reshape(n_rows, 2 * blocks)[:, :per_row]

    def words_at(self, rows: np.ndarray, draws: np.ndarray) -> np.ndarray:
        """One uint64 word for each (global row index, draw index) pair, for samplers that
        need an unbounded number of words per row (rejection loops).

        The word for (row r, draw j) is the first 8 bytes (little-endian) of
        AES-256(stream key, block), where the 128-bit block is big-endian
        ``(2^63 + j) * 2^64 + r``: the draw index with its top bit set in the high 64 bits,
        the row index in the low 64 bits (r < 2^64, j < 2^63).  So a word depends only on
        (key, nonce, stream path, r, j), never on which other pairs are asked for with it
        or in what order, and distinct pairs are distinct AES inputs.  The top bit keeps
        these blocks apart from the counter blocks of ``words`` (below 2^127 for any
        release) even under the same stream key; the release still gives such a column a
        stream of its own.  ``rows`` and ``draws`` are broadcast together.
        """
        r, j = np.broadcast_arrays(np.asarray(rows), np.asarray(draws))
        if r.size == 0:
            return np.zeros(r.shape, dtype=np.uint64)
        if (r < 0).any() or (j < 0).any():
            raise ValueError("words_at: row and draw indices must be non-negative")
        j = j.astype(np.uint64)
        if (j >> np.uint64(63)).any():
            raise ValueError("words_at: draw indices must be below 2^63")
        blocks = np.empty(r.shape + (2,), dtype=">u8")
        blocks[..., 0] = j | np.uint64(1 << 63)
        blocks[..., 1] = r.astype(np.uint64)
        enc = Cipher(algorithms.AES(self._cipher_key), modes.ECB()).encryptor()
        out = enc.update(blocks.tobytes()) + enc.finalize()
        return np.frombuffer(out, dtype="<u8").reshape(r.shape + (2,))[..., 0].copy()


def to_unit(words: np.ndarray) -> np.ndarray:
    """uint64 words -> floats uniform on the 2^-53 grid in [0, 1)."""
    return (words >> np.uint64(11)).astype(np.float64) * _U53


def unit_below(words: np.ndarray, t: float) -> np.ndarray:
    """``to_unit(words) < t`` exactly, by one integer comparison (no float array).

    to_unit(w) = m * 2^-53 with m = w >> 11, and for integer m, m * 2^-53 < t iff
    m < ceil(t * 2^53) iff w < ceil(t * 2^53) * 2^11 (all exact for 0 < t < 1).
    """
    t = float(t)
    if not t > 0.0:
        return np.zeros(words.shape, dtype=bool)
    if t >= 1.0:
        return np.ones(words.shape, dtype=bool)
    return words < np.uint64(math.ceil(t * (1 << 53)) << 11)


def to_below(words: np.ndarray, bound: int) -> np.ndarray:
    """uint64 words -> integers in [0, bound) by reduction modulo ``bound``.

    Each value has probability within bound / 2^64 of 1/bound (below 2^-32 relative for
    every bound the tool uses), far below anything a release of any size can detect.
    """
    return (words % np.uint64(bound)).astype(np.int64)


MEMO_PRF_VERSION = "aes256-ecbc-mac/aes256-expand/v1"


class SubjectPRF:
    """Pseudorandom words addressed by (subject, value code) instead of (nonce, row): the
    randomness of memoized columns ("permanent randomized response").

    Three AES-256 keys are derived from the secret key with labels of their own
    (``key.subkey("memoized/v1", *labels, part)``; no nonce, so the words are the same in
    every release).  A row's 128-bit seed is an encrypted CBC-MAC of the prefix-free message

        block 0 = big-endian u64 byte length of the subject || big-endian u64 value code,
        then the subject's bytes, zero-padded to whole 16-byte blocks,

    i.e. ``seed = AES(k_final, CBC-MAC(k_chain, message))`` (a PRF on messages of any length;
    the length in block 0 makes the encoding prefix-free).  It is evaluated for all rows at
    once: one AES-ECB call per block position, each row stopping after its own blocks, so a
    row's seed depends only on its own (subject, code).  The seed is expanded to words by
    ``AES(k_expand, seed XOR b)`` for blocks b = 0, 1, ... (two little-endian u64 words per
    block, the layout of ``KeyedStream.words``).
    """

    __slots__ = ("_chain", "_final", "_expand", "label")

    def __init__(self, key: SecretKey, *labels: str | bytes) -> None:
        self._chain = key.subkey("memoized/v1", *labels, "chain")
        self._final = key.subkey("memoized/v1", *labels, "final")
        self._expand = key.subkey("memoized/v1", *labels, "expand")
        self.label = "/".join(lb if isinstance(lb, str) else lb.hex() for lb in labels)

    def __repr__(self) -> str:
        return f"SubjectPRF({self.label!r})"

    @staticmethod
    def _ecb(key: bytes, blocks: np.ndarray) -> np.ndarray:
        enc = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
        out = enc.update(np.ascontiguousarray(blocks, dtype=np.uint8).tobytes()) + enc.finalize()
        return np.frombuffer(out, dtype=np.uint8).reshape(blocks.shape).copy()

    def seeds(self, data: np.ndarray, offsets: np.ndarray, codes: np.ndarray) -> np.ndarray:
        """(n, 16) uint8 seeds for n subjects given as concatenated bytes ``data`` with
        ``offsets`` (n + 1 int64, subject i is data[offsets[i]:offsets[i+1]]) and int64 value
        ``codes`` (n)."""
        offsets = np.asarray(offsets, dtype=np.int64)
        n = len(offsets) - 1
        if n <= 0:
            return np.zeros((0, 16), dtype=np.uint8)
        lens = np.diff(offsets)
        head = np.empty((n, 2), dtype=">u8")
        head[:, 0] = lens.astype(np.uint64)
        head[:, 1] = np.asarray(codes, dtype=np.int64).astype(np.uint64)
        state = self._ecb(self._chain, head.view(np.uint8).reshape(n, 16))
        nblocks = -(-lens // 16)
        width = int(nblocks.max()) * 16 if n else 0
        if width:
            mat = np.zeros((n, width), dtype=np.uint8)
            total = int(lens.sum())
            # byte t of the data goes to row r, column t - start(r): flat index t + r * width - start(r)
            shift = np.arange(n, dtype=np.int64) * width - (offsets[:-1] - offsets[0])
            flat = np.arange(total, dtype=np.int64) + np.repeat(shift, lens)
            mat.reshape(-1)[flat] = np.asarray(data, dtype=np.uint8)[offsets[0]:offsets[0] + total]
            for b in range(width // 16):
                block = mat[:, 16 * b:16 * b + 16]
                active = nblocks > b
                if active.all():  # e.g. identifiers of one length: no masking needed
                    state = self._ecb(self._chain, state ^ block)
                else:
                    state[active] = self._ecb(self._chain, state[active] ^ block[active])
        return self._ecb(self._final, state)

    def words(self, seeds: np.ndarray, per_row: int) -> np.ndarray:
        """(n, per_row) uint64 words from (n, 16) seeds."""
        n = len(seeds)
        blocks = (per_row + 1) // 2
        if n == 0:
            return np.zeros((0, per_row), dtype=np.uint64)
        ctr = np.repeat(np.asarray(seeds, dtype=np.uint8)[:, None, :], blocks, axis=1)
        b = np.arange(blocks, dtype=">u8").view(np.uint8).reshape(blocks, 8)
        ctr[:, :, 8:] ^= b[None, :, :]
        out = self._ecb(self._expand, ctr.reshape(n * blocks, 16))
        return out.view("<u8").reshape(n, 2 * blocks)[:, :per_row].copy()
