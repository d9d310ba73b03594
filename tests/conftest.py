"""Shared fixtures: the command line (in this process through typer's CliRunner, or in a
real subprocess for the few tests that need one), a private folder per test, a secret key,
keyed PRF words for mechanism tests, and the test scenario (the invented staff survey of
the Alderbank Water Cooperative, a fictional organisation).

Every test gets its own steward-private folder through $LDPT_PRIVATE_DIR, so that no
test writes diagnostics into the real ~/.local/state.
"""

from __future__ import annotations

import contextlib
import copy
import hashlib
import os
import subprocess
import sys
import traceback
from pathlib import Path
from collections.abc import Callable, Iterator, Sequence
from typing import TYPE_CHECKING, Any

import pytest
import yaml

if TYPE_CHECKING:
    import numpy as np

    from ldptransform.mechanisms import Mechanism
    from ldptransform.policy import ResolvedColumn

REPO = Path(__file__).resolve().parent.parent
DEMO_CSV = REPO / "demo_data" / "staff_survey.csv"
DEMO_POLICY = REPO / "policies" / "staff_survey.yaml"

SITES = ["North Works", "Riverside", "Old Mill", "Harbour Lab", "Head Office"]
ROLES = ["Field crew", "Laboratory", "Engineering", "Administration", "Management"]

# The tests' own policy for the survey (independent of the shipped example, which may be
# retuned): every kind of column and of missing/unknown handling appears once.
SURVEY_POLICY: dict[str, Any] = {
    "budget": {"epsilon_per_row": 7.0},
    "unlisted": "error",
    "columns": {
        "staff_id": {"type": "drop"},
        "site": {"type": "categorical", "categories": list(SITES), "epsilon": 1.0, "unknown": "as-category"},
        "role": {"type": "categorical", "categories": list(ROLES), "epsilon": 1.0, "mechanism": "grr"},
        "pay": {"type": "numeric", "bounds": [24000, 140000], "epsilon": 1.0, "mechanism": "hybrid"},
        "weekly_hours": {"type": "numeric", "bounds": [0, 70], "epsilon": 1.0, "missing": {"fill": 37.5}},
        "tenure_years": {"type": "numeric", "bins": [0, 2, 5, 10, 20, 45], "epsilon": 1.0},
        "satisfaction": {"type": "categorical", "categories": [1, 2, 3, 4, 5], "epsilon": 1.0,
                         "missing": "as-category"},
        "would_recommend": {"type": "categorical", "categories": ["yes", "no"], "epsilon": 1.0,
                            "mechanism": "grr"},
        "survey_wave": {"type": "public"},
    },
}


def survey_policy() -> dict[str, Any]:
    """A fresh deep copy of the tests' survey policy, to modify."""
    return copy.deepcopy(SURVEY_POLICY)


def write_policy(path: Path, policy: dict[str, Any]) -> Path:
    path.write_text(yaml.safe_dump(policy, sort_keys=False), encoding="utf-8")
    return path


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def listing(folder: Path) -> list[str]:
    """Every entry of ``folder``, hidden ones included, sorted."""
    return sorted(os.listdir(folder))


def partials(folder: Path) -> list[str]:
    return [n for n in listing(folder) if ".ldpt-partial-" in n]


TEST_DEADLINE_SECONDS = 900  # no test may hang CI: past this, its worker prints every thread's stack and exits


@pytest.fixture(autouse=True)
def _deadline() -> Any:
    """A test still running after TEST_DEADLINE_SECONDS dumps the stacks of all its threads and
    ends its process (the run then reports that test as crashed instead of waiting forever)."""
    import faulthandler

    faulthandler.dump_traceback_later(TEST_DEADLINE_SECONDS, exit=True)
    yield
    faulthandler.cancel_dump_traceback_later()


