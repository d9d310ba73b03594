"""Input conveniences of a release: tab-separated and other delimiters (by the file's name, the
policy's input.csv_delimiter or --delimiter), gzip/zstd-compressed text input read as it
streams, and the destinations' missing folders created (0700 for steward-only ones) only when
the release writes.  Invented data only (a seeded generator)."""

from __future__ import annotations

import gzip
import json
import os
import stat
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from conftest import assert_user_error, sha256, write_policy
from ldptransform.errors import OptionError, UsageError
from ldptransform.io import TableSource, input_kind, resolve_delimiter
from ldptransform.keys import SecretKey, new_key_file
from ldptransform.policy import parse_policy
from ldptransform.release import privatize

KEY = SecretKey(bytes(range(40, 72)))
NONCE = f"{77:032x}"
SITES = ["north", "south", "east", "west"]


def table(n: int = 2500, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)  # invented input data only, never release noise
    return pd.DataFrame({"site": rng.choice(SITES, size=n), "pay": np.round(rng.uniform(10, 90, size=n), 1),
                         "note": rng.choice(["a b", "c;d", "e"], size=n)})


def policy_dict(delimiter: str | None = None) -> dict[str, Any]:
    p: dict[str, Any] = {"budget": {"epsilon_per_row": 2.0}, "unlisted": "drop",
                         "columns": {"site": {"type": "categorical", "categories": SITES, "epsilon": 1.0},
                                     "pay": {"type": "numeric", "bounds": [0, 100], "epsilon": 1.0},
                                     "note": {"type": "public"}}}
    if delimiter is not None:
        p["input"] = {"csv_delimiter": delimiter}
    return p


def zstd(data: bytes) -> bytes:
    return pa.compress(data, codec="zstd", asbytes=True)


def release(raw: Path, out: Path, private: Path, monkeypatch: pytest.MonkeyPatch, pol: dict[str, Any] | None = None,
            **kw: Any) -> Any:
    """One release with the fixed key and nonce, its own private folder (a nonce may be reused only
    on the same input bytes, and these tests release the same table in several files)."""
    private.mkdir(mode=0o700, exist_ok=True)
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(private))
    return privatize(raw, parse_policy(pol or policy_dict(), "p.yaml"), KEY, out, nonce=NONCE, **kw)


def nonce_record(private: Path) -> dict[str, Any]:
    lines = (private / "nonces.jsonl").read_text(encoding="utf-8").splitlines()
    [entry] = [json.loads(line) for line in lines if json.loads(line)["nonce"] == NONCE]
    return entry


