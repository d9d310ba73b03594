"""The public manifest that travels with an extract.

It says how every output column was made (the full mechanism spec), the privacy
statement, and how to check integrity (extract hash, row count, key fingerprint,
nonce).  It holds nothing else that depends on the raw data: the row count is the only
data-dependent figure, and the extract's hash and size describe the extract itself.
"""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Final, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from .errors import ManifestError

FORMAT: Final = "ldptransform-manifest"
FORMAT_VERSION = 1

CAUTIONS = [
    "The epsilon values are a policy choice, not a guarantee of safety; they were set by the data steward.",
    "Local differential privacy protects only the privatized columns. Columns of type 'public' are copied "
    "as they are and are not protected at all; combined with other data they may identify people.",
    "Protection composes: each row's total epsilon is the sum over the privatized columns it reports (all of "
    "them, unless privacy.strategy is 'sample'), and separate releases about the same people add up.",
    "Do not try to link this extract to other data to single out people; that may be unlawful and breach "
    "your agreement with the data steward.",
]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class OutputColumn(_Strict):
    name: str
    dtype: str
    meaning: str


class ColumnEntry(_Strict):
    name: str
    type: Literal["categorical", "binned", "numeric", "public"]
    mechanism: dict[str, Any] | None = None
    chosen_because: str | None = None
    labels: list[str] | None = None
    bins: list[float] | None = None
    outputs: list[OutputColumn]
    note: str | None = None
    # Share of rows whose report of this column is present (budget.strategy sample: m/d, the
    # other cells are empty; 1.0 otherwise).  A decoder counts an empty cell as a per-row
    # estimate of 0 and divides the reported per-row estimates by this rate.
    report_rate: float = Field(1.0, gt=0, le=1)


class PartInfo(_Strict):
    """One file of a Parquet dataset extract (format "parquet-dataset")."""

    file: str
    sha256: str
    bytes: int = Field(ge=0)
    rows: int = Field(ge=0)


class ExtractInfo(_Strict):
    file: str
    # "parquet-dataset": ``file`` is a folder of Parquet parts listed in ``parts`` (in row order);
    # ``sha256`` is then dataset.dataset_digest over the parts and ``bytes`` their total
    format: Literal["csv", "parquet", "parquet-dataset"]
    sha256: str
    bytes: int
    columns: list[str]
    parts: list[PartInfo] | None = None
    part_rows: int | None = Field(None, ge=1)  # the --part-rows setting the parts were cut with


class Privacy(_Strict):
    model: str
    epsilon_per_row_budget: float
    epsilon_per_row_used: float
    composition: str
    public_columns: list[str]
    # budget.strategy: "split" (every row reports all its privatized columns) or "sample"
    # (each row reports reported_columns of its privatized_columns, chosen by the keyed PRF
    # independently of the data).  Absent in manifests written before strategies existed.
    strategy: Literal["split", "sample"] = "split"
    privatized_columns: int | None = Field(None, ge=0)  # d
    reported_columns: int | None = Field(None, ge=0)    # m
    # policy output.row_order: "shuffled" (a keyed permutation of the input rows, independent of the
    # data) or "as-input".  Manifests written before the shuffle existed kept the input's order.
    row_order: Literal["shuffled", "as-input"] = "as-input"
    row_order_note: str | None = None
    # set when the release was run with held-back rows allowed (--allow-partial): whether any row
    # is such a placeholder row, and how many, is never said (steward-only diagnostics)
    placeholder_rows: str | None = None
    # the central (eps, delta) that shuffling gives, when its conditions hold; else why not
    central: dict[str, Any] | None = None


class Manifest(_Strict):
    format: Literal["ldptransform-manifest"] = FORMAT
    format_version: int = FORMAT_VERSION
    tool_version: str
    created_utc: str
    rows: int = Field(ge=0)
    nonce: str
    key_fingerprint: str
    prf: str
    policy_sha256: str
    policy: dict[str, Any]
    privacy: Privacy
    extract: ExtractInfo
    columns: list[ColumnEntry]
    cautions: list[str]

    def column(self, name: str) -> ColumnEntry:
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)

    def to_json(self) -> str:
        d = self.model_dump(mode="json")
        if d["extract"].get("parts") is None:  # single-file extracts: the manifest as before datasets existed
            d["extract"].pop("parts", None)
            d["extract"].pop("part_rows", None)
        return json.dumps(d, indent=2, allow_nan=False) + "\n"


def now_utc() -> str:
    return datetime.now(UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def default_manifest_path(extract: Path) -> Path:
    extract = Path(extract)
    return extract.with_name(extract.stem + ".manifest.json")


def load_manifest(path: Path) -> Manifest:
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ManifestError(f"manifest {path} does not exist. Give its path with --manifest (by default it is "
                            "the extract's name with .manifest.json in place of the extension).") from None
    except (OSError, UnicodeDecodeError) as err:
        raise ManifestError(f"manifest {path} cannot be read ({err}).") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as err:
        raise ManifestError(f"manifest {path} is not valid JSON (line {err.lineno}, column {err.colno}: "
                            f"{err.msg}). Ask the data steward for an intact copy.") from None
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise ManifestError(f"{path} is not an ldptransform manifest (its 'format' field is not {FORMAT!r}).")
    if data.get("format_version") != FORMAT_VERSION:
        raise ManifestError(f"manifest {path} has format_version {data.get('format_version')!r}; this ldpt reads "
                            f"version {FORMAT_VERSION}. Use a matching ldptransform version.")
    try:
        m = Manifest.model_validate(data)
    except ValidationError as err:
        first = err.errors()[0]
        loc = ".".join(str(p) for p in first.get("loc", ()))
        raise ManifestError(f"manifest {path} is malformed: field '{loc}': {first.get('msg')} "
                            f"({err.error_count()} problem(s) in all). Ask the data steward for an intact "
                            "copy.") from None
    _check_finite(data, path)
    return m


def _check_finite(obj: Any, path: Path) -> None:
    if isinstance(obj, float) and not math.isfinite(obj):
        raise ManifestError(f"manifest {path} contains a non-finite number.")
    if isinstance(obj, dict):
        for v in obj.values():
            _check_finite(v, path)
    elif isinstance(obj, list):
        for v in obj:
            _check_finite(v, path)
