"""The release as a pipeline: read the raw table in batches, randomize every column, write the
extract, then the public manifest (last), and the steward's private diagnostics.

    options.py   the options of a release, validated once (``ReleaseOptions``)
    source.py    the input (file, dataset or dask DataFrame) and the checks on its layout
    columns.py   column setup: ``ColumnPlan``, output schema, keyed streams, manifest entries
    encode.py    raw cells -> codes or numbers, as the policy says
    memo.py      memoized randomness (keyed by the person and the value) and its texts
    kernel.py    the pure batch kernel ``privatize_batch`` (and the column sampler)
    charges.py   the ledger pre-pass, the budget refusal and the record of the release
    parts.py     writing the extract: one file, or a dataset of parts (local engine; dask in engine_dask.py)
    publish.py   destinations, manifest and diagnostics, the final move into place
    run.py       ``privatize``: the orchestrator, top to bottom
"""

from ..io import private_dir
from .charges import ledger_prepass, precharge, record_release, rows_held
from .columns import (
                      ColumnDiagnostics,
                      ColumnPlan,
                      attach_randomness,
                      column_entries,
                      output_schema,
                      plan_columns,
                      read_columns,
)
from .encode import encode, encode_binned, encode_categorical, encode_numeric
from .kernel import (
                      MAX_WORDS_PER_CALL,
                      ColumnSampler,
                      blank_unreported,
                      privatize_batch,
                      randomize_rows,
)
from .memo import (
                      MAX_SUBJECT_BYTES,
                      memo_composition_text,
                      memo_context,
                      memo_note,
                      memo_round,
                      memo_streams,
                      subject_bytes,
                      subject_text,
)
from .options import DEFAULT_BATCH_ROWS, ENGINES, ReleaseOptions
from .parts import (
                      PartJob,
                      PartResult,
                      RowCutter,
                      _mask_slice,
                      fragment_part,
                      run_parts_local,
                      write_part,
)
from .publish import privacy_entry, write_text_atomic_into
from .run import ReleaseResult, privatize

__all__ = ["DEFAULT_BATCH_ROWS", "ENGINES", "MAX_SUBJECT_BYTES", "MAX_WORDS_PER_CALL", "ColumnDiagnostics",
           "ColumnPlan", "ColumnSampler", "PartJob", "PartResult", "ReleaseOptions", "ReleaseResult", "RowCutter",
           "_mask_slice", "attach_randomness", "blank_unreported", "column_entries", "encode", "encode_binned",
           "encode_categorical", "encode_numeric", "fragment_part", "ledger_prepass", "memo_composition_text",
           "memo_context", "memo_note", "memo_round", "memo_streams", "output_schema", "plan_columns", "precharge",
           "privacy_entry", "private_dir", "privatize", "privatize_batch", "randomize_rows", "read_columns",
           "record_release", "rows_held", "run_parts_local", "subject_bytes", "subject_text", "write_part",
           "write_text_atomic_into"]
