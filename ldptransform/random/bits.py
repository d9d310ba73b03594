"""Bit sources: where release noise comes from, apart from what is made of it (variates.py).

Two keyed streams give pseudorandom 64-bit words, both AES-256 under sub-keys derived
(HMAC-SHA256, ``SecretKey.subkey``) from the steward's secret key; numpy's generators are
never used for release noise (fast but predictable):

- ``KeyedStream``: words addressed by (key, nonce, column, purpose, global row index).  The
  128-bit counter block of row ``r`` and block ``b`` is ``r * blocks_per_row + b`` (AES-256 in
  counter mode), so the words a row receives never depend on how rows are batched or split
  across workers.
- ``SubjectPRF``: words addressed by (key, labels, subject, value code), with no nonce and no
  row: the randomness of memoized columns, the same in every release.

Both are read through one small protocol, ``BitSource``: ``take(start, stop, per_row)`` gives
the words of rows [start, stop) of the batch it was bound to (``KeyedStream.rows`` binds a
stream to a batch's first global row, ``SubjectPRF.rows`` to a batch's subjects and value
codes), so the batch kernel asks every column the same way whatever addresses its words.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Protocol

import numpy as np
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

if TYPE_CHECKING:
    from ..keys import SecretKey

PRF_VERSION = "aes256-ctr/hmac-sha256-subkeys/v1"


class BitSource(Protocol):
    """Words for the rows of one batch, whatever addresses them."""

    def take(self, start: int, stop: int, per_row: int) -> np.ndarray:
        """(stop - start, per_row) uint64 words of the batch's rows start .. stop - 1."""
        ...


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
        enc.update_into(_zeros(nbytes), out.view(np.uint8).data)
        return out[: nbytes // 8].reshape(n_rows, 2 * blocks)[:, :per_row]

    def words_at(self, rows: np.ndarray, draws: np.ndarray | int) -> np.ndarray:
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

    def rows(self, row0: int) -> RowWords:
        """This stream as a ``BitSource`` for a batch whose first row has global index ``row0``."""
        return RowWords(self, row0)


class RowWords:
    """``BitSource`` of a ``KeyedStream`` for one batch: batch row i is global row row0 + i."""

    __slots__ = ("row0", "stream")

    def __init__(self, stream: KeyedStream, row0: int) -> None:
        self.stream, self.row0 = stream, row0

    def take(self, start: int, stop: int, per_row: int) -> np.ndarray:
        return self.stream.words(self.row0 + start, stop - start, per_row)


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

    __slots__ = ("_chain", "_expand", "_final", "label")

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

    def rows(self, data: np.ndarray, offsets: np.ndarray, codes: np.ndarray) -> SubjectWords:
        """This PRF as a ``BitSource`` for a batch: row i is subject data[offsets[i]:offsets[i+1]]
        with value code codes[i] (``seeds``)."""
        return SubjectWords(self, data, offsets, codes)


class SubjectWords:
    """``BitSource`` of a ``SubjectPRF`` for one batch's (subject, value code) pairs."""

    __slots__ = ("codes", "data", "offsets", "prf")

    def __init__(self, prf: SubjectPRF, data: np.ndarray, offsets: np.ndarray, codes: np.ndarray) -> None:
        self.prf, self.data, self.offsets, self.codes = prf, data, offsets, codes

    def take(self, start: int, stop: int, per_row: int) -> np.ndarray:
        seeds = self.prf.seeds(self.data, self.offsets[start:stop + 1], self.codes[start:stop])
        return self.prf.words(seeds, per_row)
