"""Where a release's rows come from: a file or Parquet dataset (``io.TableSource``) or a dask
DataFrame (``engine_dask.FrameSource``), and the checks that need the input's layout."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..errors import PolicyError, UsageError
from ..io import TableSource
from ..policy import LoadedPolicy
from .columns import ColumnPlan
from .options import ReleaseOptions


def open_source(opts: ReleaseOptions, policy: LoadedPolicy) -> Any:
    """The input as a source of record batches (``batches``, ``schema``, ``column_names``...)."""
    if opts.frame_input:
        from ..engine_dask import FrameSource

        return FrameSource(opts.input)
    return TableSource(opts.input, csv_null_values=policy.policy.input.csv_null_values,
                       csv_delimiter=policy.policy.input.csv_delimiter)


def source_location(src: Any, opts: ReleaseOptions) -> str:
    """How messages name the input."""
    return getattr(src, "location", str(opts.input))


def check_not_the_input(opts: ReleaseOptions) -> None:
    """Refuse an extract or manifest path that is the input file, and a manifest written over the extract."""
    if isinstance(opts.input, Path):
        try:
            same = opts.out.exists() and opts.out.resolve() == opts.input.resolve()
        except OSError:
            same = False
        if same:
            raise UsageError(f"output {opts.out} is the input; write the extract to another path.")
        if opts.manifest_path.resolve() == opts.input.resolve():
            raise UsageError(f"the manifest {opts.manifest_path} is the input {opts.input}: writing it would destroy "
                             "the input. Give the manifest a path of its own.")
    if opts.manifest_path.resolve() == opts.out.resolve():
        raise UsageError("the manifest path and the output path are the same; give different paths.")


def check_csv_markers(policy: LoadedPolicy, src: Any, plans: list[ColumnPlan]) -> None:
    """A CSV input: no category may also be a missing-value marker (it would be read as missing)."""
    if src.format != "csv":
        return
    nulls = set(policy.policy.input.csv_null_values)
    for p in plans:
        clash = [lab for lab in p.rc.labels if lab in nulls]
        if clash:
            raise PolicyError(f"policy {policy.source}: column {p.rc.name!r}, field 'categories': "
                              f"{', '.join(map(repr, clash))} is also a CSV missing-value marker "
                              "(input.csv_null_values), so such cells would be read as missing. Remove it "
                              "from input.csv_null_values or rename the category.")


def dictionary_columns(src: Any, plans: list[ColumnPlan]) -> list[str]:
    """Categorical text columns read dictionary-encoded (Parquet), so each label is looked up once."""
    names = [p.rc.name for p in plans if p.rc.type == "categorical"]
    return src.dictionary_columns(names) if hasattr(src, "dictionary_columns") else []
