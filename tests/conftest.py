"""Minimal shared setup: makes tests/reference.py importable and prints the
measured agreement of every outside-reference check at the end of the run."""

import os
import sys

sys.path.insert(0, os.path.dirname(__file__))

import reference  # noqa: E402


def pytest_terminal_summary(terminalreporter):
    if not reference.AGREEMENT:
        return
    terminalreporter.section("blocksur: measured agreement with outside references")
    width = max(len(k) for k in reference.AGREEMENT)
    for key in sorted(reference.AGREEMENT):
        terminalreporter.write_line(f"{key:<{width}}  {reference.AGREEMENT[key]:.3e}")
