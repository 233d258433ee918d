"""Minimal shared setup: makes tests/reference.py importable and prints the
measured agreement of every outside-reference check at the end of the run."""

import os
import sys

sys.path.insert(0, os.path.dirname(__file__))

import reference  # noqa: E402


def pytest_terminal_summary(terminalreporter):
    # which blocksur the run tested: ./run.sh and CI install the wheel into .venv (never python/)
    import blocksur

    terminalreporter.write_line(f"blocksur under test: {blocksur.__file__} ({blocksur.build_info()['backend']} backend)")
    if not reference.AGREEMENT:
        return
    terminalreporter.section("blocksur: measured agreement with outside references")
    width = max(len(k) for k in reference.AGREEMENT)
    for key in sorted(reference.AGREEMENT):
        terminalreporter.write_line(f"{key:<{width}}  {reference.AGREEMENT[key]:.3e}")


import pytest  # noqa: E402

# Two-step FGLS has two routes: the full preparation (the P x P Gram matrix, kept for later
# fits) and, on large systems, one pass over the data without it. Tests that take the `route`
# fixture run through both (the one-pass route forced by lowering its size threshold).
ROUTES = ["gram", "one-pass"]


@pytest.fixture(params=ROUTES)
def route(request, monkeypatch):
    import blocksur._system as system

    monkeypatch.setattr(system, "_DIRECT_FGLS_MIN_K", 0 if request.param == "one-pass" else 10**12)
    return request.param
