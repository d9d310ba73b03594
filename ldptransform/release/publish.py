"""Publishing a release: the destinations checked before anything is written, the manifest
(last to be written, first to be read) and the steward's private diagnostics staged beside the
extract, and the final move of everything into place (atomic renames, after the ledger record)."""

from __future__ import annotations

import contextlib
import os
import secrets
import stat
from pathlib import Path
from typing import Any

from .. import outputs
from .._version import __version__
from ..errors import OutputError, UsageError
from ..io import StagedFiles, check_dataset_destination, private_dir, remove_stale_partials_in
from ..keys import SecretKey
from ..ledger import LedgerCharges
from ..manifest import CAUTIONS, Manifest, Privacy, now_utc
from ..policy import LoadedPolicy
from ..random.bits import PRF_VERSION
from .central import central_entry
from .columns import ColumnPlan, column_entries, column_warnings
from .memo import memo_composition_text
from .options import ReleaseOptions
from .parts import Written


DIAGNOSTICS_SUFFIX = ".PRIVATE-diagnostics.json"


def check_destinations(opts: ReleaseOptions) -> Path:
    """The destinations' folders exist or can be created (``missing_folders``; a dataset output:
    see ``io.check_dataset_destination``); returns the diagnostics file's path (by default a fresh
    name in the private folder: re-running a release with the same nonce and file name must not
    collide).  Whether an output may be replaced is ``check_paths_apart``'s question (asked next)."""
    path = opts.diagnostics_path
    if path is None:
        path = private_dir() / f"{opts.out.stem}.{opts.nonce[:12]}.{secrets.token_hex(4)}{DIAGNOSTICS_SUFFIX}"
    missing_folders(opts, path)  # refuses a folder that cannot be created, before anything is read
    if opts.dataset_out and opts.out.parent.is_dir():
        check_dataset_destination(opts.out, opts.overwrite)
    return path


PUBLIC_FOLDER_MODE = 0o777  # less the umask: the folders of what partners receive
PRIVATE_FOLDER_MODE = 0o700  # the folders of steward-only files (diagnostics)


def missing_folders(opts: ReleaseOptions, diag_path: Path) -> list[tuple[Path, int]]:
    """The folders of the release's destinations that do not exist yet, outermost first, each
    with the mode it is created with: 0700 for a folder only steward-only files need (the
    diagnostics file's), else 0777 less the umask.  Refused (nothing created): a destination below
    a file, or below a folder this user may not write in."""
    wanted: dict[Path, int] = {}
    dests = [(outputs.EXTRACT, opts.out, False), (outputs.MANIFEST, opts.manifest_path, False),
             (outputs.DIAGNOSTICS, diag_path, True)]
    for role, dest, private in dests:
        folder = Path(os.path.abspath(dest)).parent
        chain = []
        while not folder.exists() and not folder.is_symlink() and folder != folder.parent:
            chain.append(folder)
            folder = folder.parent
        if not folder.is_dir():
            made = f", so folder {chain[-1]} cannot be created in it" if chain else ""
            raise UsageError(f"{role} {dest}: {folder} is a file, not a folder{made}. Give the {role} a path in a "
                             "folder.")
        if not chain:
            continue
        if not os.access(folder, os.W_OK | os.X_OK):
            raise OutputError(f"{role} {dest}: folder {chain[0]} does not exist and cannot be created: this user may "
                              f"not write in {folder}. Create the folder yourself, or give the {role} a path in a "
                              "folder you may write in.")
        for f in chain:
            mode = PRIVATE_FOLDER_MODE if private else PUBLIC_FOLDER_MODE
            wanted[f] = max(wanted.get(f, mode), mode)  # a folder partners' files need too is not private
    return sorted(wanted.items(), key=lambda item: len(item[0].parts))


def create_folders(staged: StagedFiles, opts: ReleaseOptions, diag_path: Path) -> None:
    """Create the destinations' missing folders (``missing_folders``), as late as possible: just
    before the release writes.  If the release then fails, the folders it created are removed
    again once its staged files are (only those, and only when empty): a refused release leaves
    nothing behind.  An existing folder is never changed."""
    created: list[Path] = []

    def remove_created() -> None:
        if staged.committed:
            return
        for folder in reversed(created):
            with contextlib.suppress(OSError):
                folder.rmdir()

    staged.on_exit(remove_created)
    for folder, mode in missing_folders(opts, diag_path):
        try:
            folder.mkdir(mode=mode)
        except FileExistsError:
            continue  # made meanwhile by someone else: theirs, never ours to change or remove
        except OSError as err:
            raise OutputError(f"folder {folder} for the release's files could not be created "
                              f"({err.strerror or 'the system refused'}). Nothing was written. Create it yourself, or "
                              "give paths in an existing folder.") from None
        created.append(folder)
        if mode == PRIVATE_FOLDER_MODE and stat.S_IMODE(folder.stat().st_mode) != PRIVATE_FOLDER_MODE:
            os.chmod(folder, PRIVATE_FOLDER_MODE)  # ours, just made: private whatever the umask allowed