def pytest_configure(config: pytest.Config) -> None:
    """Module- and session-scoped fixtures run before the per-test folder below is set: give the
    whole run (each xdist worker) a private folder of its own first, so that nothing a test does
    reaches the real ~/.local/state."""
    import tempfile

    os.environ["LDPT_PRIVATE_DIR"] = tempfile.mkdtemp(prefix="ldpt-test-private-")
    config._ldpt_private = os.environ["LDPT_PRIVATE_DIR"]  # type: ignore[attr-defined]


def pytest_unconfigure(config: pytest.Config) -> None:
    import shutil

    folder = getattr(config, "_ldpt_private", None)
    if folder:
        shutil.rmtree(folder, ignore_errors=True)


@contextlib.contextmanager
def module_private_dir(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """For a module-scoped fixture that releases (it runs before the per-test folder below is
    set): a steward-private folder of its own while the block runs, so that its nonce records
    and diagnostics stay apart from every other module's."""
    d = tmp_path_factory.mktemp("ldpt-private-module")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("LDPT_PRIVATE_DIR", str(d))
        yield d


@pytest.fixture(autouse=True)
def private_dir(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A fresh steward-private folder for this test, also for in-process calls."""
    d = tmp_path_factory.mktemp("ldpt-private")
    monkeypatch.setenv("LDPT_PRIVATE_DIR", str(d))
    return d


@pytest.fixture
def other_steward(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> Callable[[], Path]:
    """Switch to a fresh steward-private folder (its own nonce record, diagnostics, default
    ledger): for tests that re-run a release under the same key and nonce with another policy or
    other data on purpose (to compare the two), which one steward's state refuses."""
    def switch() -> Path:
        d = tmp_path_factory.mktemp("ldpt-private")
        monkeypatch.setenv("LDPT_PRIVATE_DIR", str(d))
        return d
    return switch


def cli_env(private: Path) -> dict[str, str]:
    env = os.environ.copy()
    env["LDPT_PRIVATE_DIR"] = str(private)
    env["NO_COLOR"] = "1"
    env.pop("FORCE_COLOR", None)
    return env


LdptRunner = Callable[..., subprocess.CompletedProcess]

# What ldptransform.cli.main() prints before the traceback of an internal error (exit 3).
INTERNAL_ERROR = "ldpt: internal error (a bug). Please report it with this traceback:\n"


def run_cli(*args: Any, private: Path, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """``ldpt ARGS...`` in this process through typer's CliRunner, as a CompletedProcess.

    Exit code, stdout and stderr are the ones ``ldpt`` gives as a program: an exception that
    escapes the command (a bug) becomes exit 3 with main()'s message and the traceback on
    stderr, as ldptransform.cli.main() does, so "exit 2, no traceback" keeps its meaning.
    Stdin is empty, stdout and stderr are not terminals (as in the subprocess runs)."""
    from typer.testing import CliRunner

    from ldptransform.cli import app

    argv = [str(a) for a in args]
    env = {"LDPT_PRIVATE_DIR": str(private), "NO_COLOR": "1", "FORCE_COLOR": None}
    here = os.getcwd()
    if cwd is not None:
        os.chdir(cwd)
    try:
        res = CliRunner().invoke(app, argv, env=env, prog_name="ldpt", catch_exceptions=True)
    finally:
        os.chdir(here)
    code, err = res.exit_code, res.stderr
    if res.exception is not None and not isinstance(res.exception, SystemExit):
        code = 3
        err += INTERNAL_ERROR + "".join(traceback.format_exception(res.exception))
    return subprocess.CompletedProcess(["ldpt", *argv], code, res.stdout, err)


def run_process(*args: Any, private: Path, cwd: Path | None = None,
                timeout: float = 180) -> subprocess.CompletedProcess:
    """``python -m ldptransform ARGS...`` in a real subprocess (text, stdin closed)."""
    return subprocess.run([sys.executable, "-m", "ldptransform", *map(str, args)], cwd=cwd,
                          env=cli_env(private), capture_output=True, text=True, timeout=timeout,
                          stdin=subprocess.DEVNULL)


@pytest.fixture
def ldpt(private_dir: Path) -> LdptRunner:
    """Run ``ldpt ARGS...`` in this process (CliRunner); returns a CompletedProcess (text).
    Tests that need a real process (signals, a terminal, the dask cluster) use ``ldpt_process``."""

    def run(*args: Any, cwd: Path | None = None) -> subprocess.CompletedProcess:
        return run_cli(*args, private=private_dir, cwd=cwd)

    return run


@pytest.fixture
def ldpt_process(private_dir: Path) -> LdptRunner:
    """Run ``python -m ldptransform ARGS...`` in a subprocess; returns the CompletedProcess (text)."""

    def run(*args: Any, cwd: Path | None = None, timeout: float = 180) -> subprocess.CompletedProcess:
        return run_process(*args, private=private_dir, cwd=cwd, timeout=timeout)

    return run


FIXED_KEY_BYTES = bytes(range(200, 232))  # tests use a fixed key so statistical checks cannot flake
FIXED_NONCE = "a1b2c3d4e5f60718293a4b5c6d7e8f90"


def write_fixed_key(path: Path) -> Path:
    """A key file with fixed material, written as `ldpt key new` writes one (mode 0600)."""
    import os

    from ldptransform.keys import KEY_HEADER

    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "w", encoding="ascii") as f:
        f.write(f"{KEY_HEADER}\n{FIXED_KEY_BYTES.hex()}\n")
    return path


def keyed_words(label: str, n: int, per_row: int, start: int = 0, *, key: Any = FIXED_KEY_BYTES,
                nonce: str = FIXED_NONCE, stream: str = "test") -> np.ndarray:
    """PRF words for a mechanism test: rows ``start .. start + n - 1`` of the row-addressed
    keyed stream (key, nonce, stream, label), ``per_row`` 64-bit words each, an (n, per_row)
    uint64 array.  ``key`` is a SecretKey or its 32 bytes.  Test files bind their own key,
    nonce and stream name once (functools.partial), so each file keeps its own fixed words."""
    from ldptransform.keys import SecretKey
    from ldptransform.random import KeyedStream

    if isinstance(key, (bytes, bytearray)):
        key = SecretKey(bytes(key))
    return KeyedStream(key, nonce, stream, label).words(start, n, per_row)


def assert_close_nested(a: Any, b: Any, path: str = "") -> None:
    """Two results (dicts, lists, numbers) equal up to floating-point rounding of sums taken in
    another order (relative 1e-9): what two engines adding the same parts give."""
    if isinstance(a, dict):
        assert a.keys() == b.keys(), path
        for k in a:
            assert_close_nested(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            assert_close_nested(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert b == pytest.approx(a, rel=1e-9, abs=1e-12), path
    else:
        assert a == b, path


def extract_order(key: Any, nonce: str, n: int) -> Any:
    """The steward's view of a shuffled extract (policy output.row_order: shuffled): row j of the
    extract is input row ``extract_order(...)[j]`` (the input rows sorted by their keyed tags)."""
    from ldptransform.release.shuffle import row_tags, tag_stream

    import numpy as np

    return np.argsort(row_tags(tag_stream(key, nonce), 0, n), kind="stable")


def mechanism_of(rc: ResolvedColumn) -> Mechanism:
    """The mechanism of a privatized column of a resolved policy (the test fails if it has none)."""
    assert rc.mechanism is not None, f"column {rc.name} is not privatized"
    return rc.mechanism


@pytest.fixture(scope="session")
def key_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One secret key (mode 0600, fixed material) shared by the tests that do not care which key."""
    return write_fixed_key(tmp_path_factory.mktemp("keys") / "release.key")


@pytest.fixture(scope="session")
def key_hex(key_file: Path) -> str:
    """The key's material as written in the file: must never appear in any output."""
    return key_file.read_text(encoding="ascii").split()[-1]


@pytest.fixture
def survey(tmp_path: Path, key_file: Path) -> dict[str, Path]:
    """A work folder with the survey data (a copy of demo_data/staff_survey.csv), the tests'
    policy as YAML, and the key.  Returns {"dir", "csv", "policy", "key"}."""
    work = tmp_path / "work"
    work.mkdir()
    csv = work / "staff_survey.csv"
    csv.write_bytes(DEMO_CSV.read_bytes())
    policy = write_policy(work / "survey_policy.yaml", survey_policy())
    return {"dir": work, "csv": csv, "policy": policy, "key": key_file}


def realized_channel(randomize_index, xs: np.ndarray, M: int) -> np.ndarray:
    """P(output j | grid input i) as a sampler actually realizes it, found by bisection over
    the PRF word that drives its second stage: for every (grid input x_i, output j) the
    smallest 53-bit word prefix whose output index is >= j.  It assumes (as random.variates.to_unit
    does) that the sampler reads at most the top 53 bits of each word, and that ``xs`` are
    exact grid points so the first (rounding) stage lands on row i with certainty."""
    import numpy as np

    R = len(xs)
    rows = np.repeat(np.arange(R), M)
    js = np.tile(np.arange(M), R)
    x = np.asarray(xs)[rows]
    lo = np.zeros(R * M, dtype=np.int64)
    hi = np.full(R * M, 1 << 53, dtype=np.int64)
    words = np.zeros((R * M, 2), dtype=np.uint64)
    while (lo < hi).any():
        mid = (lo + hi) // 2
        words[:, 1] = mid.astype(np.uint64) << np.uint64(11)
        ge = randomize_index(x, words) >= js
        hi = np.where(ge, mid, hi)
        lo = np.where(ge, lo, np.minimum(mid + 1, hi))
    first = lo.reshape(R, M)
    nxt = np.concatenate([first[:, 1:], np.full((R, 1), 1 << 53)], axis=1)
    return (nxt - first) / float(1 << 53)


def assert_user_error(res: subprocess.CompletedProcess, names: list[str], forbidden: Sequence[str] = (),
                      code: int = 2) -> str:
    """Exit ``code`` (2: bad input; 4 refused for privacy, 5 output exists, 6 environment:
    errors.ExitCode), one paragraph on stderr naming every item of ``names``, no traceback, and
    none of ``forbidden`` (raw values, key material) anywhere in the output."""
    err = res.stderr
    assert res.returncode == code, f"exit {res.returncode}, stderr:\n{err}"
    assert "Traceback" not in err and "Traceback" not in res.stdout
    text = err.strip()
    assert text, "no message on stderr"
    assert "\n\n" not in text, f"more than one paragraph:\n{err}"
    assert text.startswith("Error:"), err
    for name in names:
        assert name in text, f"the message does not name {name!r}:\n{err}"
    for value in forbidden:
        assert value not in err and value not in res.stdout, f"the output echoes {value!r}:\n{err}"
    return text


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Long studies (marked slow) first: the test workers start them at once and share the
    rest of the suite while they run, so the longest test does not come last and stretch the
    run.  Order within each group is kept (every test is independent of order)."""
    items.sort(key=lambda item: item.get_closest_marker("slow") is None)


def assert_policy_refused(ldpt: Any, tmp_path: Path, private_dir: Path, policy: dict[str, Any], raw: Any,
                          names: list[str]) -> None:
    """``ldpt privatize`` under a bad ``policy`` (a dict) on the table ``raw`` (a DataFrame): exit 2
    with one paragraph naming ``names``, and nothing written, neither beside the policy nor in the
    private folder."""
    work = tmp_path / "work"
    work.mkdir()
    raw_path = tmp_path / "people.csv"
    raw.to_csv(raw_path, index=False)
    pol = write_policy(work / "bad_policy.yaml", policy)
    key = write_fixed_key(tmp_path / "release.key")
    before = listing(work)
    res = ldpt("privatize", raw_path, "--policy", pol, "--key", key, "--out", work / "extract.parquet")
    assert_user_error(res, names)
    assert listing(work) == before and partials(work) == [] and listing(private_dir) == []
