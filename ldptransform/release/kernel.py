"""The pure batch kernel: (raw batch, global row offset, column plans) -> privatized batch.

Row ``r`` of column ``c`` always draws the PRF words for (key, nonce, c, r) (a memoized
column: for (subject, value)), so the extract does not depend on the batch size.

Under ``budget.strategy: sample`` row ``r`` also draws one word per privatized column from
the stream (key, nonce, "sampling"); the m columns with the smallest words are reported
and the other cells are left empty (null).  The choice depends only on the key, the nonce,
the row index and the policy (never on the data); every column still draws its own words
for every row, so nothing else changes with the choice or the batch size.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..random.bits import BitSource, KeyedStream
from ..random.variates import choose_m_of_d
from .encode import check_text, encode
from .memo import memo_round, rerandomize_rows, subject_bytes

if TYPE_CHECKING:
    from .columns import ColumnPlan

MAX_WORDS_PER_CALL = 1 << 22  # 32 MiB of PRF words per randomize call, whatever the report width

Subjects = tuple[np.ndarray, np.ndarray]  # a batch's subject column: (UTF-8 bytes, n + 1 offsets)
Held = Mapping[str, np.ndarray]  # privatized column -> rows whose cell is a placeholder report (--allow-partial)


@dataclass
class ColumnSampler:
    """strategy sample: which m of its d privatized columns each row reports.

    One PRF word per (row, column) from ``stream``; a row reports the m columns with the
    smallest words (``variates.choose_m_of_d``: a uniform m-subset).  Columns are numbered in
    policy order, so the choice does not depend on the input.
    """

    stream: KeyedStream
    d: int
    m: int

    def reported(self, row0: int, n: int) -> np.ndarray:
        """Boolean matrix (n, d): True where row row0+i reports privatized column j."""
        return choose_m_of_d(self.stream.words(row0, n, self.d), self.m)


def blank_unreported(arr: pa.Array, reported: np.ndarray) -> pa.Array:
    """``arr`` with the cells of unreported rows null.  Built from the reported values only
    (filter, then take with null indices), so no buffer of the result holds anything of an
    unreported cell's randomized value, whatever the array type: at most a copy of a value
    that another row reports."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    kept = arr.filter(pa.array(reported))
    idx = np.maximum(np.cumsum(reported, dtype=np.int64) - 1, 0)
    return pc.take(kept, pa.array(idx, mask=~reported))


