"""Signed manifests: the steward's Ed25519 key pair, signatures over manifests, their check.

The partner-side ``validate`` checks that an extract and its manifest agree with each other;
a consistent forgery (another eps, other labels or values, every hash recomputed) agrees with
itself too.  A signature closes that gap: the steward signs the exact bytes of each manifest
with a private signing key that never leaves the steward, and partners verify the signature
with the matching public key, received once over a trusted channel.  The manifest holds the
extract's SHA-256 and size (a dataset extract: every part's), so the signature covers the
extract through it.  docs/signing.md describes the workflow and what a signature does and does
not prove.

Files (formats of this tool, text, one ``name: value`` per line under a header line):

* the private signing key (``ldpt key new-signing PATH``): created exclusively with mode 0600,
  never overwritten by any command (``outputs`` recognises its header line);
* the public key (``PATH.pub``): what partners get, with a short fingerprint to compare by eye;
* the signature (``MANIFEST.sig``, JSON): the algorithm, the signing key's fingerprint, the
  signed file's name, size and SHA-256 (for the messages only) and the Ed25519 signature in
  base64 over the manifest's bytes exactly as they are on disk.

A signature is accepted only if Ed25519 verifies it with the partner's public key over the
manifest's bytes; the other fields of the signature file only help to say why one does not.
"""

from __future__ import annotations

import base64
import binascii
import contextlib
import hashlib
import json
import os
import stat
from collections.abc import Sequence
from pathlib import Path
from typing import Any, NoReturn

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from .errors import KeyFileError, LdptError, ManifestError, OutputError
from .keys import KEY_HEADER, shared_access, write_new_file

SIGNING_KEY_HEADER = "ldptransform signing key v1"
PUBLIC_KEY_HEADER = "ldptransform public signing key v1"
ALGORITHM = "ed25519"
SIGNATURE_FORMAT = "ldptransform-signature"
SIGNATURE_FORMAT_VERSION = 1
SIGNATURE_SUFFIX = ".sig"
PUBLIC_SUFFIX = ".pub"
FINGERPRINT_HEX = 24  # 96 bits: short enough to read out, far too long to match by search
_FINGERPRINT_LABEL = b"ldptransform/signing-key-fingerprint/v1"
_MAX_KEY_FILE = 4096        # bytes; key files are about 200
_MAX_SIGNATURE_FILE = 65536  # bytes; signature files are about 500
_RAW = 32                   # bytes of an Ed25519 private seed or public key
_SIG = 64                   # bytes of an Ed25519 signature


class SigningKeyError(KeyFileError):
    """A signing key file (private or public) is missing, malformed, of the wrong kind or open to others."""


class SignatureFileError(ManifestError):
    """A signature file cannot be read as one written by ``ldpt sign``."""


def fingerprint(public_raw: bytes) -> str:
    """The public identifier of a signing key pair: SHA-256 of a fixed label and the 32-byte
    public key, the first FINGERPRINT_HEX hex characters."""
    return hashlib.sha256(_FINGERPRINT_LABEL + public_raw).hexdigest()[:FINGERPRINT_HEX]


class PublicKey:
    """A steward's public signing key, as partners hold it."""

    __slots__ = ("_key", "_path", "_raw")

    def __init__(self, raw: bytes, *, path: Path | None = None) -> None:
        self._raw = bytes(raw)
        self._key = Ed25519PublicKey.from_public_bytes(self._raw)
        self._path = path

    @property
    def path(self) -> Path | None:
        return self._path

    def fingerprint(self) -> str:
        return fingerprint(self._raw)

    def verifies(self, signature: bytes, data: bytes) -> bool:
        try:
            self._key.verify(signature, data)
        except InvalidSignature:
            return False
        return True

    def file_text(self) -> str:
        return (f"{PUBLIC_KEY_HEADER}\nalgorithm: {ALGORITHM}\npublic: {self._raw.hex()}\n"
                f"fingerprint: {self.fingerprint()}\n")

    def __repr__(self) -> str:
        return f"PublicKey(fingerprint={self.fingerprint()})"


