"""The promise every command keeps, whatever its input, as one assertion for the fuzz suite.

For any input a command either succeeds (exit 0; `validate` and `ledger verify` may also exit 1,
a check that ran and failed) or stops with exit 2 and one paragraph on stderr that starts with
"Error:"; never a traceback, never the internal-error text, never exit 3. A failed run leaves
nothing new anywhere in its workspace (no extract, manifest, estimates, partial or lock file,
nothing in the steward-private folder), and no run changes an input (raw data, policy, key,
ledger, extract, manifest) by a single byte. A successful run adds only the files it names.

Each example gets a workspace of its own (a fresh temporary folder with ``in/``, ``out/`` and a
private folder of mode 0700), so examples cannot see each other's nonce records or ledgers.

The generators leave out, behind the flags below, the classes of input that still fail while
they are being fixed: each flag names its class; set it to True to fuzz that class again.  Every
failing example found is kept, with the smallest input hypothesis found, in
test_fuzz_regressions.py.
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, Phase, event, settings
from hypothesis.control import currently_in_test_context

TESTS = Path(__file__).resolve().parent.parent
if str(TESTS) not in sys.path:  # conftest.py of tests/ holds the CLI runner and the key writer
    sys.path.insert(0, str(TESTS))

from conftest import run_cli, run_process, write_fixed_key  # noqa: E402

# Deterministic and bounded: the same examples on every run, no example database, no deadline
# per example (a whole property is bounded by its max_examples instead).
# LDPT_FUZZ_SCALE=k multiplies every property's number of examples (a longer local hunt);
# LDPT_FUZZ_NO_SHRINK=1 reports a failing example as found, without minimizing it (faster);
# LDPT_FUZZ_RANDOM=1 draws fresh examples on every run (a hunt; CI keeps the fixed ones).
RANDOM = bool(os.environ.get("LDPT_FUZZ_RANDOM"))
SCALE = max(1, int(os.environ.get("LDPT_FUZZ_SCALE", "1")))
PHASES = [Phase.explicit, Phase.reuse, Phase.generate] + ([] if os.environ.get("LDPT_FUZZ_NO_SHRINK")
                                                          else [Phase.shrink])


def fuzz_settings(max_examples: int) -> settings:
    return settings(derandomize=not RANDOM, max_examples=max_examples * SCALE, deadline=None, database=None,
                    phases=PHASES,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.filter_too_much, HealthCheck.large_base_example],
                    print_blob=False)


def note(what: str) -> None:
    """A hypothesis event (the statistics of ``--hypothesis-show-statistics``), also callable
    from the plain regression tests, where it does nothing."""
    if currently_in_test_context():
        event(what)


# Output that attacks its reader (issue 15), checked on every run; False leaves a check out while
# its class is being fixed.
CHECK_TERMINAL_ESCAPES = True   # no raw control character (ESC, BEL, NUL, ...) in stdout or stderr
CHECK_CSV_FORMULAS = True       # no CSV cell that a spreadsheet would run as a formula
CHECK_CSV_CONTROLS = True       # the terminal check also on CSV written to stdout (estimate --format csv)
CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]")  # C0 and C1 controls but tab and newline
FORMULA_START = tuple("=+-@\t\r")


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def assert_output_safe(res: subprocess.CompletedProcess, shown: str, csv_stdout: bool) -> None:
    if CHECK_TERMINAL_ESCAPES:
        streams = [("stderr", res.stderr)] + ([("stdout", res.stdout)] if CHECK_CSV_CONTROLS or not csv_stdout else [])
        for name, text in streams:
            m = CONTROL.search(text.replace("\r\n", "\n"))
            assert m is None, f"a raw control character {m.group()!r} in {name}:\n{shown}"
    if CHECK_CSV_FORMULAS and csv_stdout and res.returncode == 0:
        for row in csv.reader(io.StringIO(res.stdout)):
            bad = [c for c in row if c.startswith(FORMULA_START) and not _is_number(c)]
            assert not bad, f"CSV cells a spreadsheet runs as formulas: {bad}:\n{shown}"


# What the CLI prints before a traceback (the in-process runner adds it for an escaped exception).
FORBIDDEN_TEXT = ("Traceback", "internal error")
PARTIAL_MARK = ".ldpt-partial-"
LOCK_MARK = ".ldpt-lock"


@dataclass
class Workspace:
    """A fresh folder per example: ``inp`` for the inputs, ``out`` for the destinations, ``priv``
    (mode 0700) as $LDPT_PRIVATE_DIR, and the key."""

    root: Path
    inp: Path = field(init=False)
    out: Path = field(init=False)
    priv: Path = field(init=False)
    key: Path = field(init=False)

    def __post_init__(self) -> None:
        self.inp = self.root / "in"
        self.out = self.root / "out"
        self.priv = self.root / "private"
        self.inp.mkdir()
        self.out.mkdir()
        self.priv.mkdir(mode=0o700)
        self.key = write_fixed_key(self.inp / "release.key")

    def tree(self) -> set[str]:
        """Every path under the workspace (hidden ones included), relative to it."""
        found: set[str] = set()
        for dirpath, dirnames, filenames in os.walk(self.root):
            rel = Path(dirpath).relative_to(self.root)
            for n in dirnames + filenames:
                found.add(str(rel / n))
        return found

    def hashes(self, paths: Iterable[Path]) -> dict[Path, str | None]:
        return {p: _digest(p) for p in paths}


def _digest(p: Path) -> str | None:
    if p.is_dir():
        h = hashlib.sha256()
        for q in sorted(p.rglob("*")):
            if q.is_file():
                h.update(str(q.relative_to(p)).encode() + b"\0" + q.read_bytes())
        return h.hexdigest()
    return hashlib.sha256(p.read_bytes()).hexdigest() if p.exists() else None


@contextlib.contextmanager
def workspace() -> Iterator[Workspace]:
    root = Path(tempfile.mkdtemp(prefix="ldpt-fuzz-"))
    try:
        yield Workspace(root)
    finally:
        shutil.rmtree(root, ignore_errors=True)


def run(ws: Workspace, *args: Any) -> subprocess.CompletedProcess:
    """``ldpt ARGS...`` in this process, with the workspace's private folder."""
    return run_cli(*args, private=ws.priv)


