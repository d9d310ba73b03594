"""Hostile input files and a failing machine during a release: Parquet columns of a type a release
cannot take, text that is not UTF-8, a cell too large for the CSV reader, an input that changes
while it is read, a full disk, outputs aimed at the steward's own files, a killed run's leftovers
and a stop signal during the ledger's pre-pass.  Each ends with exit code 2 (130 for a stop) and
one paragraph naming the file, column or row and the fix, never a traceback, nothing at the
destination, the inputs untouched.
"""

from __future__ import annotations

import errno
import json
import os
import time
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
import yaml

from conftest import DEMO_CSV, assert_user_error, listing, partials, sha256, survey_policy, write_policy


class Work:
    """A release's paths in a work folder, and the checks that nothing was written."""

    def __init__(self, survey: dict[str, Path], private_dir: Path) -> None:
        self.dir, self.key, self.private = survey["dir"], survey["key"], private_dir
        self.policy = survey["policy"]
        self.out = self.dir / "extract.parquet"

    def run(self, ldpt: Any, input: Path, *extra: Any, out: Path | None = None) -> Any:
        return ldpt("privatize", input, "--policy", self.policy, "--key", self.key, "--out", out or self.out, *extra)

    def refused(self, res: Any, names: list[str], before: list[str], forbidden: list[str] | tuple[str, ...] = (),
                inputs: dict[Path, str] | None = None, code: int = 2) -> str:
        text = assert_user_error(res, names, forbidden, code=code)
        assert listing(self.dir) == before, f"the folder changed: {before} -> {listing(self.dir)}"
        assert partials(self.dir) == []
        assert listing(self.private) == [], "steward diagnostics were written for a failed run"
        for p, h in (inputs or {}).items():
            assert sha256(p) == h, f"{p} was modified"
        return text


@pytest.fixture
def work(survey: dict[str, Path], private_dir: Path) -> Work:
    return Work(survey, private_dir)


def _survey_table() -> pa.Table:
    return pacsv.read_csv(DEMO_CSV)


def _replace(table: pa.Table, name: str, values: pa.Array) -> pa.Table:
    return table.set_column(table.schema.get_field_index(name), name, values)


# -- Parquet columns a release cannot take --------------------------------------------------

def _nested(table: pa.Table, name: str, kind: str) -> pa.Array:
    col = table[name].combine_chunks()
    if kind == "list":
        return pa.ListArray.from_arrays(pa.array(range(len(col) + 1), pa.int32()), col)
    if kind == "large_list":
        return pa.LargeListArray.from_arrays(pa.array(range(len(col) + 1), pa.int64()), col)
    if kind == "struct":
        return pa.StructArray.from_arrays([col], names=["answer"])
    if kind == "map":
        keys = pa.array(["answer"] * len(col))
        return pa.MapArray.from_arrays(pa.array(range(len(col) + 1), pa.int32()), keys, col.cast(pa.string()))
    if kind == "fixed_size_list":
        return pa.FixedSizeListArray.from_arrays(col, 1)
    raise AssertionError(kind)


KINDS = ["list", "large_list", "fixed_size_list", "struct", "map"]  # Parquet cannot store a dictionary of lists


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("column", ["site", "pay"])
def test_parquet_column_of_several_values_per_cell(kind: str, column: str, work: Work, ldpt) -> None:
    """A categorical or numeric column stored as a list, struct or map: a
    clear refusal naming the file, the column and the stored type (it was a traceback)."""
    table = _replace(_survey_table(), column, _nested(_survey_table(), column, kind))
    raw = work.dir / "survey.parquet"
    pq.write_table(table, raw)
    stored = str(pq.read_schema(raw).field(column).type)
    before, inputs = listing(work.dir), {raw: sha256(raw)}
    text = work.refused(work.run(ldpt, raw), [raw.name, repr(column), stored, "Flatten"], before, inputs=inputs)
    assert "one value per cell" in text


