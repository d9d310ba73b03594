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
from .safeload import LoadProblem, load_json

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


class JointMember(_Strict):
    """A member column of a joint group: its codes (``labels``, in code order: the declared labels,
    then <missing> and <other> where the policy adds them) and a binned column's edges."""

    name: str
    type: Literal["categorical", "binned"]
    labels: list[str] = Field(min_length=2)
    bins: list[float] | None = None


class ColumnEntry(_Strict):
    name: str
    type: Literal["categorical", "binned", "numeric", "public", "joint"]
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
    # type "joint": the group's member columns in order; the mechanism's categories are the cells of
    # their product domain (JSON arrays of member labels; the first member varies slowest)
    members: list[JointMember] | None = None


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
        for c in d["columns"]:
            if c.get("members") is None:  # only a joint group's entry has members
                c.pop("members", None)
        if d["extract"].get("parts") is None:  # single-file extracts: the manifest as before datasets existed
            d["extract"].pop("parts", None)
            d["extract"].pop("part_rows", None)
        return json.dumps(d, indent=2, allow_nan=False) + "\n"


def now_utc() -> str:
    return datetime.now(UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")


# -- what each extract field says about itself (Arrow field metadata; docs/extract-format.md) ------

#: The prefix of every field metadata key a Parquet extract's columns carry.
FIELD_PREFIX = "ldpt."
#: The version of the field metadata's layout (key ``ldpt.format``).
FIELD_FORMAT = "1"
#: The keys, without the prefix, in the order they are written (those after ``meaning`` only where
#: the column entry has them).
FIELD_KEYS = ("format", "column", "type", "privatized", "mechanism", "meaning", "spec", "labels", "bins", "note",
              "members")


def _compact(value: Any) -> str:
    return json.dumps(value, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def field_metadata(entry: ColumnEntry, output: OutputColumn) -> dict[bytes, bytes]:
    """The Arrow field metadata of the extract column ``output`` of the manifest column entry
    ``entry``: the entry's own text (input column, type, mechanism name and spec as compact JSON,
    labels, bins, note) and the output's meaning, so the extract explains itself without its
    manifest.  Only what the entry states, which comes from the policy: never a count, a digest
    or a value of the data."""
    spec = entry.mechanism
    md: dict[str, str] = {"format": FIELD_FORMAT, "column": entry.name, "type": entry.type,
                          "privatized": "false" if spec is None else "true",
                          "mechanism": "none" if spec is None else str(spec.get("mechanism")),
                          "meaning": output.meaning}
    if spec is not None:
        md["spec"] = _compact(spec)
    if entry.labels is not None:
        md["labels"] = _compact(entry.labels)
    if entry.bins is not None:
        md["bins"] = _compact(entry.bins)
    if entry.note is not None:
        md["note"] = entry.note
    if entry.members is not None:
        md["members"] = _compact([mb.model_dump(mode="json", exclude_none=True) for mb in entry.members])
    return {(FIELD_PREFIX + k).encode(): v.encode("utf-8") for k, v in md.items()}


def entries_from_fields(fields: list[Any], where: str) -> list[ColumnEntry] | None:
    """The column entries that the field metadata of an extract's Arrow ``fields`` states (consecutive
    fields of one input column make one entry), or None when no field carries any (an extract
    written before extracts described themselves, or not by ldptransform).  ``where`` names the
    extract in the ``DataError`` raised for metadata that is partial or not ldptransform's."""
    from .errors import DataError

    def meta(f: Any) -> dict[str, str]:
        raw = f.metadata or {}
        try:
            return {k.decode()[len(FIELD_PREFIX):]: v.decode("utf-8") for k, v in raw.items()
                    if k.startswith(FIELD_PREFIX.encode())}
        except UnicodeDecodeError:
            raise DataError(f"{where}: the metadata of field {f.name!r} is not UTF-8 text. Give the release's "
                            "manifest (manifest=...), or ask the data steward for an intact copy.") from None

    metas = [meta(f) for f in fields]
    if not any(metas):
        return None
    entries: list[ColumnEntry] = []
    groups: list[tuple[dict[str, str], list[OutputColumn]]] = []
    for f, md in zip(fields, metas):
        if md.get("format") != FIELD_FORMAT or not {"column", "type", "meaning"} <= set(md):
            raise DataError(f"{where}: field {f.name!r} does not carry the column metadata of this version "
                            f"({FIELD_PREFIX}format {FIELD_FORMAT} with column, type and meaning), though other "
                            "fields do. Give the release's manifest (manifest=...), or ask the data steward for "
                            "an intact copy.")
        out = OutputColumn(name=f.name, dtype=str(f.type), meaning=md["meaning"])
        if groups and groups[-1][0]["column"] == md["column"]:
            groups[-1][1].append(out)
        else:
            groups.append((md, [out]))
    for md, outs in groups:
        try:
            entries.append(ColumnEntry(
                name=md["column"], type=md["type"],  # type: ignore[arg-type]  # checked by the model
                mechanism=json.loads(md["spec"]) if "spec" in md else None,
                labels=json.loads(md["labels"]) if "labels" in md else None,
                bins=json.loads(md["bins"]) if "bins" in md else None, outputs=outs, note=md.get("note"),
                members=json.loads(md["members"]) if "members" in md else None))
        except (ValueError, ValidationError):
            raise DataError(f"{where}: the metadata of the field(s) of column {md['column']!r} cannot be read "
                            "(a type, spec, labels or bins that is not what ldptransform writes). Give the "
                            "release's manifest (manifest=...), or ask the data steward for an intact "
                            "copy.") from None
    return entries


def default_manifest_path(extract: Path) -> Path:
    extract = Path(extract)
    return extract.with_name(extract.stem + ".manifest.json")


class DamagedManifest(ManifestError):
    """The manifest file was read, but its content is not a valid manifest (syntax, strict JSON,
    a missing or mistyped field, a mechanism spec that cannot be rebuilt).  ``validate`` reports
    it as a failed check; every other command stops with it (exit 2)."""


_AGAIN = "Ask the data steward for an intact copy."


def _field_path(loc: tuple[Any, ...]) -> str:
    """A pydantic location as the field path of the file: columns[1].mechanism.epsilon."""
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "top level"


def _column_of(data: Any, loc: tuple[Any, ...]) -> str:
    """`` (column 'name')`` for a location inside a column entry, if the entry names one."""
    if len(loc) >= 2 and loc[0] == "columns" and isinstance(loc[1], int) and isinstance(data, dict):
        cols = data.get("columns")
        if isinstance(cols, list) and loc[1] < len(cols) and isinstance(cols[loc[1]], dict):
            name = cols[loc[1]].get("name")
            if isinstance(name, str):
                return f" (column {name!r})"
    return ""


def _read_json(path: Path) -> Any:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ManifestError(f"manifest {path} does not exist. Give its path with --manifest (by default it is "
                            "the extract's name with .manifest.json in place of the extension).") from None
    except UnicodeDecodeError as err:
        raise DamagedManifest(f"manifest {path} is not UTF-8 text (the byte at offset {err.start} is not valid "
                              f"UTF-8), so it is not a manifest. {_AGAIN}") from None
    except OSError as err:
        raise ManifestError(f"manifest {path} cannot be read ({err.strerror or 'read error'}). Check the path "
                            "given to --manifest and its permissions.") from None
    try:
        return load_json(text)
    except LoadProblem as err:
        where = f" (line {err.line})" if err.line is not None else ""
        raise DamagedManifest(f"manifest {path}{where}: {err.text}. {_AGAIN}") from None
    except json.JSONDecodeError as err:
        raise DamagedManifest(f"manifest {path} is not valid JSON (line {err.lineno}, column {err.colno}: "
                              f"{err.msg}). {_AGAIN}") from None


def load_manifest(path: Path) -> Manifest:
    """Read and check a manifest: strict JSON (safeload.load_json), the model, and every column's
    mechanism spec rebuilt (``DamagedManifest`` naming the file and the field path otherwise)."""
    path = Path(path)
    data = _read_json(path)
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise DamagedManifest(f"{path} is not an ldptransform manifest (its 'format' field is not {FORMAT!r}). "
                              "Check the path given to --manifest.")
    if data.get("format_version") != FORMAT_VERSION:
        raise DamagedManifest(f"manifest {path} has format_version {data.get('format_version')!r}; this ldpt reads "
                              f"version {FORMAT_VERSION}. Use a matching ldptransform version.")
    try:
        m = Manifest.model_validate(data)
    except ValidationError as err:
        first = err.errors()[0]
        loc = tuple(first.get("loc", ()))
        what = "is missing" if first.get("type") == "missing" else f"{first.get('msg')}"
        raise DamagedManifest(f"manifest {path} is malformed: field '{_field_path(loc)}'{_column_of(data, loc)} "
                              f"{what} ({err.error_count()} problem(s) in all). {_AGAIN}") from None
    _check_finite(data, path)
    for i, c in enumerate(m.columns):
        _check_entry(path, i, c)
    return m


MAX_SPEC_EPSILON = 100.0  # a column's eps is at most 50 (policy.MAX_COLUMN_EPSILON); a composite of two layers 100


def _check_entry(path: Path, i: int, c: ColumnEntry) -> None:
    """A column entry that decoding can rely on: a public column has no mechanism and one output of
    its name; a privatized one a mechanism spec that rebuilds (``_check_spec``), of the family its
    type says, writing the outputs the entry lists, and for a binned column one edge more than bins."""
    where = f"manifest {path} is malformed: field 'columns[{i}]"
    col = f"(column {c.name!r})"
    if c.type == "public":
        if c.mechanism is not None:
            raise DamagedManifest(f"{where}.mechanism' {col}: a public column has no mechanism. {_AGAIN}")
        if [o.name for o in c.outputs] != [c.name]:
            raise DamagedManifest(f"{where}.outputs' {col}: a public column has one output, of its own name. "
                                  f"{_AGAIN}")
        return
    if c.mechanism is None:
        raise DamagedManifest(f"{where}.mechanism' {col} is missing: a {c.type} column needs its mechanism spec. "
                              f"{_AGAIN}")
    built = _check_spec(path, i, c)
    _check_joint(c, built, where, col)
    if (built.family == "frequency") != (c.type in ("categorical", "binned", "joint")):
        raise DamagedManifest(f"{where}.type' {col}: {c.type!r} does not fit its mechanism {built.name} "
                              f"({built.family}). {_AGAIN}")
    want = [f.name for f in built.output_fields(c.name)]
    if [o.name for o in c.outputs] != want:
        raise DamagedManifest(f"{where}.outputs' {col}: its mechanism writes the extract column(s) "
                              f"{', '.join(map(repr, want))}, the entry lists others. {_AGAIN}")
    if c.type == "binned":
        from .policy import MISSING_LABEL

        cats = list(getattr(built, "categories", ()))
        k = len(cats) - (MISSING_LABEL in cats)
        b = c.bins or []
        if (len(b) != k + 1 or not all(math.isfinite(x) for x in b)
                or any(hi <= lo for lo, hi in zip(b, b[1:]))):
            raise DamagedManifest(f"{where}.bins' {col}: a binned column of {k} bins needs {k + 1} strictly "
                                  f"increasing finite edges. {_AGAIN}")
    elif c.bins is not None:
        raise DamagedManifest(f"{where}.bins' {col}: only a binned column has bins. {_AGAIN}")


def _check_joint(c: ColumnEntry, built: Any, where: str, col: str) -> None:
    """A joint group's entry lists its members (no other entry does), whose product is its mechanism's domain."""
    if (c.type == "joint") != (c.members is not None):
        raise DamagedManifest(f"{where}.members' {col}: a joint group's entry lists its members, no other entry "
                              f"does. {_AGAIN}")
    if c.type == "joint":
        from .joint import check_members

        problem = check_members(c, built)
        if problem:
            raise DamagedManifest(f"{where}.members' {col}: {problem}. {_AGAIN}")


def _check_spec(path: Path, i: int, c: ColumnEntry) -> Any:
    """A column's mechanism spec: a positive finite epsilon, and rebuildable (mechanisms.build);
    returns the mechanism."""
    from . import mechanisms as mech
    from .errors import LdptError

    spec = c.mechanism or {}
    where = f"manifest {path} is malformed: field 'columns[{i}].mechanism"
    eps = spec.get("epsilon")
    if not isinstance(spec.get("mechanism"), str):
        raise DamagedManifest(f"{where}.mechanism' (column {c.name!r}) is missing or not a name. {_AGAIN}")
    if "epsilon" not in spec:
        raise DamagedManifest(f"{where}.epsilon' (column {c.name!r}) is missing. {_AGAIN}")
    if (isinstance(eps, bool) or not isinstance(eps, (int, float)) or not math.isfinite(eps) or eps <= 0
            or eps > MAX_SPEC_EPSILON):
        raise DamagedManifest(f"{where}.epsilon' (column {c.name!r}) must be a positive number of at most "
                              f"{MAX_SPEC_EPSILON:g}. {_AGAIN}")
    bounds = spec.get("bounds")
    if "bounds" in spec and not (isinstance(bounds, list) and len(bounds) == 2 and all(
            isinstance(b, (int, float)) and not isinstance(b, bool) and math.isfinite(b) for b in bounds)):
        raise DamagedManifest(f"{where}.bounds' (column {c.name!r}) must be two finite numbers. {_AGAIN}")
    try:
        return mech.build(spec)
    except KeyError as err:
        raise DamagedManifest(f"{where}.{err.args[0] if err.args else ''}' (column {c.name!r}) is missing. "
                              f"{_AGAIN}") from None
    except LdptError as err:
        raise DamagedManifest(f"{where}' (column {c.name!r}): the spec cannot be rebuilt: {err}. {_AGAIN}") from None
    except (TypeError, ValueError, IndexError, ArithmeticError, AttributeError):
        raise DamagedManifest(f"{where}' (column {c.name!r}): the spec cannot be rebuilt (a field of it has the "
                              f"wrong type or value). {_AGAIN}") from None


MAX_MANIFEST_INT = 2 ** 128  # far above any whole number a manifest holds (counts, sizes, integer masses)


def _check_finite(obj: Any, path: Path) -> None:
    if isinstance(obj, float) and not math.isfinite(obj):
        raise DamagedManifest(f"manifest {path} contains a non-finite number. {_AGAIN}")
    if isinstance(obj, int) and not isinstance(obj, bool) and abs(obj) > MAX_MANIFEST_INT:
        raise DamagedManifest(f"manifest {path} contains a whole number too large for any field "
                              f"(more than {len(str(MAX_MANIFEST_INT))} digits). {_AGAIN}")
    if isinstance(obj, dict):
        for v in obj.values():
            _check_finite(v, path)
    elif isinstance(obj, list):
        for v in obj:
            _check_finite(v, path)
