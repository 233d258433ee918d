"""The README's examples run as written (those not marked as a sketch), so they cannot rot."""

import re
from pathlib import Path

import pytest

README = Path(__file__).resolve().parents[1] / "README.md"
BLOCKS = [b for b in re.findall(r"```python\n(.*?)```", README.read_text(), re.S) if not b.startswith("# sketch")]


@pytest.mark.parametrize("index", range(len(BLOCKS)))
def test_readme_example_runs(index, monkeypatch):
    pytest.importorskip("matplotlib")
    import matplotlib

    matplotlib.use("Agg")
    namespace: dict = {}
    # examples build on the ones before them, as a reader runs them in order
    for block in BLOCKS[: index + 1]:
        exec(compile(block, f"README.md python block {index}", "exec"), namespace)
    assert "blocksur" in namespace


def test_readme_has_runnable_examples():
    assert len(BLOCKS) >= 3  # quickstart, inference, tables
