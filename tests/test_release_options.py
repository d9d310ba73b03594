"""The release's options are checked once, before anything is read or written; a mistake names
the Python parameters in the library and the command line's flags in the CLI."""

from __future__ import annotations

import pickle
from pathlib import Path

import pandas as pd
import pytest
from conftest import listing

from ldptransform.errors import OptionError, UsageError
from ldptransform.keys import SecretKey
from ldptransform.policy import parse_policy
from ldptransform.release import ReleaseOptions, privatize

KEY = SecretKey(bytes(range(7, 39)))
POLICY = {"budget": {"epsilon_per_row": 1.0},
          "columns": {"site": {"type": "categorical", "categories": ["a", "b"], "epsilon": 1.0}}}
FLAGS = {"batch_rows": "--batch-rows", "engine": "--engine", "scheduler": "--scheduler", "nonce": "--nonce",
         "out": "--out", "allow_partial": "--allow-partial"}


@pytest.fixture
def raw(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(tmp_path / "private"))
    path = tmp_path / "in.csv"
    pd.DataFrame({"site": ["a", "b", "a"]}).to_csv(path, index=False)
    return path


@pytest.mark.parametrize("kwargs, python, cli", [
    ({"batch_rows": 0}, "privatize(batch_rows=0): batch_rows must be a positive number of rows",
     "--batch-rows must be a positive number of rows"),
    ({"engine": "spark"}, "privatize(engine='spark'): engine 'spark' is not known; use one of: local, dask.",
     "--engine 'spark' is not known; use one of: local, dask."),
    ({"scheduler": "tls://10.0.0.1:8786"},
     "privatize(scheduler='tls://10.0.0.1:8786', engine='local'): scheduler applies only with engine='dask'.",
     "--scheduler applies only with --engine dask."),
    ({"nonce": "zz"}, "privatize(nonce='zz'): nonce must be 32 hex characters",
     "--nonce must be 32 hex characters"),
    ({"allow_partial": True}, "privatize(allow_partial=True): allow_partial applies only with a lifetime budget",
     "--allow-partial applies only with a lifetime budget"),
])
def test_an_option_mistake_names_the_parameter(raw: Path, kwargs: dict, python: str, cli: str) -> None:
    before = listing(raw.parent)
    with pytest.raises(OptionError) as err:
        privatize(raw, parse_policy(POLICY, "p.yaml"), KEY, raw.parent / "out.parquet", **kwargs)
    assert str(err.value).startswith(python), str(err.value)
    assert err.value.message_for(FLAGS).startswith(cli), err.value.message_for(FLAGS)
    assert isinstance(err.value, UsageError) and err.value.exit_code == 2
    assert str(pickle.loads(pickle.dumps(err.value))) == str(err.value)  # errors may come back from workers
    assert listing(raw.parent) == before  # nothing written


def test_dask_needs_a_folder_named_as_out(raw: Path) -> None:
    with pytest.raises(OptionError) as err:
        privatize(raw, parse_policy(POLICY, "p.yaml"), KEY, raw.parent / "out.parquet", engine="dask")
    assert str(err.value).startswith("privatize(engine='dask', out=") and "engine='dask' writes a Parquet" in str(
        err.value) and "give out a folder path" in str(err.value)
    assert err.value.message_for(FLAGS).startswith("--engine dask writes a Parquet dataset")
    assert "give --out a folder path" in err.value.message_for(FLAGS)


def test_options_are_frozen_with_their_defaults_filled_in(raw: Path) -> None:
    opts = ReleaseOptions.of(raw, parse_policy(POLICY, "p.yaml"), raw.parent / "ds", manifest_path=None,
                             diagnostics_path=None, batch_rows=10, overwrite=False, nonce=None, ledger_path=None,
                             allow_partial=False, engine="local", scheduler=None, fragment_rows=None)
    assert opts.dataset_out and opts.fmt_out == "parquet" and len(opts.nonce) == 32 and opts.ledger_path is None
    assert opts.manifest_path.name == "ds.manifest.json"
    with pytest.raises(AttributeError):
        opts.batch_rows = 5  # type: ignore[misc]