def test_dictionary_of_lists_is_refused_too(tmp_path: Path) -> None:
    """Parquet cannot store a dictionary of lists, but a source that has one (an Arrow table in
    memory) is refused the same way, before any row is read."""
    from types import SimpleNamespace

    from ldptransform.errors import DataError
    from ldptransform.policy import parse_policy
    from ldptransform.release.columns import plan_columns
    from ldptransform.release.source import check_input_types

    lp = parse_policy(survey_policy(), "survey_policy.yaml")
    schema = _survey_table().schema
    schema = schema.set(schema.get_field_index("role"), pa.field("role", pa.dictionary(pa.int32(),
                                                                                     pa.list_(pa.string()))))
    src = SimpleNamespace(schema=schema, format="parquet", location="memory-table")
    plans = plan_columns(lp, schema.names, "memory-table")
    opts = SimpleNamespace(out=tmp_path / "extract.parquet", fmt_out="parquet", input=None)
    with pytest.raises(DataError, match=r"categorical column 'role' as dictionary<values=list"):
        check_input_types(src, plans, lp, opts)  # type: ignore[arg-type]


def test_public_list_column_in_a_csv_extract(work: Work, ldpt) -> None:
    """A public column stored as lists cannot go into a CSV extract: refused before anything is
    written, naming the column and its type, suggesting Parquet or dropping it."""
    table = _replace(_survey_table(), "survey_wave", _nested(_survey_table(), "survey_wave", "list"))
    raw = work.dir / "survey.parquet"
    pq.write_table(table, raw)
    before = listing(work.dir)
    res = work.run(ldpt, raw, out=work.dir / "extract.csv")
    work.refused(res, ["'survey_wave'", "list<", "CSV", "Parquet", "drop"], before, inputs={raw: sha256(raw)})
    # in a Parquet extract the same column travels as it is
    ok = work.run(ldpt, raw)
    assert ok.returncode == 0, ok.stderr
    assert pq.read_schema(work.out).field("survey_wave").type == table.schema.field("survey_wave").type


SECRET_BYTES = b"Quill\xff\xfe\xe9"


@pytest.mark.parametrize("stored", ["binary", "string", "dictionary"])
def test_parquet_text_that_is_not_utf8(stored: str, work: Work, ldpt) -> None:
    """A categorical column stored as bytes (or as text) that are not valid UTF-8 at data row 4321:
    the column, that row and the word encoding; the bytes are never shown."""
    table = _survey_table()
    cells = [s.encode() for s in table["site"].to_pylist()]
    cells[4320] = SECRET_BYTES
    raw = work.dir / "survey.parquet"
    binary = pa.array(cells, pa.binary())
    if stored == "binary":
        pq.write_table(_replace(table, "site", binary), raw)
    else:  # a writer that did not check its text: the same bytes stored as a string column
        pq.write_table(_replace(table, "site", binary.view(pa.string())), raw, use_dictionary=stored == "dictionary")
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--batch-rows", "1000")
    work.refused(res, ["'site'", "4321", "encoding", "UTF-8"], before, forbidden=["Quill"], inputs={raw: sha256(raw)})


@pytest.mark.parametrize("case", ["public to parquet", "public to csv", "subject, one row per person",
                                  "subject, ledger"])
def test_parquet_text_that_is_not_utf8_in_a_copied_or_subject_column(case: str, work: Work, ldpt) -> None:
    """A public column (copied into the extract as it is) or the subject column holding bytes that
    are not UTF-8: refused naming the column and the row, never copied into an extract."""
    table = _survey_table()
    column = "survey_wave" if case.startswith("public") else "staff_id"
    cells = [s.encode() for s in table[column].to_pylist()]
    cells[70] = SECRET_BYTES
    table = _replace(table, column, pa.array(cells, pa.binary()).view(pa.string()))
    raw = work.dir / "survey.parquet"
    pq.write_table(table, raw)
    extra: list[Any] = []
    if case.startswith("subject"):
        pol = survey_policy()
        pol["subject_key"] = "staff_id"
        del pol["columns"]["staff_id"]
        if case.endswith("ledger"):
            pol["budget"]["lifetime_epsilon"] = 50.0
            extra = ["--ledger", work.dir / "ledger.sqlite3"]
        else:
            pol["output"] = {"one_row_per_person": True}
        write_policy(work.policy, pol)
    out = work.dir / ("extract.csv" if case.endswith("csv") else "extract.parquet")
    before = listing(work.dir)
    res = work.run(ldpt, raw, *extra, out=out)
    work.refused(res, [repr(column), "data row 71", "encoding"], before, forbidden=["Quill"],
                 inputs={raw: sha256(raw)})


# -- CSV input that misleads the reader -----------------------------------------------------