class SigningKey:
    """A steward's private signing key.  Never printed, logged or serialized."""

    __slots__ = ("_key", "_path")

    def __init__(self, key: Ed25519PrivateKey, *, path: Path | None = None) -> None:
        self._key = key
        self._path = path

    @property
    def path(self) -> Path | None:
        """The file this key was read from: no command may write there, nor in a partner's folder."""
        return self._path

    @classmethod
    def generate(cls) -> SigningKey:
        return cls(Ed25519PrivateKey.generate())

    def public_key(self) -> PublicKey:
        from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

        return PublicKey(self._key.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw))

    def fingerprint(self) -> str:
        return self.public_key().fingerprint()

    def sign(self, data: bytes) -> bytes:
        return self._key.sign(data)

    def _file_text(self) -> str:
        from cryptography.hazmat.primitives.serialization import Encoding, NoEncryption, PrivateFormat

        seed = self._key.private_bytes(Encoding.Raw, PrivateFormat.Raw, NoEncryption())
        return (f"{SIGNING_KEY_HEADER}\nalgorithm: {ALGORITHM}\nprivate: {seed.hex()}\n"
                f"fingerprint: {self.fingerprint()}\n")

    def __repr__(self) -> str:
        return "SigningKey(<redacted>)"

    __str__ = __repr__

    def __reduce__(self) -> NoReturn:  # a private key must not travel by pickle by accident
        raise TypeError("SigningKey cannot be pickled")


# -- key files ------------------------------------------------------------------------------

def public_key_path(path: Path) -> Path:
    """Where ``ldpt key new-signing PATH`` writes the public key: PATH.pub."""
    path = Path(path)
    return path.with_name(path.name + PUBLIC_SUFFIX)


def _create(path: Path, text: str, mode: int) -> None:
    """Write ``text`` into a new file (keys.write_new_file: exclusive create, ``mode``, synced; a
    half-written file is removed)."""
    try:
        write_new_file(path, text, mode)
    except FileExistsError:
        raise SigningKeyError(f"{path} already exists; ldpt never overwrites a signing key or its public key. "
                              "Choose another path.") from None
    except OSError as err:
        raise SigningKeyError(f"cannot write {path}: {err.strerror or 'the system refused'}. Nothing was kept; check "
                              "that the folder exists and is writable, and free disk space.") from None


def new_signing_key_file(path: Path) -> SigningKey:
    """Write a new signing key pair: the private key to ``path`` (mode 0600) and the public key to
    ``path``.pub (mode 0644).  Refuses to overwrite either; on failure neither file is left."""
    path = Path(path)
    pub = public_key_path(path)
    if path.name.endswith(PUBLIC_SUFFIX):
        raise SigningKeyError(f"{path}: a private signing key's name must not end in {PUBLIC_SUFFIX}, the ending "
                              "partners expect of the public key (which is written beside it as PATH.pub). Choose a "
                              "name such as steward-signing.key.")
    for p in (path, pub):
        if p.exists() or p.is_symlink():
            raise SigningKeyError(
                f"{p} already exists; ldpt never overwrites a signing key or its public key (manifests signed with "
                "it could no longer be checked, and partners hold its public key). Choose another path, or move the "
                "old pair away yourself if you really mean to retire it.")
    if not path.parent.is_dir():
        raise SigningKeyError(f"cannot create signing key {path}: folder {path.parent} does not exist. Create it "
                              "first (keep it private to the steward, mode 0700).")
    key = SigningKey.generate()
    _create(path, key._file_text(), 0o600)
    try:
        _create(pub, key.public_key().file_text(), 0o644)
    except BaseException:
        with contextlib.suppress(OSError):
            path.unlink()
        raise
    key._path = path
    return key


