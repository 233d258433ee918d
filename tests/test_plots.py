"""Plots of a fit (matplotlib, Agg backend).

Outside reference: what matplotlib itself holds after drawing (the image array of the heatmap,
the data of the error bars and lines, read back through matplotlib's artist API), compared with
the fit's numbers; and a PNG render through matplotlib's Agg canvas."""

from __future__ import annotations

import io

import numpy as np
import pytest

matplotlib = pytest.importorskip("matplotlib")
matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

import blocksur  # noqa: E402
from blocksur.scenarios import grid_load_table  # noqa: E402

DATA = grid_load_table(n_districts=4, n_days=400, seed=9)
SYSTEM = blocksur.EquationSystem.from_table(DATA.frame, DATA.equations)
ML = SYSTEM.fit("ifgls")
OLS = SYSTEM.fit("ols", omega="dof")


@pytest.fixture(autouse=True)
def _close():
    yield
    plt.close("all")


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=50)
    return buf.getvalue()


def test_resid_corr_heatmap_shows_the_matrix():
    fig = ML.plot_resid_corr()
    ax = fig.axes[0]
    img = ax.get_images()[0]
    # reference: matplotlib's own image array and colour limits
    np.testing.assert_allclose(np.asarray(img.get_array()), ML.resid_corr.to_numpy(), rtol=0, atol=0)
    assert img.get_clim() == (-1.0, 1.0)
    assert [t.get_text() for t in ax.get_yticklabels()] == ML.equation_names
    assert len(ax.texts) == ML.n_eq**2  # annotated for small N
    assert _png(fig).startswith(b"\x89PNG")


def test_coef_plot_by_regressor_draws_the_intervals():
    fig = ML.plot_coef(compare={"OLS": OLS}, rename=lambda eq, reg: reg.removesuffix("_" + eq))
    titles = [ax.get_title() for ax in fig.axes if ax.get_visible()]
    assert titles[:2] == ["Intercept", "C(day_type)[T.saturday]"] and "hdd" in titles
    ax = fig.axes[titles.index("hdd")]
    bars = ax.containers  # one ErrorbarContainer per fit: IFGLS first, then OLS
    assert len(bars) == 2
    for container, fit in zip(bars, (ML, OLS)):
        line, _, (segments,) = container
        x = np.asarray(line.get_xdata())
        names = [f"hdd_{eq}" for eq in fit.equation_names]
        expect = fit.coef.loc[list(zip(fit.equation_names, names))].to_numpy()
        np.testing.assert_allclose(x, expect, rtol=1e-12, atol=0)
        ci = fit.interval().loc[list(zip(fit.equation_names, names))].to_numpy()
        seg = np.array([s[:, 0] for s in segments.get_segments()])  # reference: the bar ends
        np.testing.assert_allclose(seg, ci, rtol=1e-12, atol=1e-12)
    assert [t.get_text() for t in fig.legends[0].get_texts()] == ["IFGLS", "OLS"]
    assert _png(fig).startswith(b"\x89PNG")


def test_coef_plot_by_equation_and_selection():
    fig = ML.plot_coef(by="equation", equations=["oldtown"], level=0.9)
    (ax,) = [a for a in fig.axes if a.get_visible()]
    assert ax.get_title() == "oldtown"
    labels = [t.get_text() for t in ax.get_yticklabels()]
    assert labels == list(ML.coef.loc["oldtown"].index)
    with pytest.raises(blocksur.InvalidOptionError, match="unknown equations"):
        ML.plot_coef(equations=["nowhere"])
    with pytest.raises(blocksur.InvalidOptionError, match="by must be"):
        ML.plot_coef(by="panel")


def test_convergence_plot_shows_the_path():
    fig = ML.plot_convergence()
    ax = fig.axes[0]
    path_line, tol_line = ax.get_lines()[:2]
    # reference: the line data matplotlib holds
    np.testing.assert_array_equal(path_line.get_ydata(), ML.criterion_path)
    np.testing.assert_array_equal(path_line.get_xdata(), np.arange(1, ML.n_iter + 1))
    assert tol_line.get_ydata()[0] == ML.tol
    assert ax.get_yscale() == "log"
    with pytest.raises(blocksur.InvalidOptionError, match="ifgls"):
        OLS.plot_convergence()


def test_plots_draw_into_given_axes():
    fig, (a, b) = plt.subplots(1, 2)
    assert ML.plot_resid_corr(ax=a) is fig
    assert ML.plot_convergence(ax=b) is fig