@pytest.mark.parametrize("encoding", ["utf-16", "utf-16-le", "utf-16-be"])
def test_csv_in_utf16(encoding: str, work: Work, ldpt) -> None:
    """UTF-16 (with a byte-order mark or without) is named as such, not as a field-count problem."""
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_text(encoding="utf-8").encode(encoding))
    before = listing(work.dir)
    text = work.refused(work.run(ldpt, raw), [raw.name, "UTF-16", "UTF-8", "convert"], before,
                        inputs={raw: sha256(raw)})
    assert "field" not in text and "\\x00" not in text


def _latin1_at(path: Path, data_row: int, column: str) -> None:
    lines = DEMO_CSV.read_bytes().split(b"\n")
    header = lines[0].decode().split(",")
    cells = lines[data_row].split(b",")
    cells[header.index(column)] = "Café Lindqvist".encode("latin-1")
    lines[data_row] = b",".join(cells)
    path.write_bytes(b"\n".join(lines))


@pytest.mark.parametrize("data_row", [7, 5000, 11990])
def test_csv_latin1_byte(data_row: int, work: Work, ldpt) -> None:
    """A Latin-1 byte deep in the file: the word encoding, its line and data row, and its column."""
    raw = work.dir / "survey.csv"
    _latin1_at(raw, data_row, "role")
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--batch-rows", "1000")
    work.refused(res, [raw.name, "encoding", f"line {data_row + 1}", f"data row {data_row}", "'role'", "UTF-8"],
                 before, forbidden=["Lindqvist", "Caf"], inputs={raw: sha256(raw)})


def test_csv_latin1_byte_in_the_header(work: Work, ldpt) -> None:
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes().replace(b"weekly_hours", b"weekly_h\xf6urs", 1))
    before = listing(work.dir)
    work.refused(work.run(ldpt, raw), [raw.name, "encoding", "header"], before)


def test_csv_latin1_byte_in_a_dropped_column_is_not_blamed(work: Work, ldpt) -> None:
    """The release reads only the columns it releases: a bad byte in a dropped column alone does
    not stop it, and beside one in a released column further down, the latter is the one named."""
    raw = work.dir / "survey.csv"
    lines = DEMO_CSV.read_bytes().split(b"\n")
    lines[10] = lines[10].replace(b"AWC-", b"AWC\xe9", 1)  # staff_id: type drop
    raw.write_bytes(b"\n".join(lines))
    ok = work.run(ldpt, raw)
    assert ok.returncode == 0, ok.stderr
    cells = lines[900].split(b",")
    cells[1] = b"Rivers\xe9de"
    lines[900] = b",".join(cells)
    raw.write_bytes(b"\n".join(lines))
    before = listing(work.dir)
    res = work.run(ldpt, raw, out=work.dir / "second.parquet")
    text = assert_user_error(res, ["encoding", "line 901", "data row 900", "'site'"])
    assert "staff_id" not in text and "line 11" not in text
    assert listing(work.dir) == before


def test_csv_cell_too_large(work: Work, ldpt) -> None:
    """A 50 MB cell: said to be too large, with its line, column and the reader's limit, without the
    reader's advice about block sizes."""
    raw = work.dir / "survey.csv"
    lines = DEMO_CSV.read_bytes().split(b"\n")
    cells = lines[300].split(b",")
    cells[-1] = b"w" * (50 << 20)
    lines[300] = b",".join(cells)
    raw.write_bytes(b"\n".join(lines))
    before = listing(work.dir)
    text = work.refused(work.run(ldpt, raw), [raw.name, "too large", "line 301", "'survey_wave'", "1 MiB"], before)
    assert "block" not in text and "www" not in text


def test_csv_quote_never_closed(work: Work, ldpt) -> None:
    """A quote opened and never closed makes the rest of the file one cell: said so."""
    raw = work.dir / "survey.csv"
    body = DEMO_CSV.read_text(encoding="utf-8").splitlines()
    body = body[:1] + body[1:] * 3
    cells = body[4000].split(",")
    cells[1] = '"' + cells[1]
    body[4000] = ",".join(cells)
    raw.write_text("\n".join(body) + "\n", encoding="utf-8")
    before = listing(work.dir)
    text = work.refused(work.run(ldpt, raw), [raw.name, "quote"], before)
    assert "block" not in text


# -- a full disk while writing -------------------------------------------------------------

