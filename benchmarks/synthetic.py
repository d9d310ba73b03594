"""Synthetic input tables and a matching policy, for the benchmarks and the scale test.

The input data is invented: numpy's seeded generator makes it (that is fine for
synthetic *input*; release noise never comes from numpy, only from the keyed PRF).
Rows are generated and written chunk by chunk, so making a file of N rows needs memory
for one chunk, not for N rows.

Eight columns, one per kind of work the release does:

==========  ==========================  =====================================
column      input                       policy
==========  ==========================  =====================================
region      text, 5 values              categorical, grr
product     text, 20 values             categorical, olh
channel     text, 8 values, 1% empty    categorical, oue, missing as-category
amount      float, some above bounds    numeric [0, 1000], hybrid (clipped)
score       float, 1% empty             numeric [0, 100], piecewise, fill 50
duration    float                       numeric [0, 60], two-point
age         integer                     numeric with bins, mechanism chosen by the tool
wave        text                        public (copied as is)
==========  ==========================  =====================================
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

DEFAULT_CHUNK_ROWS = 100_000
DEFAULT_SEED = 20260101

REGIONS = ["north", "south", "east", "west", "central"]
PRODUCTS = [f"product-{i:02d}" for i in range(1, 21)]
CHANNELS = ["web", "phone", "store", "partner", "mail", "kiosk", "app", "other-channel"]
WAVES = ["2025-Q1", "2025-Q2", "2025-Q3", "2025-Q4"]
AGE_BINS = [18, 25, 35, 45, 55, 65, 90]

# Zipf-like weights so the categorical columns are not uniform.
_PRODUCT_P = 1.0 / np.arange(1, len(PRODUCTS) + 1)
_PRODUCT_P /= _PRODUCT_P.sum()
_REGION_P = np.array([0.30, 0.25, 0.20, 0.15, 0.10])
_CHANNEL_P = np.array([0.35, 0.20, 0.15, 0.10, 0.08, 0.06, 0.04, 0.02])

POLICY_YAML = """\
# Synthetic benchmark policy (invented data; the epsilons are arbitrary test values).
budget:
  epsilon_per_row: 6.5
unlisted: error
columns:
  region:
    type: categorical
    categories: [{regions}]
    epsilon: 1.0
    mechanism: grr
  product:
    type: categorical
    categories: [{products}]
    epsilon: 1.0
    mechanism: olh
  channel:
    type: categorical
    categories: [{channels}]
    epsilon: 1.0
    mechanism: oue
    missing: as-category
  amount:
    type: numeric
    bounds: [0, 1000]
    epsilon: 1.0
    mechanism: hybrid
  score:
    type: numeric
    bounds: [0, 100]
    epsilon: 0.5
    mechanism: piecewise
    missing: {{fill: 50}}
  duration:
    type: numeric
    bounds: [0, 60]
    epsilon: 1.0
    mechanism: two-point
  age:
    type: numeric
    bins: [{age_bins}]
    epsilon: 1.0
  wave: {{type: public}}
"""


# The same table under only grr, oue and piecewise columns (and the public one): the policy the
# distributed-engine issue sets its throughput target for.
CORE_POLICY_YAML = """\
# Synthetic benchmark policy of grr, oue and piecewise columns (invented data; arbitrary epsilons).
budget:
  epsilon_per_row: 7.0
unlisted: error
columns:
  region:   {{type: categorical, categories: [{regions}], epsilon: 1.0, mechanism: grr}}
  product:  {{type: categorical, categories: [{products}], epsilon: 1.0, mechanism: oue}}
  channel:  {{type: categorical, categories: [{channels}], epsilon: 1.0, mechanism: oue, missing: as-category}}
  amount:   {{type: numeric, bounds: [0, 1000], epsilon: 1.0, mechanism: piecewise}}
  score:    {{type: numeric, bounds: [0, 100], epsilon: 1.0, mechanism: piecewise, missing: {{fill: 50}}}}
  duration: {{type: numeric, bounds: [0, 60], epsilon: 1.0, mechanism: piecewise}}
  age:      {{type: numeric, bounds: [18, 90], epsilon: 1.0, mechanism: piecewise}}
  wave: {{type: public}}