def _read_key_file(path: Path, what: str, hint: str) -> tuple[bytes, os.stat_result]:
    """The bytes of a small regular file, or a SigningKeyError naming it."""
    try:
        st = path.stat()
    except FileNotFoundError:
        raise SigningKeyError(f"{what} {path} does not exist. {hint}") from None
    except OSError as err:
        raise SigningKeyError(f"cannot read {what} {path}: {err.strerror or 'the system refused'}. Check the path "
                              "and its permissions.") from None
    if not stat.S_ISREG(st.st_mode):
        raise SigningKeyError(f"{what} {path} is not a regular file. {hint}")
    if st.st_size > _MAX_KEY_FILE:
        raise SigningKeyError(f"{what} {path} is {st.st_size} bytes, far more than a key file written by "
                              f"`ldpt key new-signing` (about 200). {hint}")
    try:
        with open(path, "rb") as f:
            return f.read(_MAX_KEY_FILE + 1), st
    except OSError as err:
        raise SigningKeyError(f"cannot read {what} {path}: {err.strerror or 'the system refused'}. Check its "
                              "permissions.") from None


def _fields(data: bytes, header: str) -> dict[str, str] | None:
    """The ``name: value`` lines under ``header``, or None if the text is not of that form."""
    try:
        lines = data.decode("ascii").strip().splitlines()
    except UnicodeDecodeError:
        return None
    if not lines or lines[0].strip() != header:
        return None
    out: dict[str, str] = {}
    for line in lines[1:]:
        name, sep, value = line.partition(":")
        if not sep or name.strip() in out:
            return None
        out[name.strip()] = value.strip()
    return out


def _hex32(value: str | None) -> bytes | None:
    try:
        raw = bytes.fromhex(value or "")
    except ValueError:
        return None
    return raw if len(raw) == _RAW else None


def _kind(data: bytes) -> str | None:
    """Which of the tool's key files ``data`` is (by its header line), or a PEM file; None if neither."""
    for header, kind in ((SIGNING_KEY_HEADER, "private"), (PUBLIC_KEY_HEADER, "public"), (KEY_HEADER, "release")):
        if data.startswith(header.encode("ascii")):
            return kind
    return "pem" if data.lstrip().startswith(b"-----BEGIN") else None


def load_signing_key(path: Path | str, flag: str = "--signing-key") -> SigningKey:
    """Read a private signing key written by ``new_signing_key_file``; refuse a missing, malformed
    or other-readable one, and name the mix-up when the file is another kind of key."""
    path = Path(path)
    made_by = f"Point {flag} at the private key file made by `ldpt key new-signing` (not its .pub)."
    data, st = _read_key_file(path, "signing key", f"Create a pair with `ldpt key new-signing {path}`, or " +
                              made_by[0].lower() + made_by[1:])
    kind = _kind(data)
    if kind == "public":
        raise SigningKeyError(f"{path} is a public signing key (the file partners get), but signing needs the "
                              f"steward's private key: give {flag} the file of the same name without .pub, made by "
                              "`ldpt key new-signing`.")
    if kind == "release":
        raise SigningKeyError(f"{path} is a release secret key (made by `ldpt key new`, given with --key), not a "
                              f"signing key. Make a signing key pair with `ldpt key new-signing PATH` and give {flag} "
                              "PATH.")
    if kind == "pem":
        raise SigningKeyError(f"{path} is a PEM file, not a signing key written by `ldpt key new-signing`; ldpt reads "
                              f"only its own signing key files. {made_by}")
    fields = _fields(data, SIGNING_KEY_HEADER)
    if fields is None:
        raise SigningKeyError(f"signing key {path} is malformed: expected the line '{SIGNING_KEY_HEADER}' followed "
                              f"by 'name: value' lines. {made_by}")
    if fields.get("algorithm") != ALGORITHM:
        raise SigningKeyError(f"signing key {path} is of an unsupported type (field 'algorithm' is not "
                              f"{ALGORITHM!r}); this ldpt signs with Ed25519 keys only. {made_by}")
    open_to = shared_access(st)
    if open_to:
        raise SigningKeyError(
            f"signing key {path} can be read or written by other users ({open_to}). A private signing key must be "
            f"private to the steward: run `chmod 600 {path}` and consider whether it has been exposed (if so, make a "
            "new pair with `ldpt key new-signing`, send partners the new .pub and tell them to stop trusting the old "
            "one).")
    seed = _hex32(fields.get("private"))
    if seed is None:
        raise SigningKeyError(f"signing key {path} is malformed: its field 'private' must be {2 * _RAW} hex "
                              f"characters. {made_by}")
    key = SigningKey(Ed25519PrivateKey.from_private_bytes(seed), path=path)
    if fields.get("fingerprint") != key.fingerprint():
        raise SigningKeyError(f"signing key {path} is damaged: its field 'fingerprint' does not match its key. "
                              f"Restore the file from the steward's backup. {made_by}")
    return key


