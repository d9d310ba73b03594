"""Where a release's rows come from: a file or Parquet dataset (``io.TableSource``), a pandas
DataFrame, pyarrow Table or RecordBatchReader (``memory.MemorySource``) or a dask DataFrame
(``engine_dask.FrameSource``), and the checks that need the input's layout."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pyarrow as pa

from ..errors import DataError, PolicyError, UsageError
from ..io import TableSource
from ..policy import LoadedPolicy
from .columns import ColumnPlan, input_plans
from .options import ReleaseOptions


def open_source(opts: ReleaseOptions, policy: LoadedPolicy) -> Any:
    """The input as a source of record batches (``batches``, ``schema``, ``column_names``...)."""
    if opts.delimiter is not None and (opts.memory_kind is not None or opts.frame_input):
        raise UsageError(f"privatize: a delimiter ({opts.delimiter!r}) applies to a CSV or TSV file, but the input "
                         f"is {opts.input_text}, which has no delimiter. Leave the delimiter out.")
    if opts.memory_kind is not None:
        from ..memory import MemorySource

        names = set(policy.by_name)
        read = {rc.name for rc in policy.columns if rc.type != "drop" and rc.members is None}
        if policy.policy.subject_key is not None:
            names.add(policy.policy.subject_key)
            read.add(policy.policy.subject_key)
        return MemorySource(opts.input, index_columns=frozenset(names), read_columns=frozenset(read))
    if opts.frame_input:
        if type(opts.input).__module__.split(".")[0] != "dask":
            raise UsageError("privatize: the input must be a path to a CSV or Parquet file or a Parquet dataset, a "
                             "dataset URI, a pandas DataFrame, a pyarrow Table, a pyarrow RecordBatchReader or a "
                             "dask DataFrame; the input given is none of these. Pass one of them (for a list of "
                             "rows, build a pandas DataFrame from it first).")
        from ..engine_dask import FrameSource

        return FrameSource(opts.input)
    src = TableSource(opts.input, csv_null_values=policy.policy.input.csv_null_values,
                      csv_delimiter=policy.policy.input.csv_delimiter, delimiter=opts.delimiter)
    if opts.delimiter is not None and src.format != "csv":
        raise UsageError(f"privatize: the delimiter {opts.delimiter!r} (--delimiter) applies to a CSV or TSV file, but "
                         f"input {src.location} is Parquet, which has no delimiter. Leave the delimiter out.")
    return src


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
    for p in input_plans(plans):
        clash = [lab for lab in p.rc.labels if lab in nulls]
        if clash:
            raise PolicyError(f"policy {policy.source}: column {p.rc.name!r}, field 'categories': "
                              f"{', '.join(map(repr, clash))} is also a CSV missing-value marker "
                              "(input.csv_null_values), so such cells would be read as missing. Remove it "
                              "from input.csv_null_values or rename the category.")


def dictionary_columns(src: Any, plans: list[ColumnPlan]) -> list[str]:
    """Categorical text columns read dictionary-encoded (Parquet), so each label is looked up once."""
    names = [p.rc.name for p in input_plans(plans) if p.rc.type == "categorical"]
    return src.dictionary_columns(names) if hasattr(src, "dictionary_columns") else []


def _nested(t: pa.DataType) -> bool:
    """A type holding several values per cell (list, struct, map, union, or a dictionary of one)."""
    if pa.types.is_dictionary(t):
        return _nested(t.value_type)
    return pa.types.is_nested(t)


def _cell_kind(t: pa.DataType) -> str:
    if pa.types.is_dictionary(t):
        return _cell_kind(t.value_type)
    if pa.types.is_struct(t):
        return "a structure of named fields in each cell"
    if pa.types.is_map(t):
        return "a map of keys to values in each cell"
    if pa.types.is_union(t):
        return "a value of one of several types in each cell"
    return "a list of values in each cell"


def check_input_types(src: Any, plans: list[ColumnPlan], policy: LoadedPolicy, opts: ReleaseOptions) -> None:
    """Refuse, before anything is read or written, an input column whose stored type a release
    cannot take: a privatized column or the subject column holding several values per cell
    (list, struct, map...), and such a public column in a CSV extract (CSV has no place for it)."""
    schema = getattr(src, "schema", None)
    if schema is None or getattr(src, "format", None) != "parquet":
        return  # CSV input is read as text
    location = source_location(src, opts)
    subject = policy.policy.subject_key
    names = [(p.rc.name, p.rc.type) for p in input_plans(plans)] + ([(subject, "subject")] if subject else [])
    for name, kind in names:
        if name not in schema.names:
            continue
        t = schema.field(name).type
        if not _nested(t):
            continue
        role = {"public": "public", "subject": "subject_key"}.get(kind, kind)
        if kind == "public" and opts.fmt_out != "csv":
            continue
        if kind == "public":
            raise DataError(f"input {location} stores the public column {name!r} as {t} ({_cell_kind(t)}), which a "
                            f"CSV extract cannot hold; nothing was written. Write the extract as Parquet (--out "
                            f"{opts.out.with_suffix('.parquet').name}), flatten the column to text in the input, or "
                            "drop it in the policy (type: drop).")
        raise DataError(f"input {location} stores the {role} column {name!r} as {t} ({_cell_kind(t)}), but a "
                        f"{role} column takes one value per cell (text or a number); nothing was written. Flatten "
                        "the column to one value per row (for example its text) in the input, or drop it in the "
                        "policy (type: drop).")
