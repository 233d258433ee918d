"""Many independent small systems at once: one per group of a table, or one per slice of 3-D
arrays, fitted in parallel by the compiled core (threads, interpreter lock released).

Every system has the same equations and regressors; the number of rows may differ from group to
group. A system that cannot be estimated (too few rows, a collinear regressor, a singular Omega,
a NaN) gets its error in :attr:`ManyFits.status`; the others are unaffected.

Example
-------
>>> import numpy as np, blocksur
>>> rng = np.random.default_rng(0)
>>> y = rng.normal(size=(50, 40, 2))                      # 50 systems, 40 rows, 2 equations
>>> x = np.concatenate([np.ones((50, 40, 1)), rng.normal(size=(50, 40, 1))], axis=2)
>>> many = blocksur.fit_stacked(y, x, equations=["a", "b"])
>>> many.table.columns.tolist()
['group', 'equation', 'regressor', 'estimate', 'se', 'stat', 'pval']
>>> int(many.status["converged"].sum())
50
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping, Sequence
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd

from . import _core
from ._fit import _stats
from ._frame import CONSTANT_NAME, _Table
from ._stream import ColumnLayout, _check_missing, check_options
from .errors import InputError, InvalidOptionError, ShapeMismatchError

__all__ = ["ManyFits", "fit_groups", "fit_stacked"]


class ManyFits:
    """The results of many independent systems with the same layout.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per coefficient of every system that was estimated: the group label column(s),
        ``equation``, ``regressor``, ``estimate``, ``se`` (classical), ``stat`` and ``pval``
        (``inference``: z or t with T_g - K_i degrees of freedom). Failed systems are left out
        (see :attr:`status`).
    status : pandas.DataFrame
        One row per system, indexed by its group label: ``n_obs`` (rows used), ``n_dropped``
        (rows skipped for a missing value), ``n_iter``, ``converged``, ``loglik``, ``error``
        (the blocksur error class name, or None) and ``message``.
    coef, se : pandas.DataFrame
        Wide views: one row per system, one column per (equation, regressor); NaN rows for
        failed systems.
    """

    def __init__(self, keys: pd.Index, names: list[str], regressors: list[list[str]], out: Mapping[str, Any],
                 n_obs: np.ndarray, n_dropped: np.ndarray, method: str, divisor: str, inference: str) -> None:
        self.method = method
        self.omega_divisor = "ledoit-wolf" if divisor.startswith("lw-") else divisor
        self.inference = inference
        self.equation_names = list(names)
        self.regressor_names = {n: list(r) for n, r in zip(names, regressors)}
        self._keys = keys
        cols = pd.MultiIndex.from_tuples([(n, r) for n, rs in zip(names, regressors) for r in rs],
                                         names=["equation", "regressor"])
        self.coef = pd.DataFrame(np.asarray(out["coef"]), index=keys, columns=cols)
        self.se = pd.DataFrame(np.asarray(out["se"]), index=keys, columns=cols)
        self._omega = np.asarray(out["omega"])
        errors = list(out["errors"])
        self.status = pd.DataFrame(
            {
                "n_obs": np.asarray(n_obs, dtype=np.int64),
                "n_dropped": np.asarray(n_dropped, dtype=np.int64),
                "n_iter": np.asarray(out["n_iter"], dtype=np.int64),
                "converged": np.asarray(out["converged"], dtype=bool),
                "loglik": np.asarray(out["loglik"], dtype=float),
            },
            index=keys,
        )
        # object columns holding None for the systems without an error
        idx = self.status.index
        self.status["error"] = pd.Series([None if e is None else e[0] for e in errors], dtype=object, index=idx)
        self.status["message"] = pd.Series(
            [None if e is None else _rename(e[1], names, regressors) for e in errors], dtype=object, index=idx
        )
        self._regs = [list(r) for r in regressors]

    @cached_property
    def table(self) -> pd.DataFrame:
        """The tidy coefficient table (built on first access; see the class description)."""
        names, regressors = self.equation_names, self._regs
        ok = self.status["error"].isna().to_numpy()
        k = self.coef.shape[1]
        b = self.coef.to_numpy()[ok]
        se = self.se.to_numpy()[ok]
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(se > 0, b / se, np.nan)
        if self.inference == "t":
            kk = np.repeat([len(r) for r in regressors], [len(r) for r in regressors])
            df = self.status["n_obs"].to_numpy()[ok][:, None] - kk[None, :]
            p = 2 * _stats().t.sf(np.abs(z), df)
        else:
            p = 2 * _stats().norm.sf(np.abs(z))
        keys = self._keys[ok]
        frame = keys.repeat(k).to_frame(index=False)
        g = int(ok.sum())
        frame["equation"] = np.tile(np.repeat(names, [len(r) for r in regressors]), g)
        frame["regressor"] = np.tile([r for rs in regressors for r in rs], g)
        frame["estimate"] = b.ravel()
        frame["se"] = se.ravel()
        frame["stat"] = z.ravel()
        frame["pval"] = p.ravel()
        return frame

    @property
    def groups(self) -> pd.Index:
        """The group labels, in order."""
        return self._keys

    @property
    def n_failed(self) -> int:
        """How many systems could not be estimated."""
        return int(self.status["error"].notna().sum())

    @property
    def errors(self) -> pd.DataFrame:
        """The status rows of the systems that failed (``error`` and ``message``)."""
        return self.status.loc[self.status["error"].notna(), ["error", "message"]]

    def omega_of(self, group: Any) -> pd.DataFrame:
        """The Omega (N x N) of one system, by group label."""
        pos = self._keys.get_loc(group)
        if not isinstance(pos, (int, np.integer)):
            raise InvalidOptionError(f"the group label {group!r} is not unique")
        return pd.DataFrame(self._omega[pos], index=self.equation_names, columns=self.equation_names)

    def __len__(self) -> int:
        return len(self._keys)

    def __repr__(self) -> str:
        return (f"<ManyFits {self.method}: {len(self)} systems of {len(self.equation_names)} equations, "
                f"{self.n_failed} failed>")


def _rename(message: str, names: list[str], regressors: list[list[str]]) -> str:
    """Puts the real equation and regressor names into a core message (the core sees eqI, xJ)."""
    m = re.search(r"equation 'eq(\d+)'", message)
    if not m or int(m.group(1)) >= len(names):
        return message
    i = int(m.group(1))
    regs = regressors[i]
    out = message.replace(m.group(0), f"equation {names[i]!r}")

    def reg(mm: re.Match[str]) -> str:
        j = int(mm.group(1))
        return repr(regs[j]) if j < len(regs) else mm.group(0)

    return re.sub(r"'x(\d+)'", reg, out)


def _threads(threads: Any) -> int:
    if threads is None:
        return os.cpu_count() or 1
    if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) or threads < 1:
        raise InvalidOptionError(f"threads must be a whole number >= 1 (or None: all cores), got {threads!r}")
    return int(threads)


def _run(ys: list[np.ndarray], xs: list[np.ndarray], bounds: np.ndarray, keys: pd.Index, names: list[str],
         regressors: list[list[str]], n_obs: np.ndarray, n_dropped: np.ndarray, method: str, omega: str,
         shrink_target: str, tol: float, max_iter: int, inference: str, threads: Any) -> ManyFits:
    """Fits system g on rows bounds[g]:bounds[g+1] of the stacked per-equation arrays."""
    opts = check_options(method, omega, tol, max_iter, None, inference, shrink_allowed=True,
                         shrink_target=shrink_target)
    out = _core.fit_many(ys, xs, [int(b) for b in bounds], opts.method, opts.omega, opts.tol, opts.max_iter,
                         _threads(threads))
    return ManyFits(keys, names, regressors, out, n_obs, n_dropped, opts.method, opts.omega, opts.inference)


def fit_groups(
    data: Any,
    by: Any,
    equations: Any,
    *,
    constant: bool = False,
    missing: str = "drop",
    method: str = "fgls",
    omega: str = "ml",
    shrink_target: str = "diagonal",
    tol: float = 1e-10,
    max_iter: int = 1000,
    inference: str = "z",
    threads: int | None = None,
) -> ManyFits:
    """Fits one system per group of a table, in parallel.

    Parameters
    ----------
    data
        A pandas DataFrame (or a polars DataFrame, pyarrow Table, dict of columns).
    by
        The column(s) whose values label the groups (a name or a list of names). Rows whose
        label is missing belong to no group.
    equations
        ``{name: (dependent column, [regressor columns])}`` or a list of such pairs, as in
        :meth:`EquationSystem.from_table` (column pairs only).
    constant
        Put a column of ones named ``Intercept`` first in every equation.
    missing
        ``"drop"`` skips rows with a missing or infinite value in a column used (counted per
        group in ``status["n_dropped"]``); ``"raise"`` leaves them in, so their group fails
        with a NonFiniteError naming the row within the group.
    method, omega, shrink_target, tol, max_iter, inference
        As in :meth:`EquationSystem.fit` (``omega="ledoit-wolf"`` is available).
    threads
        Threads to use (default: every core).

    Returns
    -------
    ManyFits
        ``table`` (tidy coefficients of every estimated group), ``status`` (per group: rows,
        iterations, convergence, log-likelihood, error), wide ``coef``/``se``, ``omega_of``.

    Example
    -------
    >>> many = blocksur.fit_groups(sales, "region", {"north": ("sales_n", ["price_n"]),   # doctest: +SKIP
    ...                                              "south": ("sales_s", ["price_s"])},
    ...                            constant=True, method="ifgls")
    >>> many.table.query("regressor == 'price_n'")                   # doctest: +SKIP
    """
    _check_missing(missing)
    by_cols = [by] if isinstance(by, str) else list(by) if isinstance(by, Sequence) else None
    if not by_cols or not all(isinstance(c, str) for c in by_cols):
        raise InputError(f"by must be a column name or a list of column names, not {by!r}")
    table = _Table(data)
    for c in by_cols:
        if c not in table.columns:
            from ._frame import _unknown

            raise _unknown(table, "(groups)", c, "the group column")
    layout = ColumnLayout.from_equations(equations, table, constant, missing)
    values = layout.values(table, "the data")
    n_rows = len(table)
    keyframe = pd.DataFrame({c: table.values(c) for c in by_cols})
    grouped = keyframe.groupby(by_cols, sort=True, dropna=True)
    codes = grouped.ngroup().to_numpy()
    sizes = grouped.size()
    keys = sizes.index
    n_groups = len(keys)
    if n_groups == 0:
        raise InputError(f"no group labels: every value of {by_cols} is missing")
    in_group = codes >= 0
    bad = ColumnLayout.bad_rows(values, n_rows) if missing == "drop" else np.zeros(n_rows, dtype=bool)
    n_dropped = np.bincount(codes[in_group & bad], minlength=n_groups)
    use = in_group & ~bad
    order = np.flatnonzero(use)
    order = order[np.argsort(codes[order], kind="stable")]
    counts = np.bincount(codes[order], minlength=n_groups)
    bounds = np.concatenate([[0], np.cumsum(counts)])
    ys_all, xs_all = layout.matrices({c: v[order] for c, v in values.items()})
    return _run(ys_all, xs_all, bounds, keys, layout.names, layout.regressors, counts, n_dropped, method, omega,
                shrink_target, tol, max_iter, inference, threads)


def fit_stacked(
    y: Any,
    x: Any,
    *,
    equations: Any = None,
    groups: Any = None,
    constant: bool = False,
    method: str = "fgls",
    omega: str = "ml",
    shrink_target: str = "diagonal",
    tol: float = 1e-10,
    max_iter: int = 1000,
    inference: str = "z",
    threads: int | None = None,
) -> ManyFits:
    """Fits one system per slice of 3-D arrays, in parallel.

    Parameters
    ----------
    y
        Array of shape (G, T, N): system g's dependent variables are ``y[g]`` (T x N).
    x
        A list of N arrays of shape (G, T, K_i) (equation i of system g has regressors
        ``x[i][g]``), or one array of shape (G, T, K) shared by every equation.
    equations
        None (``eq0, eq1, ...``), a list of N names, or ``{name: [regressor names]}``.
    groups
        Labels of the G systems (default 0 .. G-1, in a column named ``group``); a
        ``pandas.Index`` keeps its name.
    constant
        Put a column of ones named ``Intercept`` first in every equation.
    method, omega, shrink_target, tol, max_iter, inference, threads
        As in :func:`fit_groups`.

    Example
    -------
    >>> many = blocksur.fit_stacked(returns, factors, equations=["a", "b", "c"])   # doctest: +SKIP
    >>> many.status.query("not converged")                                        # doctest: +SKIP
    """
    yv = np.asarray(y, dtype=np.float64)
    if yv.ndim != 3:
        raise ShapeMismatchError(f"y has shape {yv.shape}; expected (G systems, T rows, N equations)")
    g, t, n = yv.shape
    if isinstance(x, np.ndarray) or (not isinstance(x, (list, tuple)) and hasattr(x, "shape")):
        shared = np.asarray(x, dtype=np.float64)
        xl = [shared] * n
    elif isinstance(x, (list, tuple)):
        xl = [np.asarray(a, dtype=np.float64) for a in x]
    else:
        raise InputError(f"x must be a (G, T, K) array or a list of N such arrays, not {type(x).__name__}")
    if len(xl) != n:
        raise ShapeMismatchError(f"{len(xl)} regressor arrays for {n} equations (the last axis of y)")
    for i, a in enumerate(xl):
        if a.ndim != 3 or a.shape[:2] != (g, t):
            raise ShapeMismatchError(f"regressor array {i} has shape {a.shape}; expected ({g}, {t}, K_{i})")
    if constant:
        cache: dict[int, np.ndarray] = {}
        xl = [cache.setdefault(id(a), np.concatenate([np.ones((g, t, 1)), a], axis=2)) for a in xl]
    ks = [a.shape[2] - int(bool(constant)) for a in xl]
    if equations is None:
        names = [f"eq{i}" for i in range(n)]
        regs = [[f"x{j}" for j in range(k)] for k in ks]
    elif isinstance(equations, Mapping):
        names = [str(e) for e in equations]
        regs = [[str(r) for r in v] for v in equations.values()]
    elif isinstance(equations, Sequence) and not isinstance(equations, (str, bytes)):
        names = [str(e) for e in equations]
        regs = [[f"x{j}" for j in range(k)] for k in ks]
    else:
        raise InputError(f"equations must be None, a list of names or a dict {{name: [regressors]}}, not {equations!r}")
    if len(names) != n:
        raise ShapeMismatchError(f"{len(names)} equation names for {n} equations")
    for name, r, k in zip(names, regs, ks):
        if len(r) != k:
            raise ShapeMismatchError(f"equation '{name}': {len(r)} regressor names for {k} columns", equation=name)
    regs = [([CONSTANT_NAME] if constant else []) + r for r in regs]
    if groups is None:
        keys = pd.RangeIndex(g, name="group")
    else:
        keys = groups if isinstance(groups, pd.Index) else pd.Index(list(groups))
        if keys.name is None and not isinstance(keys, pd.MultiIndex):
            keys = keys.rename("group")
        if len(keys) != g:
            raise ShapeMismatchError(f"{len(keys)} group labels for {g} systems")
    # Rows of every system stacked: system s is rows s*T .. (s+1)*T of each equation's arrays.
    ys = [np.ascontiguousarray(yv[:, :, i]).reshape(g * t) for i in range(n)]
    xs = [a.reshape(g * t, a.shape[2]) for a in xl]
    bounds = np.arange(g + 1) * t
    return _run(ys, xs, bounds, keys, names, regs, np.full(g, t), np.zeros(g, dtype=np.int64), method, omega,
                shrink_target, tol, max_iter, inference, threads)
