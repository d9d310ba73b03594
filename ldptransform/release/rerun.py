"""The idempotent rerun of a nightly job (``privatize(..., idempotent=True)``).

When the destination already holds a release (its extract or its manifest), the rerun is a
no-op if that release is this very release: its manifest names this key (fingerprint) and this
policy (``policy_sha256``), the extract on disk holds the manifest's bytes (integrity.py), a nonce
given to this call is the manifest's, and the steward's nonce record (nonces.py) holds the
manifest's nonce with this key, this policy and an input whose digest is the current input's.
Then nothing is written, charged or recorded.  Anything else published there is refused
(``OutputExistsError``) with what differs and how to go on.  The input's digest is computed here
(a pass of its own where no earlier pass gave it) and never written anywhere: it is private (a
digest of the raw data lets whoever holds it confirm a guessed table).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from ..errors import LdptError, OutputExistsError
from ..integrity import check_extract
from ..keys import SecretKey
from ..manifest import Manifest, load_manifest
from ..policy import LoadedPolicy
from . import nonces
from .options import ReleaseOptions


def published(opts: ReleaseOptions) -> bool:
    """Does the destination hold (a part of) a release?"""
    return opts.out.exists() or opts.out.is_symlink() or opts.manifest_path.exists()


_HOW = ("To publish a new release there, run without idempotent mode and with --overwrite (Python: "
        "overwrite=True); to keep the published one, write this release to another --out.")


def _refuse(opts: ReleaseOptions, what: str) -> OutputExistsError:
    return OutputExistsError(f"a different release is already published at {opts.out} (manifest "
                             f"{opts.manifest_path}): {what}; nothing was written, charged or recorded. {_HOW}")


def published_release(opts: ReleaseOptions, policy: LoadedPolicy, key: SecretKey, src: Any,
                      stop: Callable[[], None] | None = None) -> Manifest:
    """The manifest of the identical release published at the destination, or an
    ``OutputExistsError`` saying what differs (module docstring).  Call only if ``published``."""
    manifest = _intact(opts)
    differs = []
    if manifest.key_fingerprint != key.fingerprint():
        differs.append(f"it was made with another key (fingerprint {manifest.key_fingerprint}, this key's is "
                       f"{key.fingerprint()})")
    if manifest.policy_sha256 != policy.policy.sha256():
        differs.append("it was made under a different policy (its policy_sha256 differs from this policy's)")
    if opts.nonce_given and manifest.nonce != opts.nonce:
        differs.append(f"it has the nonce {manifest.nonce}, not the nonce {opts.nonce} given")
    if differs:
        raise _refuse(opts, "; ".join(differs))
    digest = nonces.input_digest(src, opts, stop).get("sha256")
    if digest is None:
        raise _refuse(opts, f"this input ({opts.input_text}) cannot be digested, so it cannot be shown to be the "
                            "input of that release")
    records = nonces.records_of(manifest.nonce, key.fingerprint(), manifest.policy_sha256)
    if not records:
        raise _refuse(opts, f"the steward's nonce record ({nonces.state_path()}) holds no release of its nonce "
                            f"{manifest.nonce} under this key and policy (it was made by another steward, or the "
                            "record was lost), so its input cannot be shown to be this one")
    if not any((r.get("input") or {}).get("sha256") == digest for r in records):
        raise _refuse(opts, f"it was made from other input data than {opts.input_text} (the steward's nonce record "
                            f"holds its nonce {manifest.nonce} with the digest of another input)")
    return manifest


def _intact(opts: ReleaseOptions) -> Manifest:
    """The published manifest, refused when it or its extract is missing, damaged or not the other's."""
    if not opts.manifest_path.exists():
        raise _refuse(opts, f"its manifest {opts.manifest_path} is missing, so the extract cannot be shown to be "
                            "this release's")
    if not (opts.out.exists() or opts.out.is_symlink()):
        raise _refuse(opts, f"its manifest is there but its extract {opts.out} is missing")
    try:
        manifest = load_manifest(opts.manifest_path)
    except LdptError:
        raise _refuse(opts, f"its manifest {opts.manifest_path} is damaged (not a readable ldptransform "
                            "manifest)") from None
    if manifest.extract.file != opts.out.name:
        raise _refuse(opts, f"its manifest describes the extract {manifest.extract.file}, not {opts.out.name}")
    try:
        integrity = check_extract(opts.out, manifest)
    except OSError:
        raise _refuse(opts, f"its extract {opts.out} cannot be read") from None
    if not integrity.ok:
        raise _refuse(opts, f"its extract is damaged or is not its manifest's ({integrity.detail})")
    return manifest
