"""The keyed PRF and key files (docs/architecture.md, "Randomness and secrets")."""

from __future__ import annotations

import hashlib
import hmac
import json
import os
from pathlib import Path

import numpy as np
import pytest
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from ldptransform.errors import KeyFileError, UsageError
from ldptransform.keys import KEY_HEADER, SecretKey, check_nonce, load_key, new_key_file
from ldptransform.random import KeyedStream
from ldptransform.random.variates import to_below, to_unit

KEY = SecretKey(bytes(range(32)))
NONCE = "00112233445566778899aabbccddeeff"
KNOWN = Path(__file__).parent / "data" / "prf_known_answers.json"


def test_stream_is_aes_ctr_over_row_counters():
    """Independent reference: the words equal AES-256-ECB of the counter blocks
    r*blocks_per_row + b (big-endian), under the HMAC-SHA256 sub-key the docs describe."""
    per_row = 5  # -> 3 blocks per row, 6 words, first 5 used
    s = KeyedStream(KEY, NONCE, "column", "pay")
    got = s.words(1000, 4, per_row)
    msg = b"ldptransform/prf/v1"
    for label in (bytes.fromhex(NONCE), b"column", b"pay"):
        msg += len(label).to_bytes(4, "big") + label
    sub = hmac.new(bytes(range(32)), msg, hashlib.sha256).digest()
    enc = Cipher(algorithms.AES(sub), modes.ECB()).encryptor()
    blocks = b"".join(((1000 + r) * 3 + b).to_bytes(16, "big") for r in range(4) for b in range(3))
    ref = np.frombuffer(enc.update(blocks), dtype="<u8").reshape(4, 6)[:, :per_row]
    assert np.array_equal(got, ref)


def test_words_do_not_depend_on_batching():
    s = KeyedStream(KEY, NONCE, "column", "x")
    whole = s.words(0, 1000, 3)
    parts = np.concatenate([s.words(0, 1, 3), s.words(1, 499, 3), s.words(500, 500, 3)])
    assert np.array_equal(whole, parts)


def test_streams_differ_by_column_nonce_and_key():
    a = KeyedStream(KEY, NONCE, "column", "x").words(0, 64, 2)
    assert not np.array_equal(a, KeyedStream(KEY, NONCE, "column", "y").words(0, 64, 2))
    assert not np.array_equal(a, KeyedStream(KEY, "ff" * 16, "column", "x").words(0, 64, 2))
    assert not np.array_equal(a, KeyedStream(SecretKey(bytes(32)), NONCE, "column", "x").words(0, 64, 2))
    # length-prefixed labels: ("ab", "c") and ("a", "bc") are different streams
    assert not np.array_equal(KeyedStream(KEY, NONCE, "ab", "c").words(0, 8, 2),
                              KeyedStream(KEY, NONCE, "a", "bc").words(0, 8, 2))


def test_known_answers_pinned():
    """The PRF is part of the reproducibility promise (manifest field 'prf'): pinned words."""
    s = KeyedStream(KEY, NONCE, "column", "site")
    got = [int(w) for w in s.words(123456789, 2, 3).ravel()]
    assert got == json.loads(KNOWN.read_text())["words"]


def test_uniform_conversions():
    s = KeyedStream(KEY, NONCE, "t")
    w = s.words(0, 200000, 2)
    u = to_unit(w[:, 0])
    assert u.min() >= 0 and u.max() < 1
    # 53-bit grid
    assert np.all(u * 2.0 ** 53 == np.floor(u * 2.0 ** 53))
    assert abs(u.mean() - 0.5) < 5 * (1 / np.sqrt(12 * u.size))
    b = to_below(w[:, 1], 7)
    counts = np.bincount(b, minlength=7)
    expected = b.size / 7
    assert b.min() >= 0 and b.max() < 7
    assert np.all(np.abs(counts - expected) < 5 * np.sqrt(expected))


def test_key_file_roundtrip_and_mode(tmp_path):
    p = tmp_path / "k.key"
    key = new_key_file(p)
    assert (p.stat().st_mode & 0o777) == 0o600
    assert load_key(p).fingerprint() == key.fingerprint()
    text = p.read_text()
    assert text.startswith(KEY_HEADER)
    with pytest.raises(KeyFileError, match="already exists"):
        new_key_file(p)


def test_key_repr_hides_material():
    assert "00" not in repr(KEY).replace("SecretKey", "")
    assert bytes(range(32)).hex() not in repr(KEY) + str(KEY)
    with pytest.raises(TypeError):
        import pickle

        pickle.dumps(KEY)


@pytest.mark.parametrize("content,match", [
    ("not a key\n", "malformed"),
    (KEY_HEADER + "\nzz\n", "malformed"),
    (KEY_HEADER + "\n" + "ab" * 31 + "\n", "malformed"),
])
def test_malformed_key_files(tmp_path, content, match):
    p = tmp_path / "bad.key"
    p.write_text(content)
    os.chmod(p, 0o600)
    with pytest.raises(KeyFileError, match=match):
        load_key(p)


def test_key_readable_by_others_refused(tmp_path):
    p = tmp_path / "k.key"
    new_key_file(p)
    os.chmod(p, 0o644)
    with pytest.raises(KeyFileError, match="chmod 600"):
        load_key(p)


def test_missing_key(tmp_path):
    with pytest.raises(KeyFileError, match="does not exist"):
        load_key(tmp_path / "none.key")


def test_nonce_check():
    assert check_nonce(NONCE.upper()) == NONCE
    with pytest.raises(UsageError):
        check_nonce("abc")