def load_public_key(path: Path | str, flag: str = "--public-key") -> PublicKey:
    """Read a public signing key (``PATH.pub`` of ``ldpt key new-signing``); refuse a missing or
    malformed one, and a private key given in its place (saying that it may be exposed)."""
    path = Path(path)
    ask = "Ask the data steward for their public signing key (the .pub file), over a channel you trust."
    data, _ = _read_key_file(path, "public key", ask)
    kind = _kind(data)
    if kind == "private":
        raise SigningKeyError(
            f"{path} is a PRIVATE signing key, not a public key: {flag} takes the public key file ({path.name}.pub, "
            "made beside it by `ldpt key new-signing`). A private signing key must stay with the steward; if this "
            "file has left the steward, it is exposed: make a new pair and send partners the new .pub.")
    if kind == "release":
        raise SigningKeyError(
            f"{path} is a release secret key (made by `ldpt key new`), not a public signing key: {flag} takes the .pub "
            "file made by `ldpt key new-signing`. A release key must stay with the steward; if this file has left the "
            "steward, it is exposed.")
    fields = _fields(data, PUBLIC_KEY_HEADER) if kind != "pem" else None
    if fields is None:
        raise SigningKeyError(f"public key {path} is not a public signing key written by `ldpt key new-signing` "
                              f"(expected the line '{PUBLIC_KEY_HEADER}' followed by 'name: value' lines). {ask}")
    if fields.get("algorithm") != ALGORITHM:
        raise SigningKeyError(f"public key {path} is of an unsupported type (field 'algorithm' is not "
                              f"{ALGORITHM!r}); this ldpt verifies Ed25519 signatures only. {ask}")
    raw = _hex32(fields.get("public"))
    if raw is None:
        raise SigningKeyError(f"public key {path} is malformed: its field 'public' must be {2 * _RAW} hex "
                              f"characters. {ask}")
    try:
        key = PublicKey(raw, path=path)
    except ValueError:
        raise SigningKeyError(f"public key {path} is malformed: its field 'public' is not an Ed25519 key. "
                              f"{ask}") from None
    if fields.get("fingerprint") != key.fingerprint():
        raise SigningKeyError(f"public key {path} is damaged or was edited: its field 'fingerprint' does not match "
                              f"its key. {ask}")
    return key


# -- signatures -----------------------------------------------------------------------------

def signature_path(manifest_path: Path | str) -> Path:
    """The signature file of a manifest: the manifest's name with .sig added, beside it."""
    p = Path(manifest_path)
    return p.with_name(p.name + SIGNATURE_SUFFIX)


def check_key_apart(key: SigningKey, public: Sequence[Path | None], flag: str = "--signing-key") -> None:
    """Refuse a private signing key that lies in the folder of one of the ``public`` files (what
    partners receive: the manifest's and extract's folders, or inside a dataset extract's folder):
    it would travel with them, and whoever holds it can sign forgeries."""
    kp = key.path
    if kp is None:
        return
    for p in public:
        if p is None:
            continue
        p = Path(p)
        folder = p if p.is_dir() else p.parent
        try:
            where = kp.resolve()
            near = where.parent == folder.resolve() or (p.is_dir() and where.is_relative_to(p.resolve()))
        except OSError:
            near = False
        if near:
            raise SigningKeyError(
                f"the private signing key {kp} lies in {folder}, the folder of {p}, which is what partners receive: "
                "it would travel with the release, and whoever holds it can sign forged manifests. Move the key to a "
                f"private folder (mode 0700) and give {flag} its new path; if this folder has already been sent, the "
                "key is exposed: make a new pair with `ldpt key new-signing` and send partners the new .pub.")


