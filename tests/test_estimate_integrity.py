"""estimate refuses what it cannot decode honestly: an extract whose bytes (hash, size; every
part of a dataset extract) are not the ones its manifest describes, and a merge of releases of
the same people whose memoized reports repeat from release to release.

Data: invented rows drawn with numpy's seeded generator (input data only); release noise comes
from fixed keys and nonces, so every outcome here is deterministic.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import FIXED_KEY_BYTES, assert_user_error, module_private_dir

from ldptransform import estimate, parse_policy, privatize
from ldptransform.errors import DataError, ManifestError, UsageError
from ldptransform.estimate import accumulate
from ldptransform.keys import SecretKey

KEY = SecretKey(FIXED_KEY_BYTES)
OTHER_KEY = SecretKey(bytes(range(1, 33)))
ROWS = 4000
COLOURS = ["red", "green", "blue"]


def _policy(eps: float = 1.0, memoize: bool = False) -> dict[str, Any]:
    p: dict[str, Any] = {
        "budget": {"epsilon_per_row": 2 * eps},
        "columns": {
            "person": {"type": "drop"},
            "colour": {"type": "categorical", "categories": list(COLOURS), "epsilon": eps, "mechanism": "grr"},
            "score": {"type": "numeric", "bounds": [0, 100], "epsilon": eps, "mechanism": "hybrid"},
        },
    }
    if memoize:
        p["subject_key"] = "person"
        p["output"] = {"row_order": "as-input"}  # so that a person's reports line up across nights below
        p["columns"]["colour"]["memoize"] = True
    return p


def _raw(tmp: Path, seed: int = 5, first_id: int = 0) -> Path:
    rng = np.random.default_rng(seed)  # invented input data only
    df = pd.DataFrame({"person": [f"p{i:06d}" for i in range(first_id, first_id + ROWS)],
                       "colour": rng.choice(COLOURS, ROWS, p=[.5, .3, .2]),
                       "score": np.round(rng.uniform(0, 100, ROWS), 1)})
    path = tmp / f"raw-{seed}-{first_id}.csv"
    df.to_csv(path, index=False)
    return path


def _release(raw: Path, out: Path, policy: dict[str, Any], nonce: str, key: SecretKey = KEY, **kw: Any) -> Path:
    privatize(raw, parse_policy(policy, "integrity.yaml"), key, out, nonce=nonce, **kw)
    return out


def _manifest(extract: Path) -> Path:
    return extract.with_name(extract.stem + ".manifest.json")


@pytest.fixture(scope="module")
def pair(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The same rows released at eps 1 and at eps 3 (a single-file extract each)."""
    d = tmp_path_factory.mktemp("integrity")
    raw = _raw(d)
    with module_private_dir(tmp_path_factory):
        one = _release(raw, d / "eps1.parquet", _policy(1.0), "1" * 32)
        three = _release(raw, d / "eps3.parquet", _policy(3.0), "3" * 32)
    return {"dir": d, "raw": raw, "one": one, "three": three}


# -- a mismatched extract and manifest ------------------------------------------------------------

def test_the_right_pair_is_decoded(pair: dict[str, Path], tmp_path: Path) -> None:
    res = estimate(pair["one"], _manifest(pair["one"]))
    assert res.rows == ROWS and res.columns["score"].epsilon == 1.0
    renamed = tmp_path / "renamed.parquet"  # a renamed copy still holds the manifest's bytes
    shutil.copy(pair["one"], renamed)
    assert estimate(renamed, _manifest(pair["one"])) == res


def test_the_manifest_of_another_release_is_refused(pair: dict[str, Path], ldpt: Any) -> None:
    # same rows, same columns: without the hash check this decoded silently with eps 3's channel
    with pytest.raises(ManifestError, match="does not match manifest") as err:
        estimate(pair["one"], _manifest(pair["three"]))
    assert str(_manifest(pair["three"])) in str(err.value) and "eps1.manifest.json" in str(err.value)
    res = ldpt("estimate", pair["one"], "--manifest", _manifest(pair["three"]))
    text = assert_user_error(res, ["eps1.parquet", "eps3.manifest.json", "Use the manifest written with this extract"])
    assert res.stdout == ""  # no partial output
    assert "sha256" in text


