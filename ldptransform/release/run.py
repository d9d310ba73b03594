"""The release, top to bottom: check the options, open the input, set up the columns, charge
the ledger (pre-pass), privatize into staged files, write the manifest (last) and the
steward's diagnostics, record the release in the ledger, move everything into place."""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from ..io import StagedFiles, disk_full_error, private_dir
from ..keys import SecretKey
from ..ledger import LedgerCharges
from ..manifest import Manifest
from ..policy import LoadedPolicy
from . import nonces, rerun
from .central import check_one_row_per_person, check_repeats
from .charges import (
    ChargeTap,
    TappedSource,
    check_same_rows,
    folded_charges,
    open_checked,
    precharge,
    record_release,
    rows_held,
)
from .columns import (
    ColumnPlan,
    attach_randomness,
    counts_text,
    output_schema,
    plan_columns,
    read_columns,
)
from .options import DEFAULT_BATCH_ROWS, ReleaseOptions
from .parts import PartJob, write_extract
from .shuffle import tag_stream
from .publish import (
    build_manifest,
    check_destinations,
    check_paths_apart,
    diagnostics,
    hold_destinations,
    move_into_place,
    stage_text,
)
from .source import (
    check_csv_markers,
    check_input_types,
    check_not_the_input,
    dictionary_columns,
    open_source,
    source_location,
)


@dataclass
class ReleaseResult:
    manifest: Manifest
    extract_path: Path
    manifest_path: Path
    diagnostics_path: Path
    seconds: float
    ledger_path: Path | None = None
    ledger_release_id: int | None = None
    held_back_subjects: int = 0  # --allow-partial: data-dependent, steward's stderr and diagnostics only
    held_back_rows: int = 0
    # steward-only (data-dependent): per column, the values changed before randomizing
    # (columns.counts_text), and the warnings above columns.WARN_SHARE of the rows
    column_counts: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    # idempotent=True found this very release already published: nothing was written, charged or
    # recorded; ``manifest`` is the published one, and ``diagnostics_path`` the diagnostics path given
    # (else the steward's private folder, where the published release's diagnostics are by default)
    already_published: bool = False

    def to_dict(self) -> dict[str, Any]:
        """What the release did, for the steward (``steward_only``: the held-back figures, the
        counts of changed values and the warnings depend on the data; never hand them to partners)."""
        m = self.manifest
        return {"extract": str(self.extract_path), "manifest": str(self.manifest_path),
                "diagnostics": str(self.diagnostics_path), "rows": m.rows, "nonce": m.nonce,
                "epsilon_per_row": m.privacy.epsilon_per_row_used, "seconds": self.seconds,
                "already_published": self.already_published,
                "ledger": None if self.ledger_path is None else str(self.ledger_path),
                "ledger_release_id": self.ledger_release_id,
                "steward_only": {"held_back_subjects": self.held_back_subjects, "held_back_rows": self.held_back_rows,
                                 "column_counts": list(self.column_counts), "warnings": list(self.warnings)}}

    def to_frame(self) -> Any:
        """One row per released column: column, type, mechanism, epsilon (None for a public
        column), and the steward-only text of its values changed before randomizing (None if none)."""
        import pandas as pd

        changed = {t.split(": ", 1)[0]: t.split(": ", 1)[1] for t in self.column_counts if ": " in t}
        rows = [{"column": c.name, "type": c.type,
                 "mechanism": None if c.mechanism is None else c.mechanism.get("mechanism"),
                 "epsilon": None if c.mechanism is None else c.mechanism.get("epsilon"),
                 "changed_steward_only": changed.get(c.name)} for c in self.manifest.columns]
        return pd.DataFrame(rows, columns=["column", "type", "mechanism", "epsilon", "changed_steward_only"])


def privatize(input_path: Path | str | Any, policy: LoadedPolicy, key: SecretKey, out: Path | str, *,
              manifest_path: Path | str | None = None, diagnostics_path: Path | str | None = None,
              batch_rows: int = DEFAULT_BATCH_ROWS, overwrite: bool = False, nonce: str | None = None,
              on_progress: Callable[[int], None] | None = None, ledger_path: Path | str | None = None,
              allow_partial: bool = False, engine: str = "local", scheduler: str | None = None,
              fragment_rows: int | None = None, idempotent: bool = False,
              delimiter: str | None = None) -> ReleaseResult:
    """Privatize ``input_path`` under ``policy`` into ``out`` (+ manifest, + private diagnostics).

    With a ledger (``ledger_path``, or the default path when the policy sets
    budget.lifetime_epsilon) a pre-pass works out each subject's charge before anything is
    written; over the cap the release is refused, or with ``allow_partial`` only the rows of
    subjects within it are released.  The release is recorded in the ledger after the extract
    and manifest are staged and before they are renamed into place: a refused record leaves
    nothing; a crash between the ledger commit and the rename leaves an over-count (safe side).

    ``input_path`` may be a file, a Parquet dataset (folder or URI; dataset.py), a pandas
    DataFrame, a pyarrow Table or RecordBatchReader (memory.py: typed columns, the index only
    where the policy names it, a reader streamed) or, through ``engine_dask.privatize_frame``, a
    dask DataFrame.  ``idempotent``: when the destination already holds this very release (same
    key, policy, nonce record entry and input digest; release/rerun.py) return it without writing,
    charging or recording anything (``ReleaseResult.already_published``); a different release
    there is refused (``OutputExistsError``); not with ``overwrite``.  An ``out`` without a file extension
    writes a Parquet dataset of parts of at most ``fragment_rows`` rows; ``engine="dask"``
    writes those parts on dask workers (``scheduler``: a running cluster's address; None: a
    local cluster), byte for byte as the local engine does."""
    t0 = time.perf_counter()
    opts = ReleaseOptions.of(input_path, policy, out, manifest_path=manifest_path, diagnostics_path=diagnostics_path,
                             batch_rows=batch_rows, overwrite=overwrite, nonce=nonce, ledger_path=ledger_path,
                             allow_partial=allow_partial, engine=engine, scheduler=scheduler,
                             fragment_rows=fragment_rows, idempotent=idempotent, delimiter=delimiter)
    return run_release(opts, policy, key, on_progress, t0)


