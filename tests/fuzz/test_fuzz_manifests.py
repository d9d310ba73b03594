"""The promise (tests/fuzz/fuzz_promise.py) for `estimate` and `validate` (partner and steward
side) on a valid release whose manifest was damaged (tests/fuzz/fuzz_release.py): a field
removed, its type or value changed, junk nested in it, a key twice, the file cut short, not
UTF-8, empty."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fuzz_promise import assert_strict_json, fuzz_settings, note, promise_run, workspace
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
                          json_stdout=fmt == "json", csv_stdout=fmt == "csv")
        note(f"estimate exit {res.returncode}")
        vfmt = "json" if fmt == "json" else "table"
        res = promise_run(ws, ["validate", paths["extract"], "--format", vfmt], inputs=inputs, check_codes=[1],
                          json_stdout=vfmt == "json")
        note(f"validate exit {res.returncode}")
        if steward:
            res = promise_run(ws, ["validate", paths["extract"], "--raw", paths["raw"], "--key", ws.key,
                                   "--format", vfmt], inputs=inputs, check_codes=[1], json_stdout=vfmt == "json")
            note(f"steward validate exit {res.returncode}")


@fuzz_settings(max_examples=100)
@given(data=st.data(), fmt=st.sampled_from(["table", "json", "csv"]), steward=st.integers(0, 2).map(lambda i: i == 0))
def test_estimate_and_validate_keep_the_promise_on_a_damaged_manifest(release: Release, data: st.DataObject,
                                                                      fmt: str, steward: bool) -> None:
    case = data.draw(manifest_cases(_original(release)), label="manifest")
    check_manifest(release, case, fmt, steward)


# -- estimate's own options on the valid release -------------------------------------------------

# mostly what a partner would give, now and then something odd
COLUMNS = ["cat", "num", "hours", "binned"] * 4 + ["pub", "sid", "", "nope", "cat:num", "\x1b[2J", "é"]
_VALUE = st.one_of(st.floats(0, 60).map(repr), st.integers(0, 60).map(str))
NUMBER_TEXT = st.one_of(_VALUE, _VALUE, _VALUE, st.floats(-1e300, 1e300).map(repr),
                        st.sampled_from(["inf", "-inf", "nan", "1e400", "", "x", "0x10", "1,5", " 3 ", "-0"]))


@st.composite
def estimate_options(draw: st.DrawFn, ws_out: Path, extract: Path, manifest: Path) -> list[str]:
    args: list[str] = []
    for _ in range(draw(st.sampled_from([0, 0, 1, 1, 2]))):
        args += ["--range", f"{draw(st.sampled_from(COLUMNS))}:{draw(NUMBER_TEXT)}..{draw(NUMBER_TEXT)}"]
    if draw(st.booleans()):
        qs = draw(st.lists(st.one_of(st.floats(0, 1).map(repr), st.floats(0, 1).map(repr), NUMBER_TEXT), max_size=3))
        args += ["--quantiles", ",".join(qs)]
    for flag in ("--crosstab", "--mean-by"):
        if draw(st.integers(0, 2)) == 0:
            args += [flag, f"{draw(st.sampled_from(COLUMNS))}:{draw(st.sampled_from(COLUMNS))}"]
    if draw(st.integers(0, 2)) == 0:
        args += ["--confidence", draw(st.one_of(st.floats(0.5, 0.999).map(repr), NUMBER_TEXT))]
    if draw(st.integers(0, 3)) == 0:
        args += ["--consistency", draw(st.sampled_from(["norm-sub", "norm-mul", "norm", "none", ""]))]
    if draw(st.integers(0, 2)) == 0:  # --out: a new file, or one of the files it reads (refused)
        target = draw(st.sampled_from([ws_out / "estimates.txt", extract, manifest, ws_out]))
        args += ["--out", str(target)] + (["--overwrite"] if draw(st.booleans()) else [])
    return args


@fuzz_settings(max_examples=80)
@given(data=st.data(), fmt=st.sampled_from(["table", "json", "csv"]))
def test_estimate_options_keep_the_promise(release: Release, data: st.DataObject, fmt: str) -> None:
    with workspace() as ws:
        paths = release.copy_into(ws)
        manifest = ws.out / MANIFEST
        shutil.copyfile(release.manifest, manifest)
        opts = data.draw(estimate_options(ws.out, paths["extract"], manifest), label="options")
        to_stdout = "--out" not in opts
        res = promise_run(ws, ["estimate", paths["extract"], "--format", fmt, *opts],
                          inputs=[paths["extract"], manifest], may_add=[ws.out / "estimates.txt"],
                          json_stdout=fmt == "json" and to_stdout, csv_stdout=fmt == "csv" and to_stdout)
        note(f"estimate exit {res.returncode}")
        if res.returncode == 0 and not to_stdout and fmt == "json":
            assert_strict_json((ws.out / "estimates.txt").read_text(encoding="utf-8"))