@pytest.mark.parametrize("change", ["truncated", "appended"])
def test_an_altered_single_file_is_refused(pair: dict[str, Path], tmp_path: Path, change: str, ldpt: Any) -> None:
    ex = tmp_path / "eps1.parquet"
    data = pair["one"].read_bytes()
    ex.write_bytes(data[:-100] if change == "truncated" else data + b"\0" * 10)
    man = tmp_path / "eps1.manifest.json"
    shutil.copy(_manifest(pair["one"]), man)
    with pytest.raises(ManifestError, match="bytes, the manifest says"):
        estimate(ex)
    assert_user_error(ldpt("estimate", ex, "--format", "json"), [str(ex), str(man)])


def test_an_altered_csv_extract_is_refused(tmp_path: Path) -> None:
    raw = _raw(tmp_path)
    ex = _release(raw, tmp_path / "x.csv", _policy(), "4" * 32)
    assert estimate(ex).rows == ROWS
    lines = ex.read_bytes().split(b"\n")
    ex.write_bytes(b"\n".join(lines[:-3] + [b""]))  # two rows fewer: still a readable CSV
    with pytest.raises(ManifestError, match="does not match manifest"):
        estimate(ex)


def test_a_dataset_extract_is_checked_part_by_part(tmp_path: Path, ldpt: Any) -> None:
    raw = _raw(tmp_path)
    ds = _release(raw, tmp_path / "ds", _policy(), "5" * 32, fragment_rows=1000)
    parts = sorted(ds.glob("*.parquet"))
    assert len(parts) >= 3
    assert estimate(ds).rows == ROWS
    # an extra part would be read as rows of this release
    shutil.copy(parts[0], ds / "part-99999.parquet")
    with pytest.raises(ManifestError, match="files not in the manifest: part-99999.parquet"):
        estimate(ds)
    (ds / "part-99999.parquet").unlink()
    # a part changed in place
    data = parts[1].read_bytes()
    parts[1].write_bytes(data[:-8] + bytes(8))
    with pytest.raises(ManifestError, match=f"{parts[1].name} differs from the manifest"):
        estimate(ds)
    assert_user_error(ldpt("estimate", ds), [str(ds), "ds.manifest.json", parts[1].name])
    parts[1].write_bytes(data)
    parts[2].unlink()
    with pytest.raises(ManifestError, match=f"{parts[2].name} is missing"):
        estimate(ds)


def test_validate_still_reports_instead_of_refusing(pair: dict[str, Path], tmp_path: Path) -> None:
    """The steward's validate reads a mismatched pair and reports its checks (the hash check
    fails); the decoder's own alphabet check still names the column when asked not to verify."""
    from ldptransform import validate

    rep = validate(pair["one"], _manifest(pair["three"]))
    hash_check = rep.check("extract hash")
    assert hash_check is not None and hash_check.ok is False and "differs from the manifest" in hash_check.detail
    ex = tmp_path / "eps1.parquet"
    df = pd.read_parquet(pair["one"])
    df["colour"] = df["colour"].astype(str)
    df.loc[df.index[:5], "colour"] = "not-a-colour"
    df.to_parquet(ex, index=False)
    shutil.copy(_manifest(pair["one"]), tmp_path / "eps1.manifest.json")
    with pytest.raises(ManifestError):
        accumulate(ex, verify=True)
    with pytest.raises(DataError, match="'colour' has 5 value"):
        accumulate(ex)


def test_the_integrity_check_is_shared_with_validate() -> None:
    """One implementation of the extract check (integrity.py), called by validate and estimate."""
    src = (Path(__file__).resolve().parent.parent / "ldptransform")
    for name in ("validate.py", "estimate.py"):
        text = (src / name).read_text(encoding="utf-8")
        assert "check_extract" in text and "sha256_file" not in text, name


# -- merges of releases of the same people ----------------------------------------------------

