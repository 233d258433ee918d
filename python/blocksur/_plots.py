"""Pictures of a fit (matplotlib, imported only when a plot is asked for).

Each function returns the matplotlib Figure; pass ``ax=`` to draw into an existing Axes.

Example
-------
>>> import matplotlib; matplotlib.use("Agg")
>>> import blocksur
>>> from blocksur.scenarios import random_system
>>> fit = blocksur.EquationSystem(random_system(3, 80, seed=2).equations).fit("ifgls")
>>> fig = fit.plot_resid_corr()
>>> fig.axes[0].get_title()
'Residual correlations across equations'
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from .errors import InvalidOptionError, MissingDependencyError

if TYPE_CHECKING:  # pragma: no cover
    from ._fit import FittedSystem

__all__ = ["plot_resid_corr", "plot_coef", "plot_convergence"]


def _plt() -> Any:
    try:
        import matplotlib.pyplot as plt
    except ImportError:  # pragma: no cover - exercised only without matplotlib
        raise MissingDependencyError(
            "plots need matplotlib, an optional dependency: pip install matplotlib", package="matplotlib"
        ) from None
    return plt


def _figure(ax: Any, size: tuple[float, float]) -> tuple[Any, Any]:
    if ax is not None:
        return ax.figure, ax
    plt = _plt()
    fig, ax = plt.subplots(figsize=size, layout="constrained")
    return fig, ax


def plot_resid_corr(fit: "FittedSystem", ax: Any = None, annotate: bool | None = None,
                    equations: Sequence[str] | None = None, cmap: str = "RdBu_r") -> Any:
    """Heatmap of the residual correlation matrix, colours from -1 to 1; values written in the
    cells when ``annotate`` (default: N <= 12); labels dropped beyond 40 equations.
    ``equations`` draws only those equations (for large systems)."""
    corr = fit.resid_corr
    if equations is not None:
        unknown = [e for e in equations if e not in corr.index]
        if unknown:
            raise InvalidOptionError(f"unknown equations {unknown[:5]}")
        corr = corr.loc[list(equations), list(equations)]
    r = corr.to_numpy()
    n = r.shape[0]
    side = min(3.0 + 0.45 * n, 8.0)
    fig, ax = _figure(ax, (side + 1.2, side))
    im = ax.imshow(r, vmin=-1.0, vmax=1.0, cmap=cmap, interpolation="nearest")
    names = list(corr.index)
    if n <= 40:
        ax.set_xticks(range(n), names, rotation=45, ha="right", rotation_mode="anchor")
        ax.set_yticks(range(n), names)
    else:
        ax.set_xlabel("equation")
        ax.set_ylabel("equation")
    if annotate is None:
        annotate = n <= 12
    if annotate:
        for i in range(n):
            for j in range(n):
                ax.text(j, i, f"{r[i, j]:.2f}", ha="center", va="center", fontsize=8,
                        color="white" if abs(r[i, j]) > 0.6 else "black")
    fig.colorbar(im, ax=ax, shrink=0.8, label="correlation")
    ax.set_title("Residual correlations across equations")
    return fig


def plot_coef(
    fit: "FittedSystem",
    by: str = "regressor",
    *,
    regressors: Sequence[str] | None = None,
    equations: Sequence[str] | None = None,
    level: float = 0.95,
    compare: Mapping[str, "FittedSystem"] | None = None,
    ncols: int = 3,
    rename: Callable[[str, str], str] | None = None,
    label: str | None = None,
) -> Any:
    """Point estimates with ``level`` intervals as horizontal bars.

    ``by="regressor"``: one panel per regressor, one row per equation that has it;
    ``by="equation"``: one panel per equation, one row per regressor. ``regressors`` and
    ``equations`` select what is drawn. ``compare`` maps a label to other fits of the same
    system, drawn beside this one (this fit is labelled ``label``, default its method).
    ``rename(equation, regressor)`` gives the panel key for ``by="regressor"``, to put
    together regressors that are named after their equation (``hdd_north``, ``hdd_south``).
    """
    if by not in ("regressor", "equation"):
        raise InvalidOptionError(f"by must be 'regressor' or 'equation', got {by!r}")
    fits = {label or fit.method.upper(): fit}
    for k, other in (compare or {}).items():
        fits[str(k)] = other
    tables = {}
    for k, f in fits.items():
        t = f.coef_table(level).reset_index()
        t["key"] = [rename(e, r) if rename else r for e, r in zip(t["equation"], t["regressor"])]
        tables[k] = t
    base = tables[next(iter(tables))]
    if equations is not None:
        unknown = [e for e in equations if e not in set(base["equation"])]
        if unknown:
            raise InvalidOptionError(f"unknown equations {unknown}; the fit has {fit.equation_names[:10]}...")
        base = base[base["equation"].isin(list(equations))]
    if regressors is not None:
        unknown = [r for r in regressors if r not in set(base["key"])]
        if unknown:
            raise InvalidOptionError(f"unknown regressors {unknown}")
        base = base[base["key"].isin(list(regressors))]
    if base.empty:
        raise InvalidOptionError("nothing to plot: the selection is empty")
    panel_col, row_col = ("key", "equation") if by == "regressor" else ("equation", "regressor")
    panels = list(dict.fromkeys(base[panel_col]))
    if len(panels) > 60:
        raise InvalidOptionError(f"{len(panels)} panels is too many: select some with regressors= or equations=")
    nc = max(1, min(ncols, len(panels)))
    nr = int(np.ceil(len(panels) / nc))
    rows_per = max(len(base[base[panel_col] == p]) for p in panels)
    plt = _plt()
    fig, axes = plt.subplots(nr, nc, figsize=(4.2 * nc, 0.6 + nr * (0.5 + 0.28 * rows_per * len(fits))),
                             squeeze=False, layout="constrained")
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    m = len(fits)
    offsets = (np.arange(m) - (m - 1) / 2) * (0.7 / max(m, 1)) if m > 1 else np.zeros(1)
    for p_i, p in enumerate(panels):
        ax = axes[p_i // nc][p_i % nc]
        labels = list(base.loc[base[panel_col] == p, row_col])
        ys = np.arange(len(labels))[::-1].astype(float)
        for f_i, (name, t) in enumerate(tables.items()):
            sel = t[t[panel_col] == p].set_index(row_col).reindex(labels)
            est = sel["estimate"].to_numpy()
            lo = est - sel["lower"].to_numpy()
            hi = sel["upper"].to_numpy() - est
            ax.errorbar(est, ys + offsets[f_i], xerr=np.vstack([lo, hi]), fmt="o", ms=4, capsize=2,
                        color=colors[f_i % len(colors)], label=name if p_i == 0 else None)
        ax.axvline(0.0, color="0.6", lw=0.8, zorder=0)
        ax.set_yticks(ys, labels)
        ax.set_title(str(p), fontsize=10)
    for k in range(len(panels), nr * nc):
        axes[k // nc][k % nc].set_visible(False)
    if m > 1:
        fig.legend(loc="outside upper right", fontsize=9)
    fig.suptitle(f"Estimates with {100 * level:g}% intervals", fontsize=11)
    return fig


def plot_convergence(fit: "FittedSystem", ax: Any = None) -> Any:
    """The iterated fit's convergence criterion (largest relative change of an equation's
    fitted values) after each GLS step, on a log scale, with the tolerance as a line."""
    path = fit.criterion_path
    if len(path) == 0:
        raise InvalidOptionError(
            f"a {fit.method} fit has no convergence path: it is drawn for method='ifgls'"
        )
    fig, ax = _figure(ax, (5.5, 3.4))
    steps = np.arange(1, len(path) + 1)
    ax.semilogy(steps, np.maximum(path, np.finfo(float).tiny), "o-", ms=4, label="relative change")
    ax.axhline(fit.tol, color="C3", ls="--", lw=1, label=f"tol = {fit.tol:g}")
    ax.set_xlabel("GLS step")
    ax.set_ylabel("largest relative change")
    state = "converged" if fit.converged else "not converged"
    ax.set_title(f"Iterated FGLS: {len(path)} steps, {state}")
    ax.legend(fontsize=9)
    return fig
