"""Decoding: stream an extract, accumulate sufficient statistics, report estimates.

For every privatized column the per-row unbiased estimates are summed, and so are
their squares: that is all the decoder keeps (sufficient statistics add, so batches,
files and workers merge by addition, and memory does not grow with the extract).

* categorical / binned: per row and value v, u_v = (1[v in S(y)] - q*)/(p* - q*); its
  sum and sum of squares follow from the support count s_v alone.
* numeric: the written value is the per-row unbiased estimate; keep n, sum, sum of squares
  (around the middle of the bounds, for numerical accuracy).

The standard error is the sample standard deviation of the per-row estimates over
sqrt(n).  For rows drawn at random from a population it is the usual SE of a mean; for
the fixed set of rows in the extract it is slightly conservative (it also counts the
spread of the true values).  Intervals use the normal approximation.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from statistics import NormalDist
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import mechanisms as mech
from .errors import DataError, ManifestError, UsageError
from .io import TableSource
from .manifest import ColumnEntry, Manifest, default_manifest_path, load_manifest

DECODE_BATCH_ROWS = 65536


def csv_type(dtype: str) -> pa.DataType:
    if dtype.startswith("dictionary") or dtype in ("string", "large_string"):
        return pa.string()
    return {"int64": pa.int64(), "int32": pa.int32(), "double": pa.float64(), "float": pa.float32()}.get(dtype,
                                                                                                          pa.string())


@dataclass
class CategoricalStats:
    mechanism: mech.FrequencyOracle
    n: int = 0
    support: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def __post_init__(self) -> None:
        if self.support.size == 0:
            self.support = np.zeros(self.mechanism.k, dtype=np.int64)

    def add(self, arrays: list[pa.Array]) -> None:
        self.n += len(arrays[0])
        self.support += self.mechanism.support_counts(arrays)

    def merge(self, other: "CategoricalStats") -> None:
        self.n += other.n
        self.support += other.support

    def frequencies(self, z: float) -> list[dict[str, Any]]:
        m, n = self.mechanism, self.n
        if n == 0:
            return [{"value": label, "estimate": None, "se": None, "ci_low": None, "ci_high": None,
                     "count_estimate": 0.0, "consistent": None} for label in m.categories]
        p, q = m.p_star, m.q_star
        d = p - q
        s = self.support.astype(float)
        total = (s - n * q) / d
        sq = (s * (1 - q) ** 2 + (n - s) * q ** 2) / d ** 2
        est = total / n
        var_rows = np.maximum(sq - total ** 2 / n, 0.0) / max(n - 1, 1)
        se = np.sqrt(var_rows / n)
        consistent = norm_sub(est)
        out = []
        for i, label in enumerate(m.categories):
            out.append({"value": label, "estimate": float(est[i]), "se": float(se[i]),
                        "ci_low": float(est[i] - z * se[i]), "ci_high": float(est[i] + z * se[i]),
                        "count_estimate": float(total[i]), "consistent": float(consistent[i])})
        return out


@dataclass
class NumericStats:
    mechanism: mech.GridMechanism
    n: int = 0
    s1: float = 0.0
    s2: float = 0.0

    @property
    def shift(self) -> float:
        return (self.mechanism.lo + self.mechanism.hi) / 2.0

    def add(self, arrays: list[pa.Array]) -> None:
        arr = arrays[0]
        vals = np.asarray(pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False), dtype=float) - self.shift
        self.n += vals.size
        self.s1 += float(vals.sum())
        self.s2 += float(np.dot(vals, vals))

    def merge(self, other: "NumericStats") -> None:
        self.n += other.n
        self.s1 += other.s1
        self.s2 += other.s2

    def mean(self, z: float) -> dict[str, Any]:
        n = self.n
        if n == 0:
            return {"estimate": None, "se": None, "ci_low": None, "ci_high": None}
        mean_c = self.s1 / n
        var_rows = max(self.s2 - n * mean_c ** 2, 0.0) / max(n - 1, 1)
        se = math.sqrt(var_rows / n)
        est = mean_c + self.shift
        return {"estimate": est, "se": se, "ci_low": est - z * se, "ci_high": est + z * se}


def norm_sub(est: np.ndarray) -> np.ndarray:
    """Norm-Sub: Euclidean projection onto the probability simplex (non-negative, sums to 1).

    Wang, Lopuhaä-Zwakenberg, Li, Škorić, Li, "Locally Differentially Private Frequency
    Estimation with Consistency", NDSS 2020.
    """
    v = np.asarray(est, dtype=float)
    u = np.sort(v)[::-1]
    css = np.cumsum(u) - 1.0
    j = np.arange(1, v.size + 1)
    cond = u - css / j > 0
    if not cond.any():
        return np.full_like(v, 1.0 / v.size)
    r = j[cond][-1]
    delta = css[r - 1] / r
    return np.maximum(v - delta, 0.0)


def _stats_for(entry: ColumnEntry) -> CategoricalStats | NumericStats | None:
    if entry.mechanism is None:
        return None
    m = mech.build(entry.mechanism)
    if isinstance(m, mech.FrequencyOracle):
        return CategoricalStats(m)
    assert isinstance(m, mech.GridMechanism)
    return NumericStats(m)


def open_extract(extract: Path, manifest_path: Path | None) -> tuple[Manifest, TableSource, Path]:
    extract = Path(extract)
    mpath = Path(manifest_path) if manifest_path else default_manifest_path(extract)
    manifest = load_manifest(mpath)
    src = TableSource(extract)
    missing = [c for c in manifest.extract.columns if c not in src.column_names]
    if missing:
        raise ManifestError(f"extract {extract} lacks column(s) {', '.join(map(repr, missing))} that manifest {mpath} "
                            "describes. Check that the extract and the manifest belong to the same release.")
    return manifest, src, mpath


def iter_column_arrays(manifest: Manifest, src: TableSource, batch_rows: int = DECODE_BATCH_ROWS):
    """Yield (batch, {column name: [output arrays]}) for every privatized column."""
    entries = [c for c in manifest.columns if c.mechanism is not None]
    names = [o.name for c in entries for o in c.outputs]
    types = {o.name: csv_type(o.dtype) for c in entries for o in c.outputs}
    for batch in src.batches(names, batch_rows, csv_types=types):
        yield batch, {c.name: [batch.column(o.name) for o in c.outputs] for c in entries}


def accumulate(extract: Path, manifest_path: Path | None = None, *, batch_rows: int = DECODE_BATCH_ROWS,
               check_alphabet: bool = True) -> tuple[Manifest, dict[str, CategoricalStats | NumericStats], int]:
    manifest, src, mpath = open_extract(extract, manifest_path)
    stats: dict[str, Any] = {}
    entries = {c.name: c for c in manifest.columns if c.mechanism is not None}
    for name, entry in entries.items():
        stats[name] = _stats_for(entry)
    rows = 0
    for batch, cols in iter_column_arrays(manifest, src, batch_rows):
        for name, arrays in cols.items():
            st = stats[name]
            if check_alphabet:
                bad = st.mechanism.count_invalid(arrays)
                if bad:
                    raise DataError(f"extract {extract}: column {name!r} has {bad} value(s) outside the output alphabet "
                                    f"of its mechanism ({entries[name].mechanism['mechanism']}) near data row "
                                    f"{rows + 1}. The extract was altered or does not belong to manifest {mpath}; "
                                    "run `ldpt validate` for details.")
            st.add(arrays)
        rows += batch.num_rows
    if rows != manifest.rows:
        raise ManifestError(f"extract {extract} has {rows} rows but manifest {mpath} says {manifest.rows}. The files do "
                            "not belong together, or the extract is incomplete; run `ldpt validate`.")
    return manifest, stats, rows


def z_value(confidence: float) -> float:
    if not 0 < confidence < 1:
        raise UsageError(f"--confidence must be between 0 and 1 (e.g. 0.95), got {confidence}")
    return NormalDist().inv_cdf(0.5 + confidence / 2)


def report(manifest: Manifest, stats: dict[str, Any], rows: int, confidence: float) -> dict[str, Any]:
    z = z_value(confidence)
    out: dict[str, Any] = {"rows": rows, "confidence": confidence, "columns": {}}
    for entry in manifest.columns:
        st = stats.get(entry.name)
        if st is None:
            continue
        spec = entry.mechanism or {}
        base = {"type": entry.type, "mechanism": spec.get("mechanism"), "epsilon": spec.get("epsilon")}
        if isinstance(st, CategoricalStats):
            base["frequencies"] = st.frequencies(z)
            base["consistent_method"] = "norm-sub (projection onto the probability simplex; biased, for display)"
        else:
            base["bounds"] = spec.get("bounds")
            base["mean"] = st.mean(z)
        out["columns"][entry.name] = base
    out["se_method"] = ("sample standard deviation of the per-row unbiased estimates / sqrt(rows); "
                        "normal-approximation intervals")
    public = [c.name for c in manifest.columns if c.type == "public"]
    if public:
        out["public_columns"] = public
    return out


def estimate(extract: Path | str, manifest_path: Path | str | None = None, *, confidence: float = 0.95,
             batch_rows: int = DECODE_BATCH_ROWS) -> dict[str, Any]:
    """Unbiased frequencies and means, with SE and CI, for every privatized column."""
    z_value(confidence)
    manifest, stats, rows = accumulate(Path(extract), Path(manifest_path) if manifest_path else None,
                                       batch_rows=batch_rows)
    return report(manifest, stats, rows, confidence)
