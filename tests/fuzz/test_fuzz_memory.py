"""The promise for tables in memory: `privatize` on a pyarrow Table, a RecordBatchReader and a
pandas DataFrame made from every generated Parquet table (tests/fuzz/fuzz_tables.py), under the
case's policy.  Each call ends in success or a user error (``LdptError``), never another
exception; a refused call leaves nothing at the destination and nothing in the private folder
but the nonce record; the Table and the reader of the same rows give the same extract bytes (same
key and nonce; both releases are made as re-derivations, which the nonce record neither checks
nor records, so the two never meet there)."""

from __future__ import annotations

import os
from typing import Any

import pytest
from hypothesis import assume, given

from fuzz_promise import Workspace, fuzz_settings, note, workspace
from fuzz_tables import TableCase, _arrow_table, table_cases
from ldptransform import load_key, parse_policy, privatize
from ldptransform.errors import LdptError
from ldptransform.release import nonces

pytestmark = pytest.mark.fuzz
NONCE = "5a5a5a5a5a5a5a5a5a5a5a5a5a5a5a5a"


def _release(ws: Workspace, obj: Any, policy: Any, name: str) -> bytes | None:
    """The extract's bytes, or None for a user error (after checking that nothing was left)."""
    out = ws.out / name
    before = sorted(os.listdir(ws.out)), sorted(os.listdir(ws.priv))
    try:
        with nonces.rederiving():
            privatize(obj, policy, load_key(ws.key), out, nonce=NONCE)
    except LdptError as err:
        note(f"memory {name}: {type(err).__name__}")
        assert (sorted(os.listdir(ws.out)), sorted(os.listdir(ws.priv))) == before, "a refused release left files"
        assert "Traceback" not in str(err) and "NoneType" not in str(err)
        return None
    note(f"memory {name}: released")
    return out.read_bytes()


@fuzz_settings(max_examples=60)
@given(case=table_cases())
def test_tables_in_memory_keep_the_promise(case: TableCase) -> None:
    assume(case.fmt == "parquet")
    with workspace() as ws:
        old = os.environ.get("LDPT_PRIVATE_DIR")
        os.environ["LDPT_PRIVATE_DIR"] = str(ws.priv)
        try:
            try:
                policy = parse_policy(case.policy, "fuzz-policy")
            except LdptError:
                return
            table = _arrow_table(case.columns, case.rows)
            from_table = _release(ws, table, policy, "table.parquet")
            from_reader = _release(ws, table.to_reader(max_chunksize=3), policy, "reader.parquet")
            assert (from_table is None) == (from_reader is None), "a Table and a reader of its rows disagree"
            assert from_table == from_reader, "a Table and a reader of its rows give different extracts"
            try:
                frame = table.to_pandas()
            except Exception:  # noqa: BLE001 (pyarrow cannot make this table a DataFrame: not ours to test)
                return
            _release(ws, frame, policy, "frame.parquet")
        finally:
            if old is None:
                os.environ.pop("LDPT_PRIVATE_DIR", None)
            else:
                os.environ["LDPT_PRIVATE_DIR"] = old