def rebuild_dictionary(values: pa.Array) -> pa.Array:
    """A dictionary-encoded column with a dictionary of only the values its rows hold (an input
    file's dictionary can list values of rows that are not released, or that no row has)."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    if not pa.types.is_dictionary(values.type):
        return values
    rebuilt = values.dictionary_decode().dictionary_encode()
    return rebuilt if rebuilt.type == values.type else pc.cast(rebuilt, values.type)


Observer = Callable[[int, Subjects, dict[str, np.ndarray], np.ndarray | None], None]
Runs = Mapping[str, Any]  # sequential column -> its run in this release (``Mechanism.start_run``)


def sequential_names(plans: list[ColumnPlan]) -> list[str]:
    """The privatized columns whose mechanism is sequential (``Mechanism.sequential``)."""
    return [p.rc.name for p in plans if p.rc.mechanism is not None and p.rc.mechanism.sequential]


def privatize_batch(batch: pa.RecordBatch, row0: int, plans: list[ColumnPlan], schema: pa.Schema,
                    sampler: ColumnSampler | None = None, subject_key: str | None = None,
                    held: Held | None = None, observe: Observer | None = None,
                    runs: Runs | None = None) -> pa.RecordBatch:
    """The pure batch kernel: raw batch rows [row0, row0+n) -> privatized batch.

    ``held`` (``--allow-partial``): per privatized column, True for the rows of people held back
    by the ledger whose cell must not use their data.  Those cells are reports of placeholder
    values drawn from the keyed stream (``placeholders``), independently of anyone's data; their
    public cells are copied as any row's are (a public column is released in the clear).
    ``observe`` (with ``subject_key``): called once per batch with (row0, the subject column's
    bytes and offsets, each memoized column's value codes, the sampler's reported rows or None):
    what the ledger needs of the rows, without encoding them twice (release/charges.py).
    ``runs``: the run of every sequential column (their batches must come in row order, each row
    once: ``privatize_sequential``)."""
    n = batch.num_rows
    arrays: list[pa.Array] = []
    reported = sampler.reported(row0, n) if sampler is not None else None
    subjects = subject_bytes(batch.column(subject_key), subject_key, row0) if subject_key is not None else None
    codes: dict[str, np.ndarray] | None = {} if observe is not None else None
    for p in plans:
        values = p.values(batch)  # a joint group: its members' columns (ColumnPlan.values)
        if p.rc.type == "public":
            values = rebuild_dictionary(values)
            check_text(values, p.rc.name, row0)
            arrays.append(values if values.type == p.fields[0].type else pc.cast(values, p.fields[0].type))
            continue
        held_p = None if held is None else held.get(p.rc.name)
        if p.rc.mechanism is not None and p.rc.mechanism.sequential:
            if runs is None or p.rc.name not in runs:
                raise RuntimeError(f"column {p.rc.name}: a sequential mechanism randomized without its run (a bug)")
            rep_p = None if reported is None or p.sample_index is None else reported[:, p.sample_index]
            out = privatize_sequential(p, values, row0, held_p, runs[p.rc.name], rep_p)
        else:
            out = privatize_column(p, values, row0, subjects, held_p, codes)
        if reported is None:
            arrays.extend(out)
        else:
            assert p.sample_index is not None
            rep = reported[:, p.sample_index]
            p.reported += int(rep.sum())
            arrays.extend(blank_unreported(a, rep) for a in out)
    if observe is not None:
        assert subjects is not None and codes is not None, "observe needs the subject column (subject_key)"
        observe(row0, subjects, codes, reported)
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


PLACEHOLDER_CODE = -1  # the value code under which a memoized column's placeholder value is drawn


def placeholders(p: ColumnPlan, row0: int, n: int, subjects: Subjects | None = None) -> np.ndarray:
    """Placeholder inputs for rows [row0, row0 + n) of a privatized column: uniform over the
    column's encoded domain (its codes, or its bounds), drawn from keyed words, never from data.
    The values a held-back row's reports are made from.  A memoized column draws them from its
    per-person words (the reserved code PLACEHOLDER_CODE), so a person held back on several
    nights keeps one placeholder (and so one report), as an unchanged value would; other
    columns from the release's own stream of placeholders."""
    if p.memo is not None and subjects is not None:
        w = p.memo.rows(subjects[0], subjects[1], np.full(n, PLACEHOLDER_CODE, dtype=np.int64)).take(0, n, 2)[:, 0]
    else:
        assert p.placeholder_stream is not None
        w = p.placeholder_stream.words(row0, n, 2)[:, 0]
    if p.rc.type in ("categorical", "binned"):
        return (w % np.uint64(len(p.rc.labels))).astype(np.int64)
    lo, hi = p.rc.config.domain
    u = (w >> np.uint64(11)).astype(np.float64) * 2.0 ** -53
    return np.minimum(lo + u * (hi - lo), hi)


def privatize_column(p: ColumnPlan, values: pa.Array, row0: int, subjects: Subjects | None,
                     held: np.ndarray | None = None, codes_out: dict[str, np.ndarray] | None = None
                     ) -> list[pa.Array]:
    """One privatized column of a batch: encode, (memoized: round to the memo grid), randomize.
    Rows marked ``held`` randomize placeholder values instead of their own.  ``codes_out``: a
    memoized column's value codes are put there under its name."""
    x = encode(values, p, row0)
    if held is not None and held.any():
        x = np.where(held, placeholders(p, row0, len(x), subjects), x).astype(x.dtype)
    assert p.rc.mechanism is not None and p.stream is not None
    if p.memo is None:
        return randomize_rows(p, x, row0)
    assert subjects is not None, "memoized column without subject_key"
    if p.rc.type == "numeric":
        x, codes = memo_round(p, x, subjects)
    else:
        codes = x
    if codes_out is not None:
        codes_out[p.rc.name] = codes
    reports = randomize_rows(p, x, row0, subjects, codes)
    if p.rc.rerandomize_epsilon is not None:  # the second layer: fresh noise in every release (release/memo.py)
        reports = rerandomize_rows(p, reports, row0, MAX_WORDS_PER_CALL)
    return reports


