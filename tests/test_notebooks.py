"""The demo notebooks of notebooks-demo/: each runs clean, fast, and is stored executed.

Outside references: nbclient executing every cell in a fresh Python kernel (an error in any
cell fails the test) and nbformat's schema validation of the stored files."""

from __future__ import annotations

import importlib.util
import pathlib
import time

import pytest

nbformat = pytest.importorskip("nbformat")
pytest.importorskip("nbclient")
pytest.importorskip("ipykernel")

FOLDER = pathlib.Path(__file__).resolve().parent.parent / "notebooks-demo"
NOTEBOOKS = sorted(p.name for p in FOLDER.glob("*.ipynb"))


def _builder():
    spec = importlib.util.spec_from_file_location("build_notebooks", FOLDER / "build_notebooks.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_the_three_scenarios_are_there():
    assert set(NOTEBOOKS) >= {"grid_load.ipynb", "budget_shares.ipynb", "many_equations.ipynb"}
    assert set(NOTEBOOKS) == set(_builder().NOTEBOOKS)


@pytest.mark.parametrize("name", NOTEBOOKS)
def test_stored_notebook_is_executed_and_current(name):
    nb = nbformat.read(FOLDER / name, as_version=4)
    nbformat.validate(nb)  # reference: nbformat's schema
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert code and all(c.execution_count for c in code), "store the notebook executed"
    assert not [o for c in code for o in c.outputs if o.output_type == "error"]
    # the stored cells are those the build script writes (regenerate with build_notebooks.py)
    fresh = _builder().build(name)
    assert [c.source for c in nb.cells] == [c.source for c in fresh.cells]
    assert (FOLDER / name).stat().st_size < 400_000
    text = " ".join(c.source for c in nb.cells if c.cell_type == "markdown")
    assert "not causal" in text.replace("\n", " ") or "associations, not" in text.replace("\n", " ")


@pytest.mark.parametrize("name", NOTEBOOKS)
def test_notebook_runs_clean(name, tmp_path):
    builder = _builder()
    nb = nbformat.read(FOLDER / name, as_version=4)
    t0 = time.perf_counter()
    builder.execute(nb, timeout=240, path=tmp_path)  # reference: nbclient raises on any cell error
    elapsed = time.perf_counter() - t0
    assert elapsed < 60, f"{name} took {elapsed:.0f} s; keep each notebook under a minute"
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    assert any("image/png" in o.get("data", {}) for o in outputs)
