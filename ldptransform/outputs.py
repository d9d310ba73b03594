"""Where a command may write: one check for every writer, and one writer per destination.

Every command that writes files names its outputs and every file it reads or knows of, each
with a role (the names below, used in messages).  ``check_outputs`` then refuses, with exit
code 2 and nothing written:

* an output that is one of the known files (input, policy, key file, ledger, raw input,
  manifest, extract...) or another output, paths compared after resolving symlinks, or that lies
  inside a known folder (a dataset input or extract) or inside a folder output: whatever
  ``overwrite`` says, a command never replaces what it reads or a secret it knows;
* an output whose folder does not exist, or that is a folder where a file is written;
* an existing output without ``overwrite``.

``check_private_place`` keeps steward-only files (diagnostics) out of the folders partners
receive (the extract's and the manifest's).  ``DestinationLock`` holds an exclusive
``fcntl.flock`` on a hidden lock file beside each destination (``.NAME.ldpt-lock``, empty,
removed when the job ends), so a second job aimed at the same destination stops at once
instead of replacing the first one's files.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .errors import OutputError, OutputExistsError, UsageError

# roles, as messages name them
INPUT = "input"
RAW = "raw input"
POLICY = "policy file"
KEY = "key file"
LEDGER = "ledger"
EXTRACT = "output"
MANIFEST = "manifest"
DIAGNOSTICS = "diagnostics file"
ESTIMATES = "estimates file"
DEMO = "demo file"

Named = tuple[str, Path | None]


def same_file(a: Path, b: Path) -> bool:
    """Whether two paths name the same file once symlinks and relative parts are resolved."""
    try:
        return Path(a).resolve() == Path(b).resolve() or (a.exists() and b.exists() and os.path.samefile(a, b))
    except OSError:
        return False


def inside(path: Path, folder: Path) -> bool:
    """Whether ``path`` lies inside the existing folder ``folder`` (symlinks resolved)."""
    try:
        return folder.is_dir() and Path(path).resolve().is_relative_to(folder.resolve())
    except OSError:
        return False


def check_apart(outputs: Sequence[Named], known: Sequence[Named], *, folders: Sequence[Named] = ()) -> None:
    """Refuse, whatever ``overwrite`` says, an output that is a known file or another output, or
    that lies inside a known folder or a folder output (``folders``)."""
    outs = [(r, Path(p)) for r, p in outputs if p is not None]
    for i, (role, path) in enumerate(outs):
        for other_role, other in [*known, *outs[i + 1:]]:
            if other is not None and same_file(path, Path(other)):
                raise UsageError(
                    f"the {role} {path} is the {other_role} {other}: writing it would destroy that file. Give the "
                    f"{role} a path of its own; no option (not even --overwrite) lets a command replace a file it "
                    "reads or a secret it knows (input, policy, key file, ledger, manifest, extract).")
        for other_role, other in [*known, *folders]:
            if other is not None and Path(other) != path and inside(path, Path(other)):
                raise UsageError(
                    f"the {role} {path} is inside the {other_role} folder {other}: writing it would change that "
                    f"folder. Write the {role} outside {other}.")


def check_new(outputs: Sequence[Named], overwrite: bool) -> None:
    """Each output's folder exists, the output is not a folder, and it is new unless ``overwrite``."""
    for role, p in outputs:
        if p is None:
            continue
        path = Path(p)
        if not path.parent.exists():
            raise UsageError(f"{role} {path}: folder {path.parent} does not exist. Create it first.")
        if path.is_dir():
            raise UsageError(f"{role} {path} is a folder; give a file path.")
        if path.exists() and not overwrite:
            raise OutputExistsError(f"{role} {path} already exists. Give --overwrite to replace it, or choose "
                                    "another path.")
        secret = _secret_kind(path)
        if secret:
            raise UsageError(f"the {role} {path} is {secret}: writing it would destroy that file. Give the {role} "
                             "a path of its own; no option (not even --overwrite) replaces a key or a ledger.")


