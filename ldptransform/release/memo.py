"""Memoized randomness ("permanent randomized response"): a memoized column's report is drawn
from words keyed by the person (the policy's subject_key, never released) and the value, not
by the release nonce and the row, so the same person with the same value gets the same report
in every release; numeric columns are first rounded to a coarse grid with a per-person offset.
Also the manifest's texts about it."""

from __future__ import annotations

import hashlib
import json
from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import DataError
from ..keys import SecretKey
from ..policy import LoadedPolicy, ResolvedColumn
from ..random.bits import MEMO_PRF_VERSION, SubjectPRF
from ..random.variates import to_unit
from .encode import _as_string_array, _rows_text

if TYPE_CHECKING:
    from .columns import ColumnPlan

MAX_SUBJECT_BYTES = 256


def memo_context(rc: ResolvedColumn) -> bytes:
    """SHA-256 of a memoized column's mechanism spec, memo grid and type: what its randomness is bound to.
    With a second layer, the spec of the permanent layer: adding, changing or removing the second
    layer keeps the permanent reports (and what the ledger knows of them)."""
    assert rc.mechanism is not None
    context = json.dumps({"spec": rc.mechanism.permanent.to_spec(), "memo_grid": rc.memo_grid, "type": rc.type},
                         sort_keys=True, separators=(",", ":"), default=str).encode()
    return hashlib.sha256(context).digest()


def memo_streams(key: SecretKey, rc: ResolvedColumn) -> tuple[SubjectPRF, SubjectPRF | None]:
    """The PRFs of a memoized column: reports keyed by (key, column, mechanism spec, memo grid,
    subject, value code), never by the nonce or the row; for a numeric column also the rounding
    offset keyed by (key, column, subject) only.  A changed mechanism spec or grid gives fresh
    randomness (a new release at the new settings), never the old words through a new channel."""
    report = SubjectPRF(key, "report", rc.name, memo_context(rc))
    offset = SubjectPRF(key, "rounding-offset", rc.name) if rc.type == "numeric" else None
    return report, offset


def subject_bytes(values: pa.Array, name: str, row0: int) -> tuple[np.ndarray, np.ndarray]:
    """The subject column as (concatenated UTF-8 bytes, n + 1 offsets): text as written (numbers
    as their decimal text), surrounding spaces removed.  A missing or over-long subject is an error."""
    strings = _as_string_array(values, name, row0)
    strings = pc.utf8_trim_whitespace(strings)
    missing = np.asarray(pc.is_null(strings).to_numpy(zero_copy_only=False))
    if missing.any():
        raise DataError(f"column {name!r} is the policy's subject_key but has missing values "
                        f"({_rows_text(missing, row0)}); memoized columns need to know whose row it is. Fill the "
                        "identifier in the input, or remove memoize from the policy's columns.")
    binary = pc.cast(strings, pa.large_binary())
    if isinstance(binary, pa.ChunkedArray):
        binary = binary.combine_chunks()
    bufs = binary.buffers()
    n = len(binary)
    offs = np.frombuffer(bufs[1], dtype=np.int64)[binary.offset: binary.offset + n + 1]
    data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else np.zeros(0, dtype=np.uint8)
    long = np.diff(offs) > MAX_SUBJECT_BYTES
    if long.any():
        raise DataError(f"column {name!r} (the policy's subject_key) has identifiers longer than "
                        f"{MAX_SUBJECT_BYTES} bytes ({_rows_text(long, row0)}). Use a shorter identifier (for "
                        "example a stable hash of the long one) in the input.")
    return data, offs