class _FullDiskWriter:
    """Stands in for pyarrow's Parquet or CSV writer on a disk that fills up: the first write
    fails with ENOSPC, and the writer, left broken, then fails to close with an error of its own
    (the one that used to hide the real cause)."""

    def __init__(self, where: Any, *args: Any, **kwargs: Any) -> None:
        self.failed = False

    def _write(self, *args: Any, **kwargs: Any) -> None:
        self.failed = True
        raise OSError(errno.ENOSPC, "Error writing bytes to file. Detail: [errno 28] No space left on device")

    write_table = write_batch = _write

    def close(self) -> None:
        if self.failed:
            raise pa.ArrowInvalid("Invalid operation on a closed file")


@pytest.mark.parametrize("out_name", ["extract.parquet", "extract.csv", "parts"])
@pytest.mark.parametrize("row_order", ["shuffled", "as-input"])
def test_full_disk_while_writing_the_extract(out_name: str, row_order: str, work: Work, ldpt,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    import ldptransform.io as lio

    monkeypatch.setattr(lio.pq, "ParquetWriter", _FullDiskWriter)
    monkeypatch.setattr(lio.pacsv, "CSVWriter", _FullDiskWriter)
    pol = survey_policy()
    pol["output"] = {"row_order": row_order}
    write_policy(work.policy, pol)
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    before = listing(work.dir)
    res = work.run(ldpt, raw, out=work.dir / out_name)
    text = work.refused(res, [out_name, "disk is full", "Free space", "another folder"], before,
                        inputs={raw: sha256(raw)}, code=6)
    assert "rrno" not in text and "closed file" not in text and ".ldpt-partial-" not in text


def test_full_disk_while_writing_the_manifest(work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    import ldptransform.release.publish as publish

    def full(tmp: Path, text: str, mode: int = 0o644) -> None:
        Path(tmp).write_bytes(b"{")  # a partial file the release must remove
        raise OSError(errno.ENOSPC, "No space left on device", str(tmp))

    monkeypatch.setattr(publish, "write_text_atomic_into", full)
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    before = listing(work.dir)
    work.refused(work.run(ldpt, raw), ["the manifest", "extract.manifest.json", "disk is full"], before, code=6)


def test_full_disk_with_a_real_device(work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    """The real writers on a device that is always full (/dev/full, where the system has one)."""
    import stat

    import ldptransform.io as lio

    if not Path("/dev/full").exists() or not stat.S_ISCHR(Path("/dev/full").stat().st_mode):
        pytest.skip("no /dev/full here")
    real_pq, real_csv = lio.pq.ParquetWriter, lio.pacsv.CSVWriter
    monkeypatch.setattr(lio.pq, "ParquetWriter", lambda where, *a, **k: real_pq("/dev/full", *a, **k))
    monkeypatch.setattr(lio.pacsv, "CSVWriter", lambda where, *a, **k: real_csv("/dev/full", *a, **k))
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    for out in ("extract.parquet", "extract.csv"):
        before = listing(work.dir)
        work.refused(work.run(ldpt, raw, out=work.dir / out), [out, "disk is full"], before, code=6)


# -- an input that changes while it is read --------------------------------------------------

def _change_during_read(monkeypatch: pytest.MonkeyPatch, change: Any, after_batches: int = 1) -> None:
    """Call ``change()`` once, after the release privatized ``after_batches`` batches."""
    import ldptransform.release.parts as parts

    real = parts.privatize_batch
    calls = {"n": 0}

    def hooked(*args: Any, **kwargs: Any) -> Any:
        calls["n"] += 1
        if calls["n"] == after_batches:
            change()
        return real(*args, **kwargs)

    monkeypatch.setattr(parts, "privatize_batch", hooked)


def _long_survey(path: Path, copies: int = 4) -> bytes:
    lines = DEMO_CSV.read_bytes().rstrip(b"\n").split(b"\n")
    data = b"\n".join(lines[:1] + lines[1:] * copies) + b"\n"
    path.write_bytes(data)
    return data


def _append(p: Path, data: bytes) -> None:
    with p.open("ab") as f:
        f.write(data.split(b"\n", 1)[1][:50000])


def _rewrite(p: Path, data: bytes) -> None:
    """The same size, other values, a new modification time."""
    p.write_bytes(data.replace(b"Riverside", b"Riverbank"))
    os.utime(p, ns=(time.time_ns(), time.time_ns() + 10**9))


CHANGES: dict[str, Any] = {
    "truncated": lambda p, data: os.truncate(p, len(data) // 3),
    "truncated mid-line": lambda p, data: os.truncate(p, len(data) - 7),
    "appended": _append,
    "rewritten in place": _rewrite,
}


@pytest.mark.parametrize("change", list(CHANGES))
@pytest.mark.parametrize("out_name", ["extract.parquet", "parts"])
def test_csv_changed_while_read(change: str, out_name: str, work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    """A CSV truncated, appended to or rewritten while the release reads it is refused (it used to
    give a release of the rows read so far), and nothing is left at the destination."""
    raw = work.dir / "survey.csv"
    data = _long_survey(raw)
    _change_during_read(monkeypatch, lambda: CHANGES[change](raw, data))
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--batch-rows", "2000", out=work.dir / out_name)
    work.refused(res, [raw.name, "changed while the release was reading it", "Nothing was written"], before)


def test_parquet_file_changed_while_read(work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    raw = work.dir / "survey.parquet"
    table = pa.concat_tables([_survey_table()] * 3)
    pq.write_table(table, raw, row_group_size=5000)
    _change_during_read(monkeypatch, lambda: pq.write_table(table.slice(0, 20000), raw, row_group_size=5000))
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--batch-rows", "2000")
    work.refused(res, [raw.name, "changed while the release was reading it"], before)


def test_parquet_dataset_file_changed_while_read(work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    folder = work.dir / "survey_parts"
    folder.mkdir()
    table = _survey_table()
    for i in range(3):
        pq.write_table(table.slice(i * 4000, 4000), folder / f"part-{i}.parquet")
    second = folder / "part-1.parquet"

    def rewrite() -> None:
        data = second.read_bytes()
        second.write_bytes(data)  # the same bytes, written again: a new modification time
        os.utime(second, ns=(time.time_ns(), time.time_ns() + 10**9))

    _change_during_read(monkeypatch, rewrite)
    before = listing(work.dir)
    res = work.run(ldpt, folder, "--batch-rows", "1000")
    work.refused(res, ["part-1.parquet", "changed while the release was reading it"], before)


def _ledger_policy(work: Work) -> None:
    pol = survey_policy()
    pol["subject_key"] = "staff_id"
    del pol["columns"]["staff_id"]
    pol["budget"]["lifetime_epsilon"] = 50.0
    write_policy(work.policy, pol)


def test_csv_changed_between_the_ledger_pre_pass_and_the_release(work: Work, ldpt,
                                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    """With a ledger and --allow-partial the input is read twice (the pre-pass works out who is held
    back before writing): a change between the two passes is refused, and the ledger is not created."""
    import ldptransform.release.run as run

    _ledger_policy(work)
    raw = work.dir / "survey.csv"
    data = _long_survey(raw, 2)
    real = run.precharge

    def then_append(*args: Any, **kwargs: Any) -> Any:
        charges = real(*args, **kwargs)
        with raw.open("ab") as f:
            f.write(data.split(b"\n", 1)[1][:20000])
        return charges

    monkeypatch.setattr(run, "precharge", then_append)
    ledger = work.dir / "ledger.sqlite3"
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--ledger", ledger, "--allow-partial")
    work.refused(res, [raw.name, "changed while the release was reading it"], before)
    assert not ledger.exists()


def _rewrite_in_place(path: Path, keep_times: bool = True) -> None:
    """Change one byte of a file's data in place (same size) and put its modification time back, as
    a careless copy tool would: only the status-change time, which no user can set back, shows it."""
    st = path.stat()
    data = bytearray(path.read_bytes())
    i = data.rindex(b"\n", 0, len(data) - 1) + 1  # the last row's first character
    data[i] = ord("9") if data[i] != ord("9") else ord("8")
    time.sleep(0.02)  # past the file system's timestamp tick
    with path.open("r+b") as f:
        f.write(bytes(data))
    if keep_times:
        os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert path.stat().st_size == st.st_size and path.stat().st_mtime_ns == st.st_mtime_ns


def _rewrite_after_the_pre_pass(monkeypatch: pytest.MonkeyPatch, raw: Path) -> None:
    """The ledger's pre-pass, then ``_rewrite_in_place(raw)`` before the release's own pass."""
    import ldptransform.release.run as run

    real = run.precharge

    def then_rewrite(*args: Any, **kwargs: Any) -> Any:
        charges = real(*args, **kwargs)
        _rewrite_in_place(raw)
        return charges

    monkeypatch.setattr(run, "precharge", then_rewrite)


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_rewrite_keeping_size_and_mtime_between_passes_is_refused(fmt: str, work: Work, ldpt,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    """A same-size rewrite between the ledger's pre-pass (--allow-partial) and the release's pass
    that puts the modification time back is refused (the status-change time moved), and the ledger and the
    nonce record are not created."""
    _ledger_policy(work)
    raw = work.dir / f"survey.{fmt}"
    if fmt == "csv":
        raw.write_bytes(DEMO_CSV.read_bytes())
    else:
        pq.write_table(pacsv.read_csv(DEMO_CSV), raw)
    _rewrite_after_the_pre_pass(monkeypatch, raw)
    ledger = work.dir / "ledger.sqlite3"
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--ledger", ledger, "--allow-partial")
    text = work.refused(res, [raw.name, "changed while the release was reading it", "status-change time"], before,
                        inputs={})
    assert "Nothing was written" in text
    assert not ledger.exists()
    assert not (work.private / "nonces.jsonl").exists()


def test_csv_passes_that_read_different_bytes_are_refused(work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    """Where the file's times cannot show a rewrite (a file system with coarse timestamps, made so
    here by leaving the status-change time out of the file's state), the digest of every CSV pass
    must equal the first: a same-size rewrite between the ledger's pre-pass (--allow-partial) and
    the release is refused all the same."""
    import ldptransform.io as lio

    real_state = lio.file_state
    monkeypatch.setattr(lio, "file_state", lambda path, missing_ok=False: real_state(path, missing_ok)._replace(
        ctime_ns=-1))
    _ledger_policy(work)
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    _rewrite_after_the_pre_pass(monkeypatch, raw)
    ledger = work.dir / "ledger.sqlite3"
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--ledger", ledger, "--allow-partial")
    work.refused(res, [raw.name, "two passes over it read different bytes"], before, inputs={})
    assert not ledger.exists()


def test_file_replaced_under_its_name_is_refused(work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    """A Parquet input replaced by another file under the same name (written beside it, renamed
    over it, its size and modification time copied) while the release runs: refused before
    anything is published."""
    import ldptransform.release.run as run

    raw = work.dir / "survey.parquet"
    pq.write_table(pacsv.read_csv(DEMO_CSV), raw)
    real = run.write_extract

    def then_replace(*args: Any, **kwargs: Any) -> Any:
        written = real(*args, **kwargs)
        st = raw.stat()
        other = work.dir / "other.parquet"
        other.write_bytes(raw.read_bytes())
        os.utime(other, ns=(st.st_atime_ns, st.st_mtime_ns))
        os.replace(other, raw)
        return written

    monkeypatch.setattr(run, "write_extract", then_replace)
    before = listing(work.dir)
    res = work.run(ldpt, raw)
    work.refused(res, [raw.name, "replaced by another file of the same name"], before, inputs={})


def test_csv_release_reads_the_input_once(work: Work, ldpt, monkeypatch: pytest.MonkeyPatch) -> None:
    """A CSV release opens and reads its input exactly once, with a ledger too (its charges come
    from the writing pass's own batches): the nonce record's digest is that of the bytes the
    extract was made from (no pass of its own), and it is the SHA-256 of the file.  Only with
    --allow-partial (who is held back must be known before writing) are there two passes."""
    import hashlib

    import ldptransform.io as lio
    import ldptransform.release.nonces as nonces

    opened: list[Path] = []
    real_init = lio.DigestingFile.__init__

    def counting(self: Any, path: Path) -> None:
        opened.append(Path(path))
        real_init(self, path)

    monkeypatch.setattr(lio.DigestingFile, "__init__", counting)
    monkeypatch.setattr(nonces, "sha256_stream", lambda *a, **k: pytest.fail("the CSV was read a second time"))
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    res = work.run(ldpt, raw)
    assert res.returncode == 0, res.stderr
    assert [p.name for p in opened] == [raw.name]
    record = json.loads((work.private / "nonces.jsonl").read_text(encoding="utf-8").splitlines()[-1])
    assert record["input"] == {"kind": "file", "sha256": hashlib.sha256(raw.read_bytes()).hexdigest(),
                               "bytes": raw.stat().st_size}
    opened.clear()
    _ledger_policy(work)
    res = work.run(ldpt, raw, "--ledger", work.dir / "ledger.sqlite3", out=work.dir / "second.parquet")
    assert res.returncode == 0, res.stderr
    assert [p.name for p in opened] == [raw.name]
    opened.clear()
    res = work.run(ldpt, raw, "--ledger", work.dir / "ledger.sqlite3", "--allow-partial",
                   out=work.dir / "third.parquet")
    assert res.returncode == 0, res.stderr
    assert [p.name for p in opened] == [raw.name, raw.name]  # the ledger's pre-pass, then the release


# -- outputs aimed at the steward's own files ------------------------------------------------

def test_manifest_aimed_at_the_input_names_the_input(work: Work, ldpt) -> None:
    """`--manifest data.csv` (the input): the message names that conflict, not the output, and
    nothing changes, with --overwrite too."""
    raw = work.dir / "data.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    h = sha256(raw)
    for extra in ((), ("--overwrite",)):
        before = listing(work.dir)
        res = ldpt("privatize", "data.csv", "--policy", work.policy, "--key", work.key, "--out", "extract.parquet",
                   "--manifest", "data.csv", *extra, cwd=work.dir)
        text = work.refused(res, ["manifest", "data.csv", "is the input"], before, inputs={raw: h})
        assert "--overwrite" not in text.split("input")[0] and "already exists" not in text


@pytest.mark.parametrize("target", ["input", "key", "policy"])
def test_ledger_aimed_at_a_source_file(target: str, work: Work, ldpt) -> None:
    """`--ledger data.csv` (the raw data), the key or the policy: refused naming the conflict, never
    a chmod hint on a source file, and the file is unchanged."""
    _ledger_policy(work)
    raw = work.dir / "data.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    path = {"input": raw, "key": work.key, "policy": work.policy}[target]
    hashes = {p: sha256(p) for p in (raw, work.key, work.policy)}
    modes = {p: p.stat().st_mode for p in hashes}
    before = listing(work.dir)
    res = work.run(ldpt, raw, "--ledger", path)
    text = work.refused(res, ["ledger", path.name, "a path of its own"], before, inputs=hashes)
    assert "chmod" not in text
    assert {p: p.stat().st_mode for p in hashes} == modes


# -- a killed run's leftovers ----------------------------------------------------------------

def _dead_pid() -> int:
    import subprocess
    import sys

    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True,
                          check=True)
    return int(proc.stdout)


def test_killed_runs_partials_are_cleaned_by_the_next_run(work: Work, ldpt) -> None:
    """A killed run leaves staged files: beside the extract and the manifest, and its steward-only
    diagnostics in the private folder under a name no later run uses again.  The next release
    removes all of them (a live run's are kept)."""
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    dead, alive = _dead_pid(), os.getpid()
    stale = [work.dir / f".extract.parquet.ldpt-partial-{dead}-0badc0de",
             work.dir / f".extract.manifest.json.ldpt-partial-{dead}-0badc0de",
             work.private / f".extract.0123456789ab.1a2b3c4d.PRIVATE-diagnostics.json.ldpt-partial-{dead}-0badc0de"]
    live = work.private / f".extract.ba9876543210.4d3c2b1a.PRIVATE-diagnostics.json.ldpt-partial-{alive}-0badc0de"
    for p in [*stale, live]:
        p.write_text('{"PRIVATE": "counts of a killed run"}\n')
    res = work.run(ldpt, raw)
    assert res.returncode == 0, res.stderr
    assert not any(p.exists() for p in stale), listing(work.private)
    assert live.exists()
    assert partials(work.dir) == []
    assert [n for n in listing(work.private) if ".ldpt-partial-" in n] == [live.name]


# -- a stop signal during the ledger's pre-pass ----------------------------------------------

SLOW_PASS = '''
import sys, time
from pathlib import Path

import ldptransform.release.central as central
import ldptransform.release.charges as charges
import ldptransform.release.nonces as nonces

marker, which = Path(sys.argv[1]), sys.argv[2]


def slowly(real):
    def slow(*args, **kwargs):
        marker.touch()  # the pass has started
        time.sleep(0.05)
        return real(*args, **kwargs)
    return slow


if which == "ledger pre-pass":
    charges._PrePass.prepare = slowly(charges._PrePass.prepare)
elif which == "one row per person":
    central.pd = type("pd", (), {"util": type("util", (), {"hash_array": staticmethod(
        slowly(central.pd.util.hash_array))})})
else:  # the input's digest for the nonce record, in small chunks
    real_stream = nonces.sha256_stream
    nonces.sha256_stream = lambda f, chunk, stop=None: real_stream(f, 4096, slowly(stop) if stop else None)
from ldptransform.cli import main

sys.argv = ["ldpt", *sys.argv[3:]]
main()
'''


@pytest.mark.parametrize("which", ["ledger pre-pass", "one row per person", "input digest"])
def test_sigterm_during_a_pass_before_writing(which: str, work: Work, ldpt, tmp_path: Path) -> None:
    """SIGTERM while a pass over the input before anything is written runs (the ledger's pre-pass;
    the one-row-per-person check, a pass of its own without a ledger; a Parquet input's digest:
    made slow here, 50 ms a step): the one-line interrupted message and exit code 130 (during the
    pre-pass it was killed by the signal, -15, without a word), nothing at the destination, the
    ledger unchanged."""
    import signal
    import subprocess
    import sys

    from conftest import cli_env

    _ledger_policy(work)
    if which == "one row per person":  # without a ledger: with one, its pre-pass makes this check
        pol = yaml.safe_load(work.policy.read_text(encoding="utf-8"))
        pol["output"] = {"one_row_per_person": True}
        del pol["budget"]["lifetime_epsilon"]
        write_policy(work.policy, pol)
    raw = work.dir / "survey.csv"
    raw.write_bytes(DEMO_CSV.read_bytes())
    if which == "input digest":  # a CSV file is digested while it is read, Parquet in a pass of its own
        raw = work.dir / "survey.parquet"
        pq.write_table(pacsv.read_csv(DEMO_CSV), raw)
    ledger = work.dir / "ledger.sqlite3"
    with_ledger = [] if which == "one row per person" else ["--ledger", str(ledger)]
    if which == "ledger pre-pass":  # a pre-pass of its own only where who is held back must be known first
        with_ledger.append("--allow-partial")
    first = work.run(ldpt, raw, *with_ledger, out=work.dir / "first.parquet")
    assert first.returncode == 0, first.stderr
    ledger_hash = sha256(ledger) if with_ledger else None
    private_before = listing(work.private)
    script, marker = tmp_path / "slow_pass.py", tmp_path / "pass-started"
    script.write_text(SLOW_PASS, encoding="utf-8")
    before = listing(work.dir)
    proc = subprocess.Popen([sys.executable, str(script), str(marker), which, "privatize", str(raw), "--policy",
                             str(work.policy), "--key", str(work.key), "--out", str(work.out), *with_ledger,
                             "--batch-rows", "100"],
                            env=cli_env(work.private), stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        while not marker.exists():
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "the pass did not start"
            time.sleep(0.02)
        proc.send_signal(signal.SIGTERM)
        signalled = time.monotonic()
        out, err = proc.communicate(timeout=30)
        took = time.monotonic() - signalled
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, (proc.returncode, err)
    assert took < 4, f"the run went on for {took:.1f} s after the signal (the pass does not stop between steps)"
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "interrupted" in lines[0] and "nothing was left" in lines[0], err
    assert "Traceback" not in err + out
    assert listing(work.dir) == before and partials(work.dir) == []
    assert (sha256(ledger) if with_ledger else None) == ledger_hash
    assert listing(work.private) == private_before


@pytest.mark.parametrize("bad_row", [3, 40_000])
def test_csv_row_with_the_wrong_number_of_fields_is_located(bad_row: int, work: Work, ldpt) -> None:
    """A CSV record with fewer fields than the header is named by its data row, counted in records
    (a quoted cell above it holds a line break), whether it lies in the reader's first block or far
    beyond it; the record's text is never shown."""
    lines = DEMO_CSV.read_text(encoding="utf-8").splitlines()
    header, rows = lines[0], lines[1:]
    body = [rows[i % len(rows)] for i in range(bad_row + 10)]
    cells = body[0].split(",")
    cells[1] = '"North\nWorks"'  # a quoted line break in data row 1: lines and records part ways
    body[0] = ",".join(cells)
    body[bad_row - 1] = "SECRETVALUE"
    raw = work.dir / "survey.csv"
    raw.write_text("\n".join([header, *body]) + "\n", encoding="utf-8")
    before = listing(work.dir)
    res = work.run(ldpt, raw)
    text = work.refused(res, [raw.name, f"data row {bad_row} ", "1 field(s) where the header has 9"], before,
                        forbidden=["SECRETVALUE"])
    assert f"record {bad_row + 1} of the file" in text