def check_signature_destination(manifest_path: Path, key: SigningKey, *, overwrite: bool,
                                known: Sequence[tuple[str, Path | None]] = ()) -> Path:
    """Where the signature of ``manifest_path`` goes, refused (exit 2, nothing written) when it is
    one of the ``known`` files, the key, the manifest, a secret, or exists without ``overwrite``."""
    from .outputs import KEY, MANIFEST, check_outputs

    dest = signature_path(manifest_path)
    check_outputs([("signature file", dest)], [(MANIFEST, Path(manifest_path)), (KEY, key.path), *known],
                  overwrite=overwrite)
    return dest


def signature_document(manifest_bytes: bytes, manifest_name: str, key: SigningKey) -> dict[str, Any]:
    """The signature file's content for these manifest bytes (the signature covers them exactly)."""
    from .manifest import now_utc

    return {
        "format": SIGNATURE_FORMAT,
        "format_version": SIGNATURE_FORMAT_VERSION,
        "algorithm": ALGORITHM,
        "public_key_fingerprint": key.fingerprint(),
        "signed_file": manifest_name,
        "signed_bytes": len(manifest_bytes),
        "signed_sha256": hashlib.sha256(manifest_bytes).hexdigest(),
        "signed_utc": now_utc(),
        "signature": base64.b64encode(key.sign(manifest_bytes)).decode("ascii"),
    }


def _read_manifest_bytes(path: Path) -> bytes:
    try:
        with open(path, "rb") as f:
            return f.read()
    except FileNotFoundError:
        raise ManifestError(f"manifest {path} does not exist. Give the path of the manifest (by default the "
                            "extract's name with .manifest.json in place of the extension).") from None
    except OSError as err:
        raise ManifestError(f"cannot read manifest {path}: {err.strerror or 'the system refused'}. Check the path "
                            "and its permissions.") from None


def sign_manifest(manifest_path: Path | str, key: SigningKey, *, overwrite: bool = False,
                  known: Sequence[tuple[str, Path | None]] = ()) -> Path:
    """Sign a manifest: write ``MANIFEST.sig`` beside it (``signature_path``) and return its path.

    Only a file that reads as a manifest is signed (so the key signs nothing else); a manifest
    changed while it was read is refused.  The signature file is written beside its destination
    and renamed into place: nothing is left on error."""
    from .manifest import load_manifest

    mpath = Path(manifest_path)
    before = _read_manifest_bytes(mpath)
    extract = mpath.parent / load_manifest(mpath).extract.file  # where the manifest's extract goes along
    data = _read_manifest_bytes(mpath)
    if data != before:
        raise ManifestError(f"manifest {mpath} changed while it was being signed; nothing was signed. Sign it again "
                            "once no other job writes it.")
    dest = check_signature_destination(mpath, key, overwrite=overwrite, known=known)
    check_key_apart(key, [mpath, extract])
    text = json.dumps(signature_document(data, mpath.name, key), indent=2) + "\n"
    _write_atomic(dest, text)
    return dest


def _write_atomic(dest: Path, text: str) -> None:
    from .io import write_text_atomic

    try:
        write_text_atomic(dest, text)
    except OSError as err:
        raise OutputError(f"cannot write the signature file {dest}: {err.strerror or 'the system refused'}. Nothing "
                          "was written; free disk space or check the folder's permissions, then sign again.") from None


