"""The release's own result (``ReleaseResult``) and the shuffle guarantee have ``to_dict()`` and
``to_frame()`` like every other result: the steward's summary of a release as data, with the
data-dependent figures kept under ``steward_only``."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

from conftest import DEMO_CSV, FIXED_NONCE, survey_policy, write_fixed_key, write_policy
from ldptransform import load_key, load_policy, privatize
from ldptransform.amplification import shuffle_guarantee


def test_release_result_as_dict_and_frame(tmp_path: Path, private_dir: Path) -> None:
    pol = load_policy(write_policy(tmp_path / "policy.yaml", survey_policy()))
    res = privatize(DEMO_CSV, pol, load_key(write_fixed_key(tmp_path / "release.key")), tmp_path / "extract.parquet",
                    nonce=FIXED_NONCE)
    d = json.loads(json.dumps(res.to_dict()))
    assert d["extract"] == str(res.extract_path) and d["rows"] == res.manifest.rows and d["nonce"] == FIXED_NONCE
    assert d["epsilon_per_row"] == res.manifest.privacy.epsilon_per_row_used
    assert d["already_published"] is False and d["ledger"] is None
    assert d["steward_only"]["column_counts"] == list(res.column_counts) and res.column_counts
    frame = res.to_frame()
    assert list(frame["column"]) == [c.name for c in res.manifest.columns]
    by = frame.set_index("column")
    for c in res.manifest.columns:
        if c.mechanism is None:
            assert pd.isna(by.loc[c.name, "mechanism"]) and by.loc[c.name, "type"] == "public"
        else:
            assert by.loc[c.name, "mechanism"] == c.mechanism["mechanism"]
            assert by.loc[c.name, "epsilon"] == c.mechanism["epsilon"]
    changed = {t.split(": ", 1)[0] for t in res.column_counts}
    assert {n for n, v in by["changed_steward_only"].items() if isinstance(v, str)} == changed


def test_shuffle_guarantee_frame_is_its_dict() -> None:
    g = shuffle_guarantee(1.0, 100_000, delta=1e-6)
    frame = g.to_frame()
    assert len(frame) == 1 and frame.iloc[0].to_dict() == g.to_dict()