@pytest.fixture
def plain(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> tuple[pd.DataFrame, Path, bytes]:
    """The table as a comma-separated file, and the bytes of its extract (the reference)."""
    df = table()
    raw = tmp_path / "table.csv"
    df.to_csv(raw, index=False)
    res = release(raw, tmp_path / "ref" / "extract.parquet", tmp_path / "priv-ref", monkeypatch)
    return df, raw, Path(res.extract_path).read_bytes()


# -- names and delimiters ----------------------------------------------------------------

def test_input_kind_by_name() -> None:
    assert input_kind("a.csv") == ("csv", None, False)
    assert input_kind("A.TSV") == ("csv", None, True)
    assert input_kind("a.tab.gz") == ("csv", "gzip", True)
    assert input_kind("a.csv.zst") == ("csv", "zstd", False)
    assert input_kind("a.parquet") == ("parquet", None, False)
    with pytest.raises(UsageError, match=r"a\.txt.*\.csv, \.tsv or \.tab"):
        input_kind("a.txt")
    with pytest.raises(UsageError, match="Parquet file is compressed inside already"):
        input_kind("a.parquet.gz")


def test_delimiter_resolution() -> None:
    assert resolve_delimiter("a.tsv") == "\t"
    assert resolve_delimiter("a.tsv.gz") == "\t"
    assert resolve_delimiter("a.csv") == ","
    assert resolve_delimiter("a.tsv", ";") == ";"  # the policy names one: it wins over the name
    assert resolve_delimiter("a.tsv", ";", ",") == ","  # the explicit option wins over both
    assert resolve_delimiter("a.csv", "|", "\t") == "\t"


def test_tsv_gives_the_extract_of_the_csv(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    df, _, ref = plain
    for name in ("table.tsv", "table.tab"):
        raw = tmp_path / name
        df.to_csv(raw, index=False, sep="\t")
        assert b"\t" in raw.read_bytes()[:40]
        res = release(raw, tmp_path / f"out-{name}" / "extract.parquet", tmp_path / f"priv-{name}", monkeypatch)
        assert Path(res.extract_path).read_bytes() == ref
        assert res.manifest.rows == len(df)


def test_validate_reads_a_tsv_raw_table(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path) -> None:
    df, _, _ = plain
    raw = tmp_path / "raw.tsv"
    df.to_csv(raw, index=False, sep="\t")
    src = TableSource(raw, csv_delimiter=",")  # the policy's default: the name says tab
    assert src.column_names == ["site", "pay", "note"]
    assert sum(b.num_rows for b in src.batches(["site"], 1000)) == len(df)


def test_other_delimiters_by_policy_and_option(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    df, _, ref = plain
    semi = tmp_path / "semi.csv"
    df.to_csv(semi, index=False, sep=";")
    res = release(semi, tmp_path / "a" / "x.parquet", tmp_path / "pa", monkeypatch, policy_dict(";"))
    assert Path(res.extract_path).read_bytes() == ref
    res = release(semi, tmp_path / "b" / "x.parquet", tmp_path / "pb", monkeypatch, policy_dict("|"), delimiter=";")
    assert Path(res.extract_path).read_bytes() == ref  # the option wins over the policy
    # a .tsv file whose policy names another delimiter: the policy's explicit choice wins over the name
    pipe = tmp_path / "pipe.tsv"
    df.to_csv(pipe, index=False, sep="|")
    res = release(pipe, tmp_path / "c" / "x.parquet", tmp_path / "pc", monkeypatch, policy_dict("|"))
    assert Path(res.extract_path).read_bytes() == ref
    # ... and --delimiter , reads a .tsv named file as comma-separated
    commas = tmp_path / "commas.tsv"
    df.to_csv(commas, index=False)
    res = release(commas, tmp_path / "d" / "x.parquet", tmp_path / "pd", monkeypatch, delimiter=",")
    assert Path(res.extract_path).read_bytes() == ref
    tabs = tmp_path / "tabs.csv"
    df.to_csv(tabs, index=False, sep="\t")
    res = release(tabs, tmp_path / "e" / "x.parquet", tmp_path / "pe", monkeypatch, delimiter="tab")
    assert Path(res.extract_path).read_bytes() == ref


@pytest.mark.parametrize("bad", ['"', "\n", ";;", ""])
def test_a_bad_delimiter_option_is_refused(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                           monkeypatch: pytest.MonkeyPatch, bad: str) -> None:
    _, raw, _ = plain
    with pytest.raises(OptionError, match="delimiter"):
        release(raw, tmp_path / "o" / "x.parquet", tmp_path / "po", monkeypatch, delimiter=bad)
    assert not (tmp_path / "o").exists()


def test_delimiter_option_on_the_command_line(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                              ldpt: Any) -> None:
    df, _, _ = plain
    semi = tmp_path / "semi.csv"
    df.to_csv(semi, index=False, sep=";")
    pol = write_policy(tmp_path / "p.yaml", policy_dict())
    new_key_file(tmp_path / "k.key")
    res = ldpt("privatize", semi, "--policy", pol, "--key", tmp_path / "k.key", "--out", tmp_path / "x.csv",
               "--delimiter", ";", "-q")
    assert res.returncode == 0, res.stderr
    assert sorted(pd.read_csv(tmp_path / "x.csv")["note"]) == sorted(df["note"])  # "c;d" read whole
    res = ldpt("privatize", semi, "--policy", pol, "--key", tmp_path / "k.key", "--out", tmp_path / "y.csv",
               "--delimiter", '"')
    assert_user_error(res, ["--delimiter", "quote"])
    assert not (tmp_path / "y.csv").exists()
    pq_in = tmp_path / "t.parquet"
    df.to_parquet(pq_in, index=False)
    res = ldpt("privatize", pq_in, "--policy", pol, "--key", tmp_path / "k.key", "--out", tmp_path / "z.csv",
               "--delimiter", ";")
    assert_user_error(res, ["--delimiter", str(pq_in), "Parquet"])
    assert not (tmp_path / "z.csv").exists()


# -- compressed input --------------------------------------------------------------------

@pytest.mark.parametrize("name,compress", [("table.csv.gz", gzip.compress), ("table.csv.zst", zstd),
                                           ("table.tsv.gz", gzip.compress), ("table.tsv.zst", zstd)])
def test_compressed_input_gives_the_extract_of_the_plain_file(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                                              monkeypatch: pytest.MonkeyPatch, name: str,
                                                              compress: Any) -> None:
    df, raw, ref = plain
    text = raw.read_bytes()
    if ".tsv" in name:
        tsv = tmp_path / "t.tsv"
        df.to_csv(tsv, index=False, sep="\t")
        text = tsv.read_bytes()
    packed = tmp_path / name
    packed.write_bytes(compress(text))
    assert packed.stat().st_size < len(text)
    private = tmp_path / f"priv-{name}"
    # a small batch: several batches streamed from the decompressed file
    res = release(packed, tmp_path / f"out-{name}" / "extract.parquet", private, monkeypatch, batch_rows=300)
    assert Path(res.extract_path).read_bytes() == ref
    entry = nonce_record(private)["input"]
    assert entry == {"kind": "file", "sha256": sha256(packed), "bytes": packed.stat().st_size}


def test_progress_counts_the_compressed_bytes(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    from ldptransform.io import csv_bytes_read

    _, raw, _ = plain
    packed = tmp_path / "t.csv.gz"
    packed.write_bytes(gzip.compress(raw.read_bytes()))
    seen: list[int] = []
    token = csv_bytes_read.set(seen.append)
    try:
        release(packed, tmp_path / "o" / "x.parquet", tmp_path / "pp", monkeypatch)
    finally:
        csv_bytes_read.reset(token)
    assert seen and max(seen) == packed.stat().st_size


def _damaged_gz(text: bytes) -> bytes:
    packed = bytearray(gzip.compress(text))
    mid = len(packed) // 2
    packed[mid:mid + 64] = bytes(64)
    return bytes(packed)


@pytest.mark.parametrize("kind", ["damaged", "cut short", "not gzip", "cut short zstd"])
def test_a_damaged_compressed_file_is_refused(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path, ldpt: Any,
                                              kind: str) -> None:
    _, raw, _ = plain
    text = raw.read_bytes()
    bad = tmp_path / ("in.csv.zst" if "zstd" in kind else "in.csv.gz")
    data = {"damaged": _damaged_gz(text), "cut short": gzip.compress(text)[:-200], "not gzip": text,
            "cut short zstd": zstd(text)[: len(zstd(text)) // 2]}[kind]
    bad.write_bytes(data)
    pol = write_policy(tmp_path / "p.yaml", policy_dict())
    new_key_file(tmp_path / "k.key")
    out = tmp_path / "new" / "deeper" / "x.parquet"
    diag = tmp_path / "steward" / "d.json"
    res = ldpt("privatize", bad, "--policy", pol, "--key", tmp_path / "k.key", "--out", out, "--diagnostics", diag)
    msg = assert_user_error(res, [str(bad), "cannot be decompressed", "Nothing was written"], forbidden=["north"])
    assert "zlib" not in msg and "Truncated" not in msg
    assert not (tmp_path / "new").exists() and not (tmp_path / "steward").exists()  # no folder left behind


def test_errors_inside_a_compressed_file_are_located(tmp_path: Path, ldpt: Any) -> None:
    rows = "".join(f"{SITES[i % 4]},{i % 90},e\n" for i in range(500))
    bad_row = "site,pay,note\n" + rows + "north,5,e,extra\n" + rows
    (tmp_path / "rows.csv.gz").write_bytes(gzip.compress(bad_row.encode()))
    latin = ("site,pay,note\n" + rows).encode() + b"north,5,caf\xe9\n"
    (tmp_path / "latin.csv.zst").write_bytes(zstd(latin))
    pol = write_policy(tmp_path / "p.yaml", policy_dict())
    new_key_file(tmp_path / "k.key")
    res = ldpt("privatize", tmp_path / "rows.csv.gz", "--policy", pol, "--key", tmp_path / "k.key",
               "--out", tmp_path / "a.parquet")
    assert_user_error(res, ["rows.csv.gz", "data row 501"])
    res = ldpt("privatize", tmp_path / "latin.csv.zst", "--policy", pol, "--key", tmp_path / "k.key",
               "--out", tmp_path / "b.parquet")
    assert_user_error(res, ["latin.csv.zst", "not valid UTF-8", "line 502", "'note'"])
    assert not (tmp_path / "a.parquet").exists() and not (tmp_path / "b.parquet").exists()


# -- output folders ----------------------------------------------------------------------

def _mode(p: Path) -> int:
    return stat.S_IMODE(p.stat().st_mode)


def test_missing_folders_are_created(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                     monkeypatch: pytest.MonkeyPatch) -> None:
    _, raw, ref = plain
    umask = os.umask(0o022)
    os.umask(umask)
    out = tmp_path / "partner" / "2026" / "extract.parquet"
    manifest = tmp_path / "manifests" / "m.json"
    diag = tmp_path / "steward" / "diag" / "d.json"
    existing = tmp_path / "kept"
    existing.mkdir(mode=0o750)
    os.chmod(existing, 0o750)
    res = release(raw, out, tmp_path / "pf", monkeypatch, manifest_path=manifest, diagnostics_path=diag)
    assert out.read_bytes() == ref and manifest.is_file() and diag.is_file()
    for public in (tmp_path / "partner", out.parent, manifest.parent):
        assert _mode(public) == 0o777 & ~umask
    for private in (tmp_path / "steward", diag.parent):
        assert _mode(private) == 0o700
    assert res.diagnostics_path == diag
    # an existing folder is used as it is: never changed
    release(raw, existing / "new" / "x.csv", tmp_path / "pg", monkeypatch, diagnostics_path=diag.parent / "e.json")
    assert _mode(existing) == 0o750 and _mode(existing / "new") == 0o777 & ~umask


def test_a_dataset_output_folder_gets_its_parents(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    _, raw, _ = plain
    out = tmp_path / "outer" / "inner" / "extract"
    release(raw, out, tmp_path / "pd", monkeypatch)
    assert sorted(p.name for p in out.iterdir()) == ["part-00000.parquet"]


def test_a_refused_release_creates_no_folder(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                             ldpt: Any) -> None:
    _, raw, _ = plain
    pol = policy_dict()
    pol["columns"]["absent"] = {"type": "numeric", "bounds": [0, 1], "epsilon": 0.5}
    pol["budget"]["epsilon_per_row"] = 2.5
    pol["unlisted"] = "error"
    path = write_policy(tmp_path / "p.yaml", pol)
    new_key_file(tmp_path / "k.key")
    res = ldpt("privatize", raw, "--policy", path, "--key", tmp_path / "k.key", "--out", tmp_path / "pub" / "x.csv",
               "--diagnostics", tmp_path / "steward" / "d.json")
    assert_user_error(res, ["absent"])
    assert not (tmp_path / "pub").exists() and not (tmp_path / "steward").exists()


def test_a_folder_below_a_file_is_refused(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path, ldpt: Any) -> None:
    _, raw, _ = plain
    path = write_policy(tmp_path / "p.yaml", policy_dict())
    new_key_file(tmp_path / "k.key")
    (tmp_path / "afile").write_text("x")
    res = ldpt("privatize", raw, "--policy", path, "--key", tmp_path / "k.key",
               "--out", tmp_path / "afile" / "sub" / "x.csv")
    assert_user_error(res, ["afile", "is a file, not a folder"])
    res = ldpt("privatize", raw, "--policy", path, "--key", tmp_path / "k.key", "--out", tmp_path / "afile" / "x.csv")
    assert_user_error(res, ["afile", "is a file, not a folder"])
    assert (tmp_path / "afile").read_text() == "x"


@pytest.mark.skipif(os.geteuid() == 0, reason="root may write in any folder")
def test_a_folder_that_cannot_be_created(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path, ldpt: Any) -> None:
    _, raw, _ = plain
    path = write_policy(tmp_path / "p.yaml", policy_dict())
    new_key_file(tmp_path / "k.key")
    locked = tmp_path / "locked"
    locked.mkdir(mode=0o500)
    try:
        res = ldpt("privatize", raw, "--policy", path, "--key", tmp_path / "k.key", "--out", locked / "new" / "x.csv")
    finally:
        os.chmod(locked, 0o700)
    assert_user_error(res, [str(locked / "new"), "cannot be created"], code=6)


def test_a_release_that_fails_while_writing_removes_the_folders_it_made(tmp_path: Path, ldpt: Any,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """The damage lies past the reader's first blocks: the release has created the folders and
    started writing when it meets it; it leaves neither files nor the folders it made."""
    from ldptransform.release import publish

    made: list[Path] = []
    real = publish.create_folders

    def spy(staged: Any, opts: Any, diag_path: Path) -> None:
        made.extend(f for f, _ in publish.missing_folders(opts, diag_path))
        real(staged, opts, diag_path)
        assert all(f.is_dir() for f in made)

    monkeypatch.setattr(publish, "create_folders", spy)
    df = table(n=600_000, seed=5)
    text = df.to_csv(index=False).encode()
    packed = bytearray(gzip.compress(text))
    at = int(len(packed) * 0.95)
    packed[at:at + 64] = bytes(64)
    bad = tmp_path / "big.csv.gz"
    bad.write_bytes(bytes(packed))
    pol = write_policy(tmp_path / "p.yaml", policy_dict())
    new_key_file(tmp_path / "k.key")
    out = tmp_path / "pub" / "night" / "x.parquet"
    res = ldpt("privatize", bad, "--policy", pol, "--key", tmp_path / "k.key", "--out", out,
               "--diagnostics", tmp_path / "steward" / "d.json")
    assert_user_error(res, [str(bad), "cannot be decompressed"])
    assert made == [tmp_path / "pub", tmp_path / "steward", tmp_path / "pub" / "night"]
    assert not (tmp_path / "pub").exists() and not (tmp_path / "steward").exists()


def test_a_delimiter_for_an_input_without_one_is_refused(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="has no delimiter"):
        privatize(table(n=50), parse_policy(policy_dict(), "p.yaml"), KEY, tmp_path / "x.parquet", delimiter=";")
    with pytest.raises(OptionError, match="delimiter"):
        privatize(tmp_path / "t.csv", parse_policy(policy_dict(), "p.yaml"), KEY, tmp_path / "x.parquet",
                  delimiter=9)  # type: ignore[arg-type]
    assert not (tmp_path / "x.parquet").exists()


def test_a_signed_release_into_a_new_folder(plain: tuple[pd.DataFrame, Path, bytes], tmp_path: Path,
                                            ldpt: Any) -> None:
    _, raw, _ = plain
    pol = write_policy(tmp_path / "p.yaml", policy_dict())
    new_key_file(tmp_path / "k.key")
    assert ldpt("key", "new-signing", tmp_path / "sign.key").returncode == 0
    out = tmp_path / "signed" / "x.parquet"
    res = ldpt("privatize", raw, "--policy", pol, "--key", tmp_path / "k.key", "--out", out,
               "--signing-key", tmp_path / "sign.key", "-q")
    assert res.returncode == 0, res.stderr
    assert sorted(p.name for p in out.parent.iterdir()) == ["x.manifest.json", "x.manifest.json.sig", "x.parquet"]