def _strict_object(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in pairs:
        if k in out:
            raise ValueError(f"the field {k!r} appears twice")
        out[k] = v
    return out


def _no_constant(name: str) -> NoReturn:
    raise ValueError(f"{name} is not a JSON number")


def _garbled(path: Path, why: str) -> SignatureFileError:
    return SignatureFileError(f"signature file {path} is not a signature written by `ldpt sign` ({why}). Ask the data "
                              "steward for an intact copy of the manifest and its signature.")


def _parse_json(path: Path, data: bytes) -> Any:
    """Strict JSON (no duplicate field, no NaN or Infinity), of bounded size."""
    if len(data) > _MAX_SIGNATURE_FILE:
        raise _garbled(path, f"it is larger than {_MAX_SIGNATURE_FILE} bytes; a signature file has about 500")
    try:
        return json.loads(data.decode("utf-8"), object_pairs_hook=_strict_object, parse_constant=_no_constant)
    except UnicodeDecodeError:
        raise _garbled(path, "it is not UTF-8 text") from None
    except json.JSONDecodeError as err:
        raise _garbled(path, f"not valid JSON at line {err.lineno}, column {err.colno}") from None
    except (ValueError, RecursionError) as err:
        raise _garbled(path, str(err) if isinstance(err, ValueError) else "nested too deeply") from None


def read_signature(path: Path) -> tuple[bytes, dict[str, Any]]:
    """The 64-byte signature of a signature file and its other fields; a SignatureFileError
    (exit 2) for a file that is unreadable, not strict JSON, or not of this tool's form."""
    try:
        if not stat.S_ISREG(path.stat().st_mode):  # a folder, a pipe or a device is never read (nor waited on)
            raise _garbled(path, "it is not a regular file")
        with open(path, "rb") as f:
            data = f.read(_MAX_SIGNATURE_FILE + 1)
    except OSError as err:
        raise SignatureFileError(f"cannot read signature file {path}: {err.strerror or 'the system refused'}. Check "
                                 "the path and its permissions.") from None
    doc = _parse_json(path, data)
    if not isinstance(doc, dict) or doc.get("format") != SIGNATURE_FORMAT:
        raise _garbled(path, f"its field 'format' is not {SIGNATURE_FORMAT!r}")
    version = doc.get("format_version")
    if type(version) is not int or version != SIGNATURE_FORMAT_VERSION:
        raise SignatureFileError(f"signature file {path} has format_version {version!r}; this ldpt "
                                 f"reads version {SIGNATURE_FORMAT_VERSION}. Use a matching ldptransform version.")
    if doc.get("algorithm") != ALGORITHM:
        raise _garbled(path, f"its field 'algorithm' is not {ALGORITHM!r}; this ldpt verifies Ed25519 signatures only")
    sig = doc.get("signature")
    try:
        raw = base64.b64decode(sig, validate=True) if isinstance(sig, str) else b""
    except (binascii.Error, ValueError):
        raw = b""
    if len(raw) != _SIG:
        raise _garbled(path, f"its field 'signature' is not {_SIG} bytes in base64")
    for name in ("public_key_fingerprint", "signed_sha256", "signed_file"):
        if name in doc and not isinstance(doc[name], str):
            raise _garbled(path, f"its field {name!r} is not text")
    return raw, doc


NOT_CHECKED = ("no public key was given (--public-key). Without the steward's public signing key, "
               "partner-side validation shows only that the files agree with each other; a consistent forgery (other "
               "eps, labels or values, with every hash recomputed) would pass. Ask the steward for their public key, "
               "once, over a channel you trust, and give it with --public-key (the steward side, --raw with --key, "
               "proves the files by re-deriving the extract instead)")


def check_signature(manifest_path: Path | str, public_key_path: Path | str | None) -> tuple[bool | None, str]:
    """The "signature" check of ``validate``: (True, detail) when the manifest's signature file
    verifies with the public key over the manifest's exact bytes; (False, why) when it is missing,
    made by another key, or the manifest (or signature) was changed; (None, "not checked ...")
    without a public key.  An unreadable or garbled public key or signature file is a user error
    (SigningKeyError, SignatureFileError: exit 2), not a failed check."""
    mpath = Path(manifest_path)
    sig_path = signature_path(mpath)
    if public_key_path is None:
        present = f"a signature file {sig_path.name} is present, but " if sig_path.is_file() else ""
        return None, f"not checked: {present}{NOT_CHECKED}"
    pub = load_public_key(public_key_path)
    if not sig_path.exists():
        return False, (f"no signature file {sig_path} beside the manifest: nothing shows that the steward made these "
                       "files. Ask the steward to sign the manifest (`ldpt sign`) and send the .sig with it")
    sig, doc = read_signature(sig_path)
    data = _read_manifest_bytes(mpath)
    theirs = doc.get("public_key_fingerprint")
    if pub.verifies(sig, data):
        return True, (f"the manifest's {len(data)} bytes carry a valid Ed25519 signature ({sig_path.name}) by the key "
                      f"with fingerprint {pub.fingerprint()} ({Path(public_key_path).name}); the manifest's hashes tie "
                      "the extract to it (check 'extract hash')")
    if theirs != pub.fingerprint():
        return False, (f"the signature was made by another key (fingerprint {theirs}), not the public key given "
                       f"(fingerprint {pub.fingerprint()}): these files are not shown to be that steward's")
    if doc.get("signed_sha256") != hashlib.sha256(data).hexdigest():
        return False, ("the signature does not verify: the manifest was changed after it was signed (its SHA-256 "
                       "differs from the signed one), so its contents cannot be trusted")
    return False, ("the signature does not verify with the public key given: the signature file was changed or "
                   "damaged, or the manifest was altered; these files are not shown to be the steward's")


def stale_signature(manifest_path: Path | str) -> Path | None:
    """A signature file beside a manifest that was signed over other bytes (an earlier release's,
    left by a release over it without --signing-key): its path, else None."""
    mpath = Path(manifest_path)
    sig_path = signature_path(mpath)
    if not sig_path.is_file():
        return None
    try:
        _, doc = read_signature(sig_path)
    except SignatureFileError:
        return sig_path
    return None if doc.get("signed_sha256") == hashlib.sha256(_read_manifest_bytes(mpath)).hexdigest() else sig_path


def prepare_release_signing(signing_key: Path, out: Path, manifest: Path | None, *, overwrite: bool,
                            known: Sequence[tuple[str, Path | None]] = ()) -> SigningKey:
    """``privatize --signing-key``, before the release runs: the key loads, lies apart from what
    partners receive, and the signature's destination may be written (else exit 2, nothing written)."""
    from .manifest import default_manifest_path

    key = load_signing_key(signing_key)
    mpath = Path(manifest) if manifest is not None else default_manifest_path(Path(out))
    check_key_apart(key, [mpath, Path(out)])
    if mpath.parent.is_dir():  # else the release creates the folder (release/publish.py): the signature is new
        check_signature_destination(mpath, key, overwrite=overwrite, known=[("output", Path(out)), *known])
    return key


def sign_release(manifest_path: Path, key: SigningKey, *, overwrite: bool) -> Path:
    """``privatize --signing-key``, once the release is published: sign its manifest.  A failure
    here says that the release is out but unsigned, and how to sign it."""
    try:
        return sign_manifest(manifest_path, key, overwrite=overwrite)
    except LdptError as err:
        raise OutputError(f"the release was published (manifest {manifest_path}) but its manifest was not signed: "
                          f"{err} Sign it with `ldpt sign {manifest_path} --signing-key {key.path}` before sending "
                          "it.") from None


def after_release(manifest_path: Path, key: SigningKey | None, *, overwrite: bool) -> str:
    """``privatize``, once the release is published: with a signing key, sign the manifest
    (``sign_release``); the line to print: where the signature went, or, without a key, a
    warning for an earlier release's signature left beside the new manifest ("" if none)."""
    if key is not None:
        sig = sign_release(manifest_path, key, overwrite=overwrite)
        return f"signed the manifest: {sig} (signing key fingerprint {key.fingerprint()}); send it with the manifest"
    stale = stale_signature(manifest_path)
    if stale is None:
        return ""
    return (f"WARNING: {stale} beside the new manifest is the signature of other bytes (an earlier release's): "
            "partners checking it will see a failed signature. Sign the new manifest with `ldpt sign "
            f"{manifest_path} --signing-key KEY --overwrite`, or remove {stale}.")


class SignatureRefused(LdptError):
    """``estimate --public-key``: a manifest's signature does not verify (exit 2)."""


def require_signatures(extracts: Sequence[Path], manifests: Sequence[Path] | None,
                       public_key_path: Path | str) -> None:
    """Refuse (SignatureRefused, exit 2) unless every extract's manifest (``manifests``, or the one
    beside each extract) carries a signature that verifies with the public key."""
    from .manifest import default_manifest_path

    paths = list(manifests) if manifests else [default_manifest_path(Path(e)) for e in extracts]
    for m in paths:
        ok, detail = check_signature(m, public_key_path)
        if not ok:
            raise SignatureRefused(f"not decoding: the signature of manifest {m} does not hold ({detail}). Ask the "
                                   "data steward for the signed manifest, or leave out --public-key to decode files "
                                   "whose origin is not shown.")
