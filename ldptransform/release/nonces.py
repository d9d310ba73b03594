"""Single-use nonces: the steward's record of every release nonce, and the refusal of a reuse.

Two releases under one key and one nonce draw the same noise for every cell, so where their
inputs differ the two extracts differ exactly in the changed cells, and the flipped reports name
the old and the new value.  So every release's nonce is recorded in the steward's private
folder, in ``nonces.jsonl`` (``io.private_dir()``, mode 0700; the file itself 0600): one JSON
line per release, appended under an exclusive ``fcntl.flock`` of the file, holding

* ``nonce`` and ``key_fingerprint`` (a nonce is only reused if the key is the same too),
* ``input``: its ``kind`` (``file``, ``dataset``, ``pandas-dataframe``, ``arrow-table``,
  ``arrow-stream`` or ``dask-dataframe``) and ``sha256``: of the file's bytes; for a Parquet
  dataset, of the lines ``NAME SHA256 BYTES`` of its files in sorted order (``files`` lists
  them); for a table in memory, of the Arrow IPC stream of its rows as read (memory.py); a dask
  DataFrame cannot be digested (``sha256`` null),
* ``policy_sha256`` (``Policy.sha256()``, as in the manifest), ``extract`` and ``time_utc``.

``check`` runs before anything is written: a nonce already recorded with the same key is
refused unless the input and policy digests are both identical (a true reproduction, which
gives the same extract bit for bit and discloses nothing new).  ``record`` runs once the
release's files are staged and the ledger (if any) has recorded it, before they are moved into
place (a release the ledger refuses leaves no record); it checks again under the lock
(two jobs started at once with one nonce) and appends.  A refused or failed release records
nothing.  The steward's re-derivation in ``validate`` runs inside ``rederiving()``: it is
neither refused by nor recorded in this state.

Cost: a CSV file costs no pass of its own: the reader digests the bytes of every pass it makes
(``io.DigestingFile``), and the record takes the digest of the bytes the extract was made from
(checked then, after the extract is staged, when no earlier pass was made); so does a table in
memory (``memory.MemorySource``).  A Parquet file or dataset is read once more, through hashlib
in 8 MiB chunks (measured in docs/commands.md).  The digest never leaves the steward's record: a digest
of the raw data would let a partner confirm a guessed table.
"""

from __future__ import annotations

import contextlib
import contextvars
import fcntl
import hashlib
import json
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..errors import NonceReusedError, UsageError
from ..io import private_dir, sha256_stream
from ..keys import SecretKey
from ..manifest import now_utc
from ..policy import LoadedPolicy
from .options import ReleaseOptions

STATE_NAME = "nonces.jsonl"
CHUNK_BYTES = 1 << 23
_DATASET_LABEL = b"ldptransform/input-dataset/v1\n"
_rederiving: contextvars.ContextVar[bool] = contextvars.ContextVar("ldpt_rederiving", default=False)


def state_path() -> Path:
    """The nonce record of this steward (in the private folder)."""
    return private_dir() / STATE_NAME


@contextlib.contextmanager
def rederiving() -> Iterator[None]:
    """Releases made inside this block (validate's re-derivation, into a private temporary
    folder) are neither checked against nor recorded in the nonce record."""
    token = _rederiving.set(True)
    try:
        yield
    finally:
        _rederiving.reset(token)


@dataclass(frozen=True)
class NonceUse:
    """What ``record`` appends for this release (``entry``), and where."""

    path: Path
    entry: dict[str, Any]


def input_digest(src: Any, opts: ReleaseOptions, stop: Callable[[], None] | None = None) -> dict[str, Any]:
    """The ``input`` entry of a release: kind and digest (None for a dask DataFrame).  ``stop`` is
    called between chunks (a stop signal ends the digest there)."""
    if opts.memory_kind is not None:  # memory.MemorySource: digested in its first full pass
        digest = src.digest(stop)
        return {"kind": src.kind, "sha256": digest, "rows": src.num_rows}
    if opts.frame_input:
        return {"kind": "dask-dataframe", "sha256": None}
    ds = getattr(src, "dataset", None)
    if ds is not None:
        files = []
        root = ds.root.rstrip("/")
        for path in ds.files:
            with ds.fs.open_input_stream(path) as f:
                digest, size = sha256_stream(f, CHUNK_BYTES, stop)
            files.append([path[len(root):].lstrip("/") if path.startswith(root) else path, digest, size])
        h = hashlib.sha256(_DATASET_LABEL)
        for name, digest, size in files:
            h.update(f"{name} {digest} {size}\n".encode())
        return {"kind": "dataset", "sha256": h.hexdigest(), "files": files}
    known = getattr(src, "content_sha256", None)
    if known is not None:  # a CSV file digests the bytes of each pass it is read in (io.TableSource)
        return {"kind": "file", "sha256": known, "bytes": src.size_bytes}
    with open(src.path, "rb") as f:
        digest, size = sha256_stream(f, CHUNK_BYTES, stop)
    return {"kind": "file", "sha256": digest, "bytes": size}