def _secret_kind(path: Path) -> str | None:
    """What an existing file is if it is one of the steward's secrets (a key file or a ledger, told
    by their first bytes), whichever command would write over it; None otherwise."""
    from .keys import KEY_HEADER

    try:
        with open(path, "rb") as f:
            head = f.read(32)
    except OSError:
        return None
    if head.startswith(KEY_HEADER.encode("ascii")):
        return "a secret key file"
    from .signing import SIGNING_KEY_HEADER

    if head.startswith(SIGNING_KEY_HEADER.encode("ascii")):
        return "a private signing key file"
    if head.startswith(b"SQLite format 3\0"):
        return "a SQLite database (such as a spend ledger)"
    return None


def check_outputs(outputs: Sequence[Named], known: Sequence[Named], *, overwrite: bool,
                  folders: Sequence[Named] = ()) -> None:
    """``check_apart`` (never replaced, even with ``overwrite``), then ``check_new``."""
    check_apart(outputs, known, folders=folders)
    check_new(outputs, overwrite)


def check_private_place(role: str, path: Path, public: Sequence[Named], flag: str) -> None:
    """Refuse a steward-only file (``role`` at ``path``, chosen by ``flag``) in the folder of one
    of the ``public`` outputs (what partners receive) or inside a public folder output."""
    for other_role, other in public:
        if other is None:
            continue
        other = Path(other)
        folder_output = other.is_dir() or other.suffix == ""  # a dataset: anything inside it goes along
        where = other if folder_output else other.parent
        try:
            same = path.resolve().parent == where.resolve() or (
                folder_output and path.resolve().is_relative_to(where.resolve()))
        except OSError:
            same = False
        if same:
            raise UsageError(
                f"the {role} {path} would be written in {where}, the folder of the {other_role} {other}: that folder "
                f"is what partners receive, and the {role} is steward-only (data-dependent counts). Give {flag} a "
                "path in a private folder (mode 0700), or leave it out to use the steward's private folder.")


def _lock_file(dest: Path) -> Path:
    dest = Path(dest)
    return dest.parent / f".{dest.name}.ldpt-lock"


class DestinationLock:
    """Exclusive locks on destinations, one hidden lock file beside each (module docstring).

    ``acquire`` takes them in a fixed order without waiting: a destination another job holds
    is a user error naming it (exit 2), and the locks already taken are released.  ``release``
    removes the lock files (while still holding them) and closes them."""

    def __init__(self, destinations: Sequence[Named]) -> None:
        self._wanted = sorted({(str(Path(p).resolve()), role) for role, p in destinations if p is not None})
        self._held: list[tuple[Path, int]] = []

    def acquire(self) -> DestinationLock:
        try:
            for dest, role in self._wanted:
                self._take(Path(dest), role)
        except BaseException:
            self.release()
            raise
        return self

    def _take(self, dest: Path, role: str) -> None:
        lock = _lock_file(dest)
        while True:
            try:
                fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o600)
            except FileNotFoundError:
                return  # its folder does not exist: check_new says so
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                raise OutputError(
                    f"another job is writing the {role} {dest} right now (it holds the lock {lock}): two jobs "
                    "writing one destination would replace each other's files (and both be charged to a ledger). "
                    "Nothing was written. Wait until that job has finished, or write to another path.") from None
            try:  # the file may have been removed by its last holder between our open and our lock
                same = os.stat(lock).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if same:
                self._held.append((lock, fd))
                return
            os.close(fd)

    def release(self) -> None:
        held, self._held = self._held, []
        for lock, fd in reversed(held):
            with contextlib.suppress(OSError):
                os.unlink(lock)
            os.close(fd)

    def __enter__(self) -> DestinationLock:
        return self.acquire()

    def __exit__(self, *exc: Any) -> None:
        self.release()


def probe_locks(destinations: Sequence[Named]) -> None:
    """Refuse at once if another job holds one of ``destinations`` (takes the locks and lets go)."""
    DestinationLock(destinations).acquire().release()