def run_release(opts: ReleaseOptions, policy: LoadedPolicy, key: SecretKey,
                on_progress: Callable[[int], None] | None = None, t0: float | None = None) -> ReleaseResult:
    """The release ``opts`` describes (``privatize`` once its options are checked)."""
    t0 = time.perf_counter() if t0 is None else t0
    # the stop-signal guard covers the whole release, the passes over the input before anything is
    # written (one row per person, the ledger's pre-pass) included: a stop ends it cleanly
    staged = StagedFiles()
    try:
        with staged:
            return _release(opts, policy, key, staged, on_progress, t0)
    except OSError as err:
        dest = staged.destination_of(err.filename) if err.filename else None
        role = "manifest" if dest == opts.manifest_path else "extract" if dest in (None, opts.out) else \
            "diagnostics file"
        full = disk_full_error(err, dest or opts.out, role)
        if full is None:
            raise
        raise full from None


def _release(opts: ReleaseOptions, policy: LoadedPolicy, key: SecretKey, staged: StagedFiles,
             on_progress: Callable[[int], None] | None, t0: float) -> ReleaseResult:
    src = open_source(opts, policy)
    if hasattr(src, "close"):
        staged.on_exit(src.close)  # a spooled copy of a streamed input is removed however the release ends
    check_not_the_input(opts)
    if opts.idempotent and rerun.published(opts):
        manifest = rerun.published_release(opts, policy, key, src, stop=staged.check)
        return ReleaseResult(manifest, opts.out, opts.manifest_path, opts.diagnostics_path or private_dir(),
                             time.perf_counter() - t0, already_published=True)
    diag_path = check_destinations(opts)
    check_paths_apart(opts, policy, key, diag_path)
    plans = plan_columns(policy, src.column_names, source_location(src, opts))
    check_csv_markers(policy, src, plans)
    check_input_types(src, plans, policy, opts)
    fold = _folds(opts, policy, src)
    if hasattr(src, "prepare"):  # a streamed input read more than once is spooled privately first
        src.prepare(_passes(opts, policy, fold), stop=staged.check)
    if opts.ledger_path is None:  # with a ledger its pre-pass reads the subjects and checks this too
        check_one_row_per_person(src, policy, opts.batch_rows, source_location(src, opts), check=staged.check)
    schema = output_schema(plans, src.schema, src.format)
    sampler = attach_randomness(plans, policy, key, opts.nonce)
    read_cols, subject_key = read_columns(plans, policy)
    job = PartJob(read_cols, opts.batch_rows, plans, schema, sampler, subject_key, dictionary_columns(src, plans),
                  order=tag_stream(key, opts.nonce) if policy.policy.output.row_order == "shuffled" else None,
                  public=frozenset(p.rc.name for p in plans if p.rc.type == "public"))
    # a reused nonce is refused before writing where the input's digest is known by then: a CSV
    # file digests the bytes of every pass it is read in (the first pass gives the digest, every
    # later one must read the same bytes), Parquet is digested in a pass of its own here
    nonce_use: nonces.NonceUse | None = None
    nonce_done = False
    if not getattr(src, "digests_while_reading", False):
        nonce_use, nonce_done = nonces.check(opts, policy, key, src, stop=staged.check), True
    # with a ledger, the charges: from a pre-pass when they must be known before writing (who is
    # held back, --allow-partial; or a route that does not read through the source), else from the
    # writing pass's own batches (_charged_write)
    charges = None if fold else precharge(src, plans, policy, key, sampler, opts, check=staged.check)
    if charges is not None:
        check_repeats(len(charges.row_within) - len(charges.subjects), policy, source_location(src, opts))
    if not nonce_done and getattr(src, "content_sha256", None) is not None:
        nonce_use, nonce_done = nonces.check(opts, policy, key, src, stop=staged.check), True
    staged.check()
    hold_destinations(staged, opts, diag_path)
    written, charges = _charged_write(job, src, charges, fold, policy, key, sampler, opts, staged, on_progress)
    if not nonce_done:  # a CSV read once: its digest is that of the bytes the extract was made from
        nonce_use = nonces.check(opts, policy, key, src, stop=staged.check)
    manifest = build_manifest(policy, key, plans, written, opts)
    stage_text(staged, opts.manifest_path, manifest.to_json())
    diag = diagnostics(plans, written, opts, opts.manifest_path, charges, sampler is not None,
                       time.perf_counter() - t0)
    stage_text(staged, diag_path, json.dumps(diag, indent=2) + "\n", mode=0o600)
    if hasattr(src, "check_unchanged"):
        src.check_unchanged()  # the last word, after every pass: the input is still the file first opened
    release_id = _record(staged, charges, plans, manifest, opts)
    nonces.record(nonce_use)  # after the ledger: a release the ledger refuses leaves no nonce record
    move_into_place(staged, opts, release_id)
    counts = (0, 0) if charges is None else (int((~charges.within).sum()), int((~charges.row_within).sum()))
    changed = tuple(t for p in plans if p.rc.mechanism is not None
                    for t in [counts_text(p, written.input_rows)] if t is not None)
    return ReleaseResult(manifest, opts.out, opts.manifest_path, diag_path, time.perf_counter() - t0,
                         opts.ledger_path if charges is not None else None, release_id, *counts,
                         column_counts=changed, warnings=tuple(diag["warnings"]))