def _outputs(opts: ReleaseOptions, diag_path: Path) -> list[tuple[str, Path | None]]:
    return [(outputs.EXTRACT, opts.out), (outputs.MANIFEST, opts.manifest_path), (outputs.DIAGNOSTICS, diag_path)]


def _locked(opts: ReleaseOptions, diag_path: Path) -> list[tuple[str, Path | None]]:
    """The destinations another job could aim at too (a default diagnostics name is fresh for every
    run, so it needs no lock, and a killed run leaves no lock file in the private folder)."""
    dests = _outputs(opts, diag_path)
    return dests if opts.diagnostics_path is not None else dests[:2]


def check_paths_apart(opts: ReleaseOptions, policy: LoadedPolicy, key: SecretKey, diag_path: Path) -> None:
    """Refuse, whatever ``overwrite`` says, a ledger that is the input, the policy or the key file,
    and an output (extract, manifest, diagnostics) that is the
    input, the policy, the key file, the ledger or another of the outputs, or lies inside the input
    folder (paths compared after resolving symlinks); then an existing output without
    ``overwrite``; diagnostics in the folder of the extract or the manifest (what partners
    receive); and a destination another job is writing (``outputs.DestinationLock``)."""
    sources: list[tuple[str, Path | None]] = [
        (outputs.INPUT, opts.input if isinstance(opts.input, Path) else None),
        (outputs.POLICY, Path(policy.source) if Path(policy.source).is_file() else None),
        (outputs.KEY, key.path)]
    # the ledger is written too (the release is recorded in it): never over what the release reads
    outputs.check_apart([(outputs.LEDGER, opts.ledger_path)], sources)
    known = [*sources, (outputs.LEDGER, opts.ledger_path)]
    dests = _outputs(opts, diag_path)
    outputs.check_apart(dests, known, folders=[(outputs.EXTRACT, opts.out)] if opts.dataset_out else [])
    # a destination whose folder is still to be created (``create_folders``) is new
    outputs.check_new([d for d in (dests[1:] if opts.dataset_out else dests)
                       if d[1] is None or Path(d[1]).parent.is_dir()], opts.overwrite)
    outputs.check_private_place(outputs.DIAGNOSTICS, diag_path, dests[:2], "--diagnostics")
    outputs.probe_locks(_locked(opts, diag_path))


def hold_destinations(staged: StagedFiles, opts: ReleaseOptions, diag_path: Path) -> None:
    """Lock every destination of the release until ``staged`` ends (a second job on one of them
    stops with exit 2 and changes nothing), and check again, under the lock, that no job that
    finished meanwhile left an output this release may not replace.  The destinations' missing
    folders are created first (``create_folders``)."""
    dests = _outputs(opts, diag_path)
    create_folders(staged, opts, diag_path)
    lock = outputs.DestinationLock(_locked(opts, diag_path)).acquire()
    staged.on_exit(lock.release)
    remove_stale_partials_in(diag_path.parent, DIAGNOSTICS_SUFFIX)  # a killed run's diagnostics, whatever its name
    if opts.dataset_out:
        check_dataset_destination(opts.out, opts.overwrite)
    outputs.check_new(dests[1:] if opts.dataset_out else dests, opts.overwrite)


ROW_ORDER_NOTES = {
    "shuffled": "the rows are listed in a keyed pseudorandom order, independent of the data and of the input's "
                "order (only the data steward can recompute it); public columns travel with their rows",
    "as-input": "the rows keep the input's order, at the data steward's request: if the input was sorted or "
                "grouped by anything (a site, a date, a pay grade), a row's neighbours tell about it, whatever "
                "the privatized columns say",
}
PLACEHOLDER_NOTE = (
    "this release may contain placeholder rows: rows of people past their lifetime budget, kept at their place "
    "so that the row count is the full table's, whose privatized cells are reports of values drawn at random "
    "(uniformly over each column's categories or bounds) independently of anyone's data; their public cells "
    "are their own. Whether there are any, and how many, is not published. Estimates from this extract "
    "describe the released rows, placeholder rows included (they pull every estimate toward the uniform "
    "distribution over each column's domain).")


