"""Nothing crosses the FFI as a panic: hostile calls straight into blocksur._core.

The calls (tests/attack_ffi_cases.py: wrong shapes, int / object / complex / 3-D arrays,
mismatched list lengths, empty lists, None, out-of-range options, summaries of other systems)
run in a child interpreter, so a crash (abort, segfault) cannot take pytest down; each crash is
located from the child's last START line, and the child is restarted from the next call.

Expected: every call marked "raise" raises an ordinary Python exception (TypeError, ValueError,
OverflowError, or a blocksur error); no call raises pyo3_runtime.PanicException; the child
never dies.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys

import pytest

import blocksur
from attack_support import ROOT

HERE = os.path.dirname(os.path.abspath(__file__))
SCRIPT = os.path.join(HERE, "attack_ffi_cases.py")

ACCEPTED = {
    "builtins.TypeError",
    "builtins.ValueError",
    "builtins.OverflowError",
    "builtins.IndexError",  # only from Python-level sequence handling, never from Rust
}

pytestmark = pytest.mark.timeout(600, method="thread")


def _is_blocksur(kind: str) -> bool:
    if not kind.startswith("blocksur.errors."):
        return False
    cls = getattr(blocksur.errors, kind.rsplit(".", 1)[1], None)
    return isinstance(cls, type) and issubclass(cls, blocksur.BlocksurError)


def _run_all():
    """Runs every case, restarting after a crash. Returns {name: (outcome, kind)} and crashes."""
    sys.path.insert(0, HERE)
    import attack_ffi_cases

    expect = {name: exp for name, (_, exp) in attack_ffi_cases.CASES.items()}
    results, crashes = {}, []
    first = 0
    env = dict(os.environ, RUST_BACKTRACE="0", PYTHONPATH=HERE)
    while first < len(expect):
        proc = subprocess.run(
            [sys.executable, SCRIPT, str(first)], capture_output=True, text=True, timeout=300, env=env, cwd=ROOT
        )
        last_start = None
        for line in proc.stdout.splitlines():
            if line.startswith("START "):
                last_start = int(line.split(" ", 2)[1])
            elif line.startswith("RESULT "):
                head, outcome, kind = line.split("\t")
                name = head.split(" ", 2)[2]
                results[name] = (outcome, kind)
                last_start = None
        if proc.returncode == 0 and "DONE" in proc.stdout:
            break
        if last_start is None:
            raise AssertionError(f"the case runner failed outside any case (rc {proc.returncode}):\n{proc.stderr[-3000:]}")
        name = list(expect)[last_start]
        crashes.append((name, proc.returncode, proc.stderr[-1500:]))
        first = last_start + 1
    return expect, results, crashes


_CACHE: dict = {}


def _outcomes():
    if not _CACHE:
        _CACHE["run"] = _run_all()
    return _CACHE["run"]


def test_no_call_into_the_extension_panics_or_crashes():
    """Every hostile call returns or raises an ordinary exception; none panics or kills the
    interpreter."""
    expect, results, crashes = _outcomes()
    problems = []
    for name, rc, _err in crashes:
        how = f"killed by signal {signal.Signals(-rc).name}" if rc < 0 else f"exit status {rc}"
        problems.append(f"CRASH ({how}) in {name!r}")
    for name, (outcome, kind) in results.items():
        if kind == "pyo3_runtime.PanicException":
            problems.append(f"PANIC in {name!r}")
        elif outcome == "raised" and kind not in ACCEPTED and not _is_blocksur(kind):
            problems.append(f"unexpected exception {kind} in {name!r}")
    print(f"{len(expect)} hostile calls into blocksur._core; {len(problems)} panics/crashes")
    assert len(results) + len(crashes) == len(expect)
    assert not problems, "\n".join(problems)


def test_inconsistent_input_is_refused():
    """Calls whose arguments contradict each other (data of another shape than the prepared
    system, NaN where the core does not check, summaries of different sizes) must raise, not
    return numbers computed from a mismatch."""
    expect, results, _ = _outcomes()
    silent = [name for name, (outcome, _) in results.items() if outcome == "ok" and expect[name] == "raise"]
    assert not silent, "accepted without an error:\n" + "\n".join(silent)