@pytest.fixture(scope="module")
def nights(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Two nights of the same people with a memoized column under one key; a third night of the
    same people under another key; two nights without memoized columns."""
    d = tmp_path_factory.mktemp("nights")
    raw = _raw(d)
    pol = _policy(memoize=True)
    with module_private_dir(tmp_path_factory):
        return {
            "a": _release(raw, d / "night1.parquet", pol, "a1" * 16),
            "b": _release(raw, d / "night2.parquet", pol, "a2" * 16),
            "other_key": _release(raw, d / "night3.parquet", pol, "a3" * 16, key=OTHER_KEY),
            "plain1": _release(raw, d / "plain1.parquet", _policy(), "b1" * 16),
            "plain2": _release(raw, d / "plain2.parquet", _policy(), "b2" * 16),
        }


def test_memoized_releases_of_the_same_people_are_not_merged(nights: dict[str, Path], ldpt: Any) -> None:
    with pytest.raises(UsageError, match="releases of the same people") as err:
        estimate([nights["a"], nights["b"]])
    msg = str(err.value)
    assert "'colour'" in msg and "'person'" in msg and "Estimate each release on its own" in msg
    # the memoized reports do repeat: the reason for the refusal is real
    a, b = pd.read_parquet(nights["a"]), pd.read_parquet(nights["b"])
    assert (a["colour"].to_numpy() == b["colour"].to_numpy()).mean() > 0.99
    assert (a["score"].to_numpy() == b["score"].to_numpy()).mean() < 0.5  # fresh noise (hybrid: few outputs)
    res = ldpt("estimate", nights["a"], nights["b"])
    assert_user_error(res, ["night1.parquet", "night2.parquet", "same people", "Estimate each release on its own"])
    assert res.stdout == ""
    # each night on its own is fine
    assert estimate(nights["a"]).rows == ROWS and estimate(nights["b"]).rows == ROWS


def test_releases_of_different_people_still_merge(nights: dict[str, Path], tmp_path: Path) -> None:
    # memoized under different keys: independent reports
    res = estimate([nights["a"], nights["other_key"]])
    assert res.rows == 2 * ROWS and len(res.extracts) == 2
    # no memoized column: the reports of two releases are drawn afresh
    res = estimate([nights["plain1"], nights["plain2"]])
    assert res.rows == 2 * ROWS
    one = estimate(nights["plain1"])
    se1, se2 = one.columns["score"].mean.se, res.columns["score"].mean.se  # type: ignore[union-attr]
    assert se1 is not None and se2 is not None and se2 == pytest.approx(se1 / np.sqrt(2), rel=0.1)
    # the same release twice is still refused as such
    with pytest.raises(UsageError, match="same release"):
        estimate([nights["plain1"], nights["plain1"]])


def test_a_merge_is_refused_before_any_extract_is_read(nights: dict[str, Path], tmp_path: Path) -> None:
    """The merge checks read only the manifests: a refused merge costs no decoding, and a broken
    extract in a refused merge is not what the message is about."""
    ex = tmp_path / "night2.parquet"
    ex.write_bytes(b"not parquet at all")
    shutil.copy(_manifest(nights["b"]), tmp_path / "night2.manifest.json")
    with pytest.raises(UsageError, match="same people"):
        estimate([nights["a"], ex])



def test_damaged_parquet_bytes_are_reported_never_a_traceback(tmp_path: Path) -> None:
    """A part of a Parquet dataset extract with one flipped bit (in its pages or in its footer):
    estimate refuses it with a user error (exit 2 from the CLI) and validate reports failed
    checks, at every one of 120 positions spread over the file (before: ArrowIndexError from a
    dictionary index out of range, ArrowNotImplementedError from a damaged footer).  The
    positions are fixed and the release uses a fixed key and nonce: deterministic."""
    from ldptransform import validate
    from ldptransform.errors import LdptError

    rng = np.random.default_rng(0)  # synthetic input data only
    raw = tmp_path / "raw.csv"
    pd.DataFrame({"c": rng.choice(["a", "b", "c"], 3000)}).to_csv(raw, index=False)
    lp = parse_policy({"budget": {"epsilon_per_row": 1}, "unlisted": "drop",
                       "columns": {"c": {"type": "categorical", "categories": ["a", "b", "c"], "epsilon": 1,
                                         "mechanism": "grr"}}}, "p")
    out = tmp_path / "out" / "x"
    out.parent.mkdir()
    privatize(raw, lp, KEY, out, nonce="4" * 32, fragment_rows=1000)
    part = sorted(out.glob("*.parquet"))[1]
    good = part.read_bytes()
    size = len(good) * 8
    positions = sorted({int(b) for b in np.linspace(0, size - 1, 100)} | set(range(size - 700, size - 500, 10)))
    refused = 0
    for bit in positions:
        bad = bytearray(good)
        bad[bit // 8] ^= 1 << (bit % 8)
        part.write_bytes(bytes(bad))
        rep = validate(out)
        assert not rep.ok, bit
        try:
            estimate(out)
        except LdptError:
            refused += 1
        part.write_bytes(good)
    assert refused == len(positions)