def privacy_entry(policy: LoadedPolicy, plans: list[ColumnPlan], opts: ReleaseOptions | None = None,
                  rows: int | None = None) -> Privacy:
    d, m = len(policy.policy.privatized_columns), policy.policy.reported_columns
    memo_text = memo_composition_text(policy)
    order = policy.policy.output.row_order
    common: dict[str, Any] = {
        "model": "local differential privacy: every row is randomized on its own, column by column",
        "epsilon_per_row_budget": policy.policy.budget.epsilon_per_row,
        "public_columns": [p.rc.name for p in plans if p.rc.type == "public"],
        "strategy": policy.strategy, "privatized_columns": d, "reported_columns": m,
        "row_order": order, "row_order_note": ROW_ORDER_NOTES[order],
        "placeholder_rows": PLACEHOLDER_NOTE if opts is not None and opts.allow_partial else None}
    if policy.strategy == "sample":
        if rows is not None:
            common["central"] = central_entry(policy, plans, opts, rows, policy.epsilon_total)
        return Privacy(**common, epsilon_per_row_used=policy.epsilon_total,
                       composition=f"sequential over the columns a row reports: each row reports {m} of its {d} "
                                   f"privatized columns, each randomized at eps {policy.policy.sampled_epsilon:g} "
                                   f"(epsilon_per_row / {m}), so a row's epsilon is {m} x that; which columns a row "
                                   "reports is chosen by the keyed PRF independently of the data (the other cells "
                                   "are empty); releases about the same people add up" + memo_text)
    used = sum(p.rc.mechanism.epsilon for p in plans if p.rc.mechanism is not None)
    if rows is not None:
        common["central"] = central_entry(policy, plans, opts, rows, used)
    return Privacy(**common, epsilon_per_row_used=used,
                   composition="sequential: a row's epsilon is the sum over its privatized columns; releases about "
                               "the same people add up" + memo_text)


def build_manifest(policy: LoadedPolicy, key: SecretKey, plans: list[ColumnPlan], written: Written,
                   opts: ReleaseOptions) -> Manifest:
    return Manifest(
        tool_version=__version__, created_utc=now_utc(), rows=written.rows, nonce=opts.nonce,
        key_fingerprint=key.fingerprint(), prf=PRF_VERSION, policy_sha256=policy.policy.sha256(),
        policy=policy.policy.canonical(), privacy=privacy_entry(policy, plans, opts, written.rows),
        extract=written.info,
        columns=column_entries(plans, policy.report_rate), cautions=list(CAUTIONS))


def diagnostics(plans: list[ColumnPlan], written: Written, opts: ReleaseOptions, manifest_path: Path,
                charges: LedgerCharges | None, sampled: bool, seconds: float) -> dict[str, Any]:
    """The steward-only diagnostics: data-dependent counts, never for partners."""
    diag: dict[str, Any] = {
        "PRIVATE": "steward-only diagnostics: data-dependent counts. Do not give this file to partners.",
        "extract": str(opts.out), "manifest": str(manifest_path), "nonce": opts.nonce, "rows": written.rows,
        "input_rows": written.input_rows, "engine": opts.engine,
        "seconds": round(seconds, 3), "batch_rows": opts.batch_rows, "input": opts.input_text,
        "columns": {p.rc.name: p.diag.as_dict() for p in plans if p.rc.mechanism is not None},
        "warnings": release_warnings(plans, written.input_rows),
    }
    if sampled:
        diag["reported_cells"] = {p.rc.name: p.reported for p in plans if p.rc.mechanism is not None}
    if charges is not None:
        diag["ledger"] = {
            "path": str(opts.ledger_path), "lifetime_epsilon": opts.lifetime_epsilon,
            "subjects_charged": int(charges.within.sum()),
            "held_back_subjects": int((~charges.within).sum()), "held_back_rows": int((~charges.row_within).sum()),
            "eps_charged_max": float(charges.eps[charges.within].max()) if charges.within.any() else 0.0,
        }
    return diag


def release_warnings(plans: list[ColumnPlan], rows: int) -> list[str]:
    """The steward's warnings of the release (``columns.column_warnings`` of every privatized column)."""
    return [w for p in plans if p.rc.mechanism is not None for w in column_warnings(p, rows)]


def stage_text(staged: StagedFiles, dest: Path, text: str, mode: int = 0o644) -> None:
    """Stage a small text file (the manifest, the diagnostics) to be moved into place with the extract."""
    write_text_atomic_into(staged.add(dest), text, mode)


def move_into_place(staged: StagedFiles, opts: ReleaseOptions, release_id: int | None) -> None:
    """Rename every staged file into place.  Once the ledger counts the release (``release_id``),
    a stop signal no longer cancels it, and a failed move says the release is counted."""
    try:
        if opts.overwrite and opts.manifest_path.exists():
            opts.manifest_path.unlink()  # never leave an old manifest beside a new extract
        staged.commit(check=release_id is None)
    except OSError as err:
        if release_id is None:
            raise
        raise OutputError(
            f"the release was recorded in ledger {opts.ledger_path} as release {release_id}, but its files could "
            f"not be moved into place ({err.strerror or err}: {err.filename or opts.out}); nothing was published. "
            "The ledger counts this release for every subject in it (an over-count, the safe side: nobody's spend "
            "is understated). Fix the output folder and run the release again; tell your privacy officer if "
            "the extra count matters.") from None


def write_text_atomic_into(tmp: Path, text: str, mode: int = 0o644) -> None:
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    with os.fdopen(fd, "w", encoding="utf-8") as f:
        f.write(text)
        f.flush()
        os.fsync(f.fileno())
