"""Secret keys, their fingerprints and sub-keys, and release nonces.

The keyed pseudorandom function that is the only source of release noise lives in
``ldptransform.random`` (``bits.KeyedStream``: AES-256 in counter mode under a sub-key derived
here, HMAC-SHA256 of the secret key, the release nonce, the column name and a purpose label;
``bits.SubjectPRF`` for memoized columns; ``variates`` for what is made of the words); this
module holds nothing but keys, fingerprints, sub-keys and nonces.

Keys are 32 bytes from the operating system's CSPRNG, stored as one line of hex
under a header line, in a file created with mode 0600.  The manifest carries only a
fingerprint (an HMAC of a fixed label), never the key.
"""

from __future__ import annotations

import hashlib
import hmac
import contextlib
import os
import secrets
import stat
from pathlib import Path
from typing import NoReturn

from .errors import KeyFileError, UsageError

KEY_HEADER = "ldptransform secret key v1"
KEY_BYTES = 32
NONCE_BYTES = 16


class SecretKey:
    """32 bytes of secret key material.  Never printed, logged or serialized."""

    __slots__ = ("_path", "_raw")

    def __init__(self, raw: bytes, *, path: Path | None = None) -> None:
        if len(raw) != KEY_BYTES:
            raise KeyFileError(f"a secret key must be {KEY_BYTES} bytes, got {len(raw)}")
        self._raw = bytes(raw)
        self._path = path

    @property
    def path(self) -> Path | None:
        """The key file this key was read from (None for a key made in memory): no output of any
        command may ever be written there."""
        return self._path

    def __repr__(self) -> str:
        return "SecretKey(<redacted>)"

    __str__ = __repr__

    def __reduce__(self) -> NoReturn:  # keys must not travel by pickle by accident
        raise TypeError("SecretKey cannot be pickled")

    @classmethod
    def generate(cls) -> SecretKey:
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
        write_new_file(path, text, 0o600)
    except OSError as err:
        raise KeyFileError(f"cannot create key file {path}: {err.strerror or 'the system refused'}. Nothing was "
                           "kept; check that the folder is writable and has free space.") from None
    return key


def write_new_file(path: Path, text: str, mode: int) -> None:
    """Write ``text`` (ASCII) into a new file created exclusively with ``mode``, synced to disk; a
    half-written file is removed.  Raises OSError (FileExistsError if ``path`` exists)."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    try:
        os.fchmod(fd, mode)
        os.write(fd, text.encode("ascii"))
        os.fsync(fd)
    except OSError:
        os.close(fd)
        with contextlib.suppress(OSError):
            path.unlink()
        raise
    os.close(fd)


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
    return SecretKey(raw, path=path)


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