def _charged_write(job: PartJob, src: Any, charges: LedgerCharges | None, fold: bool, policy: LoadedPolicy,
                   key: SecretKey, sampler: Any, opts: ReleaseOptions, staged: StagedFiles,
                   on_progress: Callable[[int], None] | None) -> tuple[Any, LedgerCharges | None]:
    """Write the staged extract.  ``fold``: the ledger's charges come from the writing pass's own
    batches (ChargeTap), refused over the budget once it is done (the staged files are removed,
    nothing reaches a destination); else ``charges`` are the pre-pass's, or None without a ledger."""
    tap, led = None, None
    if fold:
        # another key's ledger: refused before the work; a damaged one by the tap's worker, which
        # checks the stored state beside the writing pass
        led = open_checked(opts, key, state=False)
        tap = ChargeTap(job.plans, policy, key, sampler, led, opts.lifetime_epsilon)
    try:
        feed = src
        if tap is not None and tap.kernel_fed:  # the kernel hands the tap its subjects and value codes
            job = replace(job, observe=tap.observe, on_pass_done=tap.pass_done)
        elif tap is not None:  # the tap reads the subject column with the pass's own batches
            feed = TappedSource(src, tap)
            job = replace(job, on_pass_done=tap.pass_done)
        written = write_extract(job, feed, rows_held(charges, job.plans), opts, staged, on_progress)
    except BaseException:
        if tap is not None:
            tap.close()  # the worker is done with the ledger before it is closed
        if led is not None:
            led.close()
        raise
    if tap is not None:
        charges = folded_charges(tap, led, opts)
        check_repeats(len(charges.row_within) - len(charges.subjects), policy, source_location(src, opts))
    check_same_rows(charges, written.input_rows, source_location(src, opts))
    return written, charges


def _record(staged: StagedFiles, charges: LedgerCharges | None, plans: list[ColumnPlan], manifest: Manifest,
            opts: ReleaseOptions) -> int | None:
    """Record the staged release in the ledger (None without one); a stop asked for before
    the ledger commit leaves nothing at all."""
    if charges is None:
        return None
    staged.check()
    assert opts.ledger_path is not None
    return record_release(opts.ledger_path, charges, plans, manifest, opts.lifetime_epsilon)


def _folds(opts: ReleaseOptions, policy: LoadedPolicy, src: Any) -> bool:
    """Whether the ledger's charges come from the writing pass itself (the input read once): with a
    ledger, without --allow-partial (who is held back must be known before writing), on the local
    engine, through a route that reads the source's batches (not an as-input dataset of a Parquet
    input's own fragments)."""
    if opts.ledger_path is None or opts.allow_partial or opts.engine != "local":
        return False
    fragments = (opts.dataset_out and policy.policy.output.row_order != "shuffled" and hasattr(src, "parquet_dataset")
                 and src.parquet_dataset(opts.fragment_rows) is not None)
    return not fragments


def _passes(opts: ReleaseOptions, policy: LoadedPolicy, fold: bool) -> int:
    """How many times the release reads its input: the extract's pass, and before it the ledger's
    pre-pass (unless it is folded into the extract's pass) or (without a ledger) the
    one-row-per-person check."""
    extra = (opts.ledger_path is not None and not fold) or (
        opts.ledger_path is None and policy.policy.output.one_row_per_person and policy.policy.subject_key is not None)
    return 2 if extra else 1