"""


def policy_text(kind: str = "mixed") -> str:
    template = CORE_POLICY_YAML if kind == "core" else POLICY_YAML
    return template.format(regions=", ".join(REGIONS), products=", ".join(PRODUCTS),
                           channels=", ".join(CHANNELS), age_bins=", ".join(map(str, AGE_BINS)))


def write_policy(path: Path | str, kind: str = "mixed") -> Path:
    """The benchmark policy: "mixed" (one column per kind of work, the table above) or "core"
    (grr, oue and piecewise columns only)."""
    path = Path(path)
    path.write_text(policy_text(kind), encoding="utf-8")
    return path


def _text(labels: list[str], codes: np.ndarray, null: np.ndarray | None = None) -> pa.Array:
    """Plain (not dictionary-encoded) string column, as a typical input file holds."""
    arr = pa.array(labels, pa.string()).take(pa.array(codes.astype(np.int32)))
    if null is not None and null.any():
        arr = pa.array(arr.to_numpy(zero_copy_only=False), pa.string(), mask=null)
    return arr


def make_chunk(rng: np.random.Generator, n: int) -> pa.Table:
    region = rng.choice(len(REGIONS), size=n, p=_REGION_P)
    product = rng.choice(len(PRODUCTS), size=n, p=_PRODUCT_P)
    channel = rng.choice(len(CHANNELS), size=n, p=_CHANNEL_P)
    channel_null = rng.random(n) < 0.01
    amount = np.round(rng.lognormal(mean=5.0, sigma=1.0, size=n), 2)  # ~1.7% above the bound 1000
    score = np.round(rng.beta(5.0, 2.0, size=n) * 100.0, 1)
    score_null = rng.random(n) < 0.01
    duration = np.round(rng.gamma(shape=2.0, scale=6.0, size=n).clip(0, 60), 3)
    age = rng.integers(18, 91, size=n, dtype=np.int64)
    wave = rng.integers(0, len(WAVES), size=n)
    return pa.table({
        "region": _text(REGIONS, region),
        "product": _text(PRODUCTS, product),
        "channel": _text(CHANNELS, channel, channel_null),
        "amount": pa.array(amount, pa.float64()),
        "score": pa.array(score, pa.float64(), mask=score_null),
        "duration": pa.array(duration, pa.float64()),
        "age": pa.array(age, pa.int64()),
        "wave": _text(WAVES, wave),
    })


def write_input(path: Path | str, rows: int, *, seed: int = DEFAULT_SEED,
                chunk_rows: int = DEFAULT_CHUNK_ROWS) -> Path:
    """Write ``rows`` synthetic rows to ``path`` (.parquet or .csv), one chunk at a time.

    Parquet: one row group per chunk, zstd.  CSV: header plus rows, pyarrow's writer.
    The same (rows, seed, chunk_rows) always gives the same file.
    """
    path = Path(path)
    fmt = "csv" if path.suffix.lower() == ".csv" else "parquet"
    rng = np.random.default_rng(seed)
    schema = make_chunk(np.random.default_rng(0), 1).schema
    writer = (pq.ParquetWriter(path, schema, compression="zstd") if fmt == "parquet"
              else pacsv.CSVWriter(path, schema))
    try:
        done = 0
        while done < rows:
            n = min(chunk_rows, rows - done)
            writer.write_table(make_chunk(rng, n))
            done += n
    finally:
        writer.close()
    return path


def write_key(path: Path | str) -> Path:
    """A fresh secret key file (mode 0600) made by the library itself."""
    from ldptransform.keys import new_key_file

    path = Path(path)
    if not path.exists():
        new_key_file(path)
    return path