def privatize_sequential(p: ColumnPlan, values: pa.Array, row0: int, held: np.ndarray | None, run: Any,
                         reported: np.ndarray | None) -> list[pa.Array]:
    """A sequential column of a batch of rows [row0, row0 + n): encode, then randomize phase by
    phase (``Mechanism.phase_of``; a batch spanning a phase boundary is split there), each phase
    with its setting from ``run`` (computed from the reports of the earlier phases), and count
    the reports the extract will hold (``reported``: under strategy sample, the rows that report
    the column; the others are blanked) into ``run``.  Rows must come in order, each once: the
    run refuses a phase whose predecessor is incomplete.  Memoize is refused for such mechanisms
    (their ``memoize_refusal``), so the words are the row-addressed stream's."""
    x = encode(values, p, row0)
    if held is not None and held.any():
        x = np.where(held, placeholders(p, row0, len(x)), x).astype(x.dtype)
    m = p.rc.mechanism
    assert m is not None and p.stream is not None and p.memo is None
    n, wpr = len(x), m.words_per_row
    bits = p.stream.rows(row0)
    if n == 0:
        return m.randomize(x, bits.take(0, 0, wpr))
    phase = m.phase_of(row0 + np.arange(n, dtype=np.int64))
    cuts = [0, *(np.flatnonzero(np.diff(phase)) + 1).tolist(), n]
    parts: list[list[pa.Array]] = []
    for a, b in zip(cuts[:-1], cuts[1:]):
        k = int(phase[a])
        out = m.randomize_phase(x[a:b], bits.take(a, b, wpr), k, run.setting(k))
        shown = out if reported is None else [arr.filter(pa.array(reported[a:b])) for arr in out]
        run.add(k, b - a, shown)
        parts.append(out)
    if len(parts) == 1:
        return parts[0]
    return [pa.concat_arrays([pt[i] for pt in parts]) for i in range(len(parts[0]))]


def _bits(p: ColumnPlan, row0: int, subjects: Subjects | None, codes: np.ndarray | None) -> BitSource:
    """Where the column's words come from for this batch: the row-addressed stream, or for a
    memoized column the stream keyed by (subject, value code)."""
    if p.memo is None:
        assert p.stream is not None
        return p.stream.rows(row0)
    assert subjects is not None and codes is not None
    return p.memo.rows(subjects[0], subjects[1], codes)


def randomize_rows(p: ColumnPlan, x: np.ndarray, row0: int, subjects: Subjects | None = None,
                   codes: np.ndarray | None = None) -> list[pa.Array]:
    """Randomize encoded values ``x`` of global rows row0.. in slices of at most
    MAX_WORDS_PER_CALL words (wide reports such as subsets of a large domain), so memory does
    not grow with the report width.  Words are addressed by global row, so slicing cannot
    change any output.  Mechanisms that draw a variable number of words per row (exact
    rejection samplers) also get ``draw(rows, j)``: word j of each given row, from a stream of
    their own.  A memoized column takes its words from ``p.memo`` keyed by (subject, value code)
    instead (``subjects`` = (bytes, offsets) of the batch's subject column, ``codes`` the value codes)."""
    m = p.rc.mechanism
    assert m is not None
    m = m.permanent  # a memoized column with a second layer: its permanent layer (privatize_column)
    n, wpr = len(x), m.words_per_row
    # a report may be wider than its words (a k-character subset string from 1 + m words):
    # budget a slice by whichever is larger, words in or bytes out (counted in 8-byte words)
    out_words = -(-m.output_bytes_per_row // 8)
    step = max(1, MAX_WORDS_PER_CALL // max(wpr, out_words, 1))
    bits = _bits(p, row0, subjects, codes)
    parts: list[list[pa.Array]] = []
    for s in range(0, n, step):
        e = min(n, s + step)
        words = bits.take(s, e, wpr)
        if m.variable_draws:
            ds, base = p.draw_stream, row0 + s
            assert ds is not None
            parts.append(m.randomize_with(x[s:e], words, lambda r, j, ds=ds, base=base: ds.words_at(base + r, j)))
        else:
            parts.append(m.randomize(x[s:e], words))
    if len(parts) == 1:
        return parts[0]
    return [pa.concat_arrays([pt[i] for pt in parts]) for i in range(len(parts[0]))]