def run_real(ws: Workspace, *args: Any) -> subprocess.CompletedProcess:
    """``python -m ldptransform ARGS...`` in a real process, with the workspace's private folder."""
    return run_process(*args, private=ws.priv, timeout=120)


def _show(res: subprocess.CompletedProcess) -> str:
    return (f"`ldpt {' '.join(map(str, res.args[1:]))}` exit {res.returncode}\n--- stderr:\n{res.stderr[-3000:]}"
            f"\n--- stdout:\n{res.stdout[-1500:]}")


def assert_promise(ws: Workspace, res: subprocess.CompletedProcess, *, before: set[str],
                   inputs: dict[Path, str | None], check_codes: Sequence[int] = (),
                   may_add: Sequence[Path] = (), may_change: Sequence[Path] = (),
                   json_stdout: bool = False, csv_stdout: bool = False, tolerate: Sequence[Path] = ()) -> None:
    """The promise (module docstring) for one run: ``before`` is ``ws.tree()`` and ``inputs`` the
    hashes of the inputs, both taken just before the run; ``check_codes`` the exit codes of a
    check that ran and failed (validate, ledger verify: 1); ``may_add`` the files (or folders) a
    successful run writes; ``may_change`` inputs a successful run may update (a ledger it
    charges).  ``json_stdout``: stdout of a run that did not stop with an error is strict JSON;
    ``csv_stdout``: stdout is CSV (no cell may start a formula).  No output holds a raw control
    character.
    ``tolerate``: files a failed run may leave behind while that known failure is being fixed
    (each caller names the class behind a flag)."""
    code, err = res.returncode, res.stderr
    shown = _show(res)
    assert code != 3, "internal error:\n" + shown
    for text in FORBIDDEN_TEXT:
        assert text not in err and text not in res.stdout, f"{text!r} in the output:\n{shown}"
    assert code in (0, 2, *check_codes), f"unexpected exit code:\n{shown}"
    assert_output_safe(res, shown, csv_stdout)
    after = ws.tree()
    leftovers = [p for p in after if PARTIAL_MARK in p or LOCK_MARK in p]
    assert not leftovers, f"left behind {leftovers}:\n{shown}"
    if code == 2:
        text = err.strip()
        assert text, f"no message on stderr:\n{shown}"
        assert "\n\n" not in text, f"more than one paragraph:\n{shown}"
        assert text.startswith("Error:"), f"the message does not start with 'Error:':\n{shown}"
        after -= {str(Path(p).relative_to(ws.root)) for p in tolerate}
        changed = f"left {sorted(after - before)}, removed {sorted(before - after)}"
        assert after == before, f"a failed run {changed}:\n{shown}"
        changeable: set[Path] = set()
    else:
        allowed = {str(Path(p).relative_to(ws.root)) for p in may_add}
        new = after - before
        stray = {p for p in new if not any(p == a or p.startswith(a + os.sep) for a in allowed)
                 and not p.startswith(str(ws.priv.relative_to(ws.root)) + os.sep)}
        if code == 0 and may_add:  # the private folder takes a successful release's diagnostics
            assert stray == set(), f"a successful run wrote {sorted(stray)} besides its outputs:\n{shown}"
        else:
            assert new == set(), f"the run wrote {sorted(new)}:\n{shown}"
        assert before - after == set(), f"the run removed {sorted(before - after)}:\n{shown}"
        changeable = set(may_change) if code == 0 else set()
        if json_stdout:
            assert_strict_json(res.stdout, shown)
    for p, h in inputs.items():
        if p not in changeable:
            assert _digest(p) == h, f"the input {p.name} changed:\n{shown}"


def _no_constant(name: str) -> Any:
    raise ValueError(f"non-standard JSON constant {name}")


def assert_strict_json(text: str, shown: str = "") -> None:
    try:
        json.loads(text, parse_constant=_no_constant)
    except ValueError as err:
        raise AssertionError(f"stdout is not strict JSON ({err}):\n{shown}") from None


def promise_run(ws: Workspace, args: Sequence[Any], *, inputs: Sequence[Path], check_codes: Sequence[int] = (),
                may_add: Sequence[Path] = (), may_change: Sequence[Path] = (),
                json_stdout: bool = False, csv_stdout: bool = False,
                tolerate: Sequence[Path] = (), real_process: bool = False) -> subprocess.CompletedProcess:
    """Run ``ldpt ARGS`` in ``ws`` (in this process, or with ``real_process`` as a program) and
    assert the promise; returns the run."""
    before = ws.tree()
    hashes = ws.hashes(inputs)
    res = (run_real if real_process else run)(ws, *args)
    assert_promise(ws, res, before=before, inputs=hashes, check_codes=check_codes, may_add=may_add,
                   may_change=may_change, json_stdout=json_stdout, csv_stdout=csv_stdout, tolerate=tolerate)
    return res
