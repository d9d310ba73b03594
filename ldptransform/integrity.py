"""Does an extract hold the bytes its manifest describes?

One check, shared by ``validate`` (the "extract hash" check) and ``estimate`` (which refuses a
mismatched pair): a single-file extract's SHA-256 and size against ``manifest.extract``; a
dataset extract (a folder of Parquet parts) part by part (every listed part present, with its
SHA-256 and size, no other data file in the folder) and the digest over the parts
(``dataset.dataset_digest``).  Files are read in chunks: memory stays flat whatever the size.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .dataset import dataset_digest
from .io import sha256_file
from .manifest import Manifest

__all__ = ["ExtractIntegrity", "check_extract"]


@dataclass(frozen=True)
class ExtractIntegrity:
    """The outcome: ``ok``, a one-line ``detail`` (what matched, or what differs: the first few
    problems, joined) and the ``problems`` themselves."""

    ok: bool
    detail: str
    problems: tuple[str, ...] = ()


_NOT_THIS = "the extract was changed or is not this manifest's"


def check_extract(extract: Path, manifest: Manifest) -> ExtractIntegrity:
    """The extract's bytes (or every part of a dataset extract) against the manifest."""
    extract = Path(extract)
    if manifest.extract.format == "parquet-dataset":
        return _check_dataset(extract, manifest)
    if extract.is_dir():
        return ExtractIntegrity(False, f"the manifest describes one {manifest.extract.format} file, but {extract} "
                                       "is a folder", (f"{extract} is a folder",))
    digest, size = sha256_file(extract)
    want, want_size = manifest.extract.sha256, manifest.extract.bytes
    if digest == want and size == want_size:
        return ExtractIntegrity(True, f"sha256 {digest[:16]}... and {size} bytes match the manifest")
    problems = []
    if digest != want:
        problems.append(f"sha256 of the file ({digest[:16]}...) differs from the manifest ({want[:16]}...)")
    if size != want_size:
        problems.append(f"the file has {size} bytes, the manifest says {want_size}")
    return ExtractIntegrity(False, "; ".join(problems) + f": {_NOT_THIS}", tuple(problems))


def _check_dataset(folder: Path, manifest: Manifest) -> ExtractIntegrity:
    parts = manifest.extract.parts or []
    if not folder.is_dir():
        msg = f"the manifest describes a dataset folder, but {folder} is not a folder"
        return ExtractIntegrity(False, msg, (msg,))
    listed = {p.file for p in parts}
    extra = sorted(p.name for p in folder.iterdir() if p.name not in listed and not p.name.startswith(("_", ".")))
    problems = []
    for p in parts:
        f = folder / p.file
        if not f.is_file():
            problems.append(f"{p.file} is missing")
            continue
        digest, size = sha256_file(f)
        if digest != p.sha256 or size != p.bytes:
            problems.append(f"{p.file} differs from the manifest (sha256 {digest[:16]}..., {size} bytes; the "
                            f"manifest says {p.sha256[:16]}..., {p.bytes} bytes)")
    if extra:
        problems.append(f"files not in the manifest: {', '.join(extra[:3])}{', ...' if len(extra) > 3 else ''}")
    if dataset_digest([p.model_dump() for p in parts]) != manifest.extract.sha256:
        problems.append("the digest over the listed parts differs from the manifest's sha256")
    if not problems:
        return ExtractIntegrity(True, f"all {len(parts)} parts match the manifest (sha256 and bytes), and so does the "
                                      "digest over them")
    return ExtractIntegrity(False, "; ".join(problems[:4]) + f": {_NOT_THIS}", tuple(problems))
