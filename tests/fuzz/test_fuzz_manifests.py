"""The promise (tests/fuzz/fuzz_promise.py) for `estimate` and `validate` (partner and steward
side) on a valid release whose manifest was damaged (tests/fuzz/fuzz_release.py): a field
removed, its type or value changed, junk nested in it, a key twice, the file cut short, not
UTF-8, empty."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fuzz_promise import note, fuzz_settings, promise_run, workspace
from fuzz_release import MANIFEST, ManifestCase, Release, make_release, manifest_cases

pytestmark = pytest.mark.fuzz


@pytest.fixture(scope="module")
def release() -> Iterator[Release]:
    with workspace() as ws:
        yield make_release(ws)


def _original(release: Release) -> str:
    return release.manifest.read_text(encoding="utf-8")


def check_manifest(release: Release, case: ManifestCase, fmt: str, steward: bool) -> None:
    with workspace() as ws:
        paths = release.copy_into(ws)
        manifest = ws.out / MANIFEST
        manifest.write_bytes(case.render(_original(release)))
        inputs: list[Path] = [paths["raw"], paths["extract"], manifest, ws.key]
        res = promise_run(ws, ["estimate", paths["extract"], "--format", fmt], inputs=inputs,
                          json_stdout=fmt == "json")
        note(f"estimate exit {res.returncode}")
        vfmt = "json" if fmt == "json" else "table"
        res = promise_run(ws, ["validate", paths["extract"], "--format", vfmt], inputs=inputs, check_codes=[1],
                          json_stdout=vfmt == "json")
        note(f"validate exit {res.returncode}")
        if steward:
            res = promise_run(ws, ["validate", paths["extract"], "--raw", paths["raw"], "--key", ws.key,
                                   "--format", vfmt], inputs=inputs, check_codes=[1], json_stdout=vfmt == "json")
            note(f"steward validate exit {res.returncode}")


@fuzz_settings(max_examples=80)
@given(data=st.data(), fmt=st.sampled_from(["table", "json", "csv"]), steward=st.integers(0, 2).map(lambda i: i == 0))
def test_estimate_and_validate_keep_the_promise_on_a_damaged_manifest(release: Release, data: st.DataObject,
                                                                      fmt: str, steward: bool) -> None:
    case = data.draw(manifest_cases(_original(release)), label="manifest")
    check_manifest(release, case, fmt, steward)