def _read(path: Path, text: str | None = None) -> list[dict[str, Any]]:
    """The records of the state file (none if it does not exist).  An unfinished last line (a
    crash while appending) is ignored; any other damage is a user error naming the line."""
    if text is None:
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            return []
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    elif lines:
        lines.pop()  # unfinished: never completed, so never counted
    out = []
    for i, line in enumerate(lines, 1):
        try:
            rec = json.loads(line)
            if not isinstance(rec, dict) or not isinstance(rec.get("nonce"), str):
                raise ValueError
        except ValueError:
            raise UsageError(
                f"the nonce record {path} is damaged at line {i} (not a release record): it is what stops a release "
                "nonce from being used twice, so no release runs without it. Restore the file from a backup (or "
                "remove only the damaged line), then run the release again.") from None
        out.append(rec)
    return out


def _conflict(entry: dict[str, Any], records: list[dict[str, Any]]) -> None:
    """Refuse ``entry`` if a record holds its nonce and key with another input or policy."""
    for rec in records:
        if rec.get("nonce") != entry["nonce"] or rec.get("key_fingerprint") != entry["key_fingerprint"]:
            continue
        old, new = rec.get("input") or {}, entry["input"]
        same_input = new.get("sha256") is not None and old.get("sha256") == new["sha256"]
        same_policy = rec.get("policy_sha256") == entry["policy_sha256"]
        if same_input and same_policy:
            continue
        what = []
        if not same_input and new.get("sha256") is None:
            what.append("this release's input is a dask DataFrame, which cannot be digested, so it cannot be shown "
                        "to be the same data")
        elif not same_input and old.get("sha256") is None:
            what.append("that release's input was a dask DataFrame, which cannot be digested, so this input cannot "
                        "be shown to be the same data")
        elif not same_input:
            what.append("this release has different input data")
        if not same_policy:
            what.append("this release has a different policy")
        raise NonceReusedError(
            f"privatize(nonce={entry['nonce']!r})",
            f"{{nonce}} {entry['nonce']} was already used with this key (fingerprint {entry['key_fingerprint']}) by "
            f"the release into {rec.get('extract')} at {rec.get('time_utc')}, and "
            f"{' and '.join(what)}: two releases under one key and nonce share their noise, so comparing them shows "
            "exactly which cells changed and what the old and new values were. Leave out {nonce} to draw a fresh "
            "one; give it only to reproduce a release from the very same input and policy (recorded in "
            f"{state_path()}).")


def check(opts: ReleaseOptions, policy: LoadedPolicy, key: SecretKey, src: Any, *,
          stop: Callable[[], None] | None = None) -> NonceUse | None:
    """Before anything is written: digest the input and refuse a reused nonce (module docstring).
    Returns what ``record`` appends (None inside ``rederiving()``); ``stop``: as ``input_digest``."""
    if _rederiving.get():
        return None
    entry = {"nonce": opts.nonce, "key_fingerprint": key.fingerprint(), "input": input_digest(src, opts, stop),
             "policy_sha256": policy.policy.sha256(), "extract": opts.out_text, "input_location": opts.input_text}
    path = state_path()
    _conflict(entry, _read(path))
    return NonceUse(path, entry)


def records_of(nonce: str, key_fingerprint: str, policy_sha256: str) -> list[dict[str, Any]]:
    """The recorded releases of ``nonce`` under this key and this policy (what an idempotent rerun
    compares the current input's digest with)."""
    return [r for r in _read(state_path()) if r.get("nonce") == nonce and r.get("key_fingerprint") == key_fingerprint
            and r.get("policy_sha256") == policy_sha256]


def record(use: NonceUse | None) -> None:
    """Once the release is staged: check again under the lock and append its record (a true
    reproduction already recorded is not recorded twice)."""
    if use is None:
        return
    fd = os.open(use.path, os.O_RDWR | os.O_CREAT | os.O_APPEND, 0o600)
    with os.fdopen(fd, "r+b") as f:
        fcntl.flock(f.fileno(), fcntl.LOCK_EX)
        f.seek(0)
        text = f.read().decode("utf-8", errors="replace")
        records = _read(use.path, text)
        _conflict(use.entry, records)
        key = ("nonce", "key_fingerprint", "input", "policy_sha256")
        if any(all(r.get(k) == use.entry.get(k) for k in key) for r in records):
            return
        line = json.dumps({**use.entry, "time_utc": now_utc()}, sort_keys=True) + "\n"
        if text and not text.endswith("\n"):
            line = "\n" + line  # close a line a crash left unfinished
        f.write(line.encode("utf-8"))
        f.flush()
        os.fsync(f.fileno())