def memo_round(p: ColumnPlan, x: np.ndarray, subjects: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Round numeric values to the column's coarse memo grid (memo_grid steps between the
    bounds) with a per-subject offset u in [0, 1) from the keyed PRF (alpha-point rounding):
    grid index j = floor((x - lo) / step + u).  Over subjects u is uniform, so j = floor(t) + 1
    with probability frac(t): unbiased, with rounding variance frac(t)(1 - frac(t)) step^2 <=
    step^2 / 4 per row.  Returns (rounded values, grid indices)."""
    assert p.memo_offset is not None and p.rc.memo_grid is not None
    lo, hi = p.rc.config.domain
    g = p.rc.memo_grid
    data, offs = subjects
    u = to_unit(p.memo_offset.rows(data, offs, np.zeros(len(x), dtype=np.int64)).take(0, len(x), 1)[:, 0])
    t = (x - lo) * (g / (hi - lo))
    j = np.clip(np.floor(t + u), 0, g).astype(np.int64)
    rounded = np.where(j == g, hi, lo + j * ((hi - lo) / g))
    return np.minimum(rounded, hi), j


def rerandomize_rows(p: ColumnPlan, reports: list[pa.Array], row0: int, max_words: int) -> list[pa.Array]:
    """The second layer of a memoized column: its permanent ``reports`` of global rows row0..
    re-randomized with words of the release's row-addressed stream of its own (``p.layer_stream``:
    key, nonce, "second-layer", column), so the noise differs in every release, is reproducible
    from key and nonce, and does not depend on batching (slices of at most ``max_words`` words)."""
    m = p.rc.mechanism
    eps2 = p.rc.rerandomize_epsilon
    assert m is not None and eps2 is not None and p.layer_stream is not None
    perm, wpr = m.permanent, m.permanent.second_layer_words_per_row
    n = len(reports[0])
    step = max(1, max_words // max(wpr, 1))
    parts: list[list[pa.Array]] = []
    for s in range(0, n, step):
        e = min(n, s + step)
        parts.append(perm.rerandomize([a.slice(s, e - s) for a in reports],
                                      p.layer_stream.words(row0 + s, e - s, wpr), eps2))
    if len(parts) == 1:
        return parts[0]
    return [pa.concat_arrays([pt[i] for pt in parts]) for i in range(len(parts[0]))]


def memo_note(rc: ResolvedColumn) -> str:
    grid = ""
    if rc.memo_grid is not None:
        lo, hi = rc.config.domain
        grid = (f"; before randomization each value is rounded to a grid of memo_grid = {rc.memo_grid} steps of "
                f"{(hi - lo) / rc.memo_grid:g} between the bounds, with a random offset fixed per person (unbiased; "
                "adds at most step^2/4 variance per row)")
    if rc.rerandomize_epsilon is not None:
        assert rc.mechanism is not None
        return (f"memoized: true ({MEMO_PRF_VERSION}) with a second layer: a permanent report at eps "
                f"{rc.permanent_epsilon:g} is drawn from randomness keyed by the person (the policy's subject_key, "
                "not released) and the value, the same for the same person and value in every release; each "
                f"release then re-randomizes it with fresh noise at eps {rc.rerandomize_epsilon:g} (keyed by the "
                "release nonce and the row), so the written report differs between releases even when the value "
                f"did not change. The mechanism spec is the composite of the two layers, {rc.mechanism.name} at "
                f"eps {rc.mechanism.epsilon:.6g} (at most the smaller of the two): what one release reveals "
                "about the value, and what the reports are decoded with. Over all releases together the reports "
                f"of one value reveal at most eps {rc.permanent_epsilon:g} (the permanent layer); a change of "
                "report no longer shows with certainty that the value changed, but reports of the same person "
                "stay more alike across releases than those of different people (linkage is weakened, not "
                "removed)" + grid)
    return (f"memoized: true ({MEMO_PRF_VERSION}): the report is drawn from randomness keyed by the person "
            "(the policy's subject_key, not released) and the value, so the same person with the same value gets "
            "the same report in every release, and rows with the same person and value within a release are "
            "identical; a report that changes between releases shows that the value changed" + grid)


def subject_text(values: pa.Array, name: str, row0: int) -> pa.Array:
    """The subject column as trimmed text, checked as ``subject_bytes`` checks it (the same identity
    memoization uses, so the ledger and the memoized reports agree on who a person is)."""
    subject_bytes(values, name, row0)  # missing / over-long identifiers: a DataError naming the rows
    return pc.utf8_trim_whitespace(_as_string_array(values, name, row0))


def memo_composition_text(policy: LoadedPolicy) -> str:
    """What memoization means for composition, for the manifest ('' without memoized columns)."""
    memo = [rc for rc in policy.columns if rc.memoize]
    if not memo:
        return ""
    names = ", ".join(f"{rc.name} (rounded to a grid of {rc.memo_grid} steps with a per-person offset first)"
                      if rc.memo_grid else rc.name for rc in memo)
    text = (f"; memoized columns: {names}. Their randomness is keyed by the person and the value, not by the "
            "release, so a person whose value has not changed gets the very same report in every release under "
            "this key and repeating it adds no eps; a changed value gets a fresh report and costs its eps again, "
            "and a report that changes shows that the value changed (not to what)")
    layered = [rc for rc in memo if rc.rerandomize_epsilon is not None]
    if not layered:
        return text
    each = ", ".join(f"{rc.name} (permanent eps {rc.permanent_epsilon:g}, then eps {rc.rerandomize_epsilon:g} "
                     f"afresh in each release: composite eps {rc.mechanism.epsilon:.6g} per release)"
                     for rc in layered if rc.mechanism is not None)
    return (text + f". Second layer: {each}. In these columns the memoized (permanent) report is re-randomized "
            "with fresh noise in every release, so the written report changes between releases even when the "
            "value did not: a release reveals at most the composite eps about the value (counted in "
            "epsilon_per_row_used), all releases together at most the permanent eps per distinct value (what the "
            "ledger charges when a value is new); a changed report no longer certifies a changed value, and "
            "the reports are no longer exact linkage keys, though they remain more alike for the same person")
