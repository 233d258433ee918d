"""The system of equations: input handling, labels, and the entry point to estimation."""

from __future__ import annotations

import collections
import functools
import math
import os
import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from . import _core
from .errors import IllConditionedWarning, InputError, InvalidOptionError, ShapeMismatchError
from ._fit import FittedSystem
from ._progress import close as close_hook
from ._progress import progress_hook
from ._estimation import COND_WARN as _COND_WARN
from ._estimation import run_estimation, warn_about

__all__ = ["EquationSystem"]

_METHODS = ("ols", "fgls", "ifgls")

# Two-step FGLS on systems with at least this many coefficients runs in one pass over the data
# without the (K + N)^2 cross-products (`_core.fgls_from_data`): it skips their K x N block,
# T K N multiply-adds that only iterated fits use (a third of the data pass at K = 4000,
# N = 1000), and needs W + K^2 memory instead of (K + N)^2 + K^2. Below it the full
# preparation costs little more and is kept for later fits of the same system.
_DIRECT_FGLS_MIN_K = 1000
_DIVISORS = ("ml", "dof", "ledoit-wolf")


_COVARIANCES = ("classical", "hc0", "hc1")


@functools.cache
@functools.lru_cache(maxsize=1)
def _default_memory_limit() -> float:
    try:
        return 0.5 * os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        return 8e9


_F64 = np.dtype(np.float64)
# The largest count (max_iter, cg_max_iter) the compiled core takes: a usize.
_MAX_COUNT = int(np.iinfo(np.uintp).max)


def _whole_number(option: str, value: Any) -> int:
    """A count option (``max_iter``, ``cg_max_iter``): a whole number from 1 to the core's
    limit."""
    if type(value) is int and 1 <= value <= _MAX_COUNT:  # the usual case, quickly
        return value
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise InvalidOptionError(
            f"{option} must be a whole number >= 1 (an int, not {type(value).__name__}), "
            f"got {value!r}"
        )
    if not 1 <= value <= _MAX_COUNT:
        raise InvalidOptionError(
            f"{option} must be a whole number from 1 to {_MAX_COUNT} (the largest count the "
            f"compiled core takes), got {value!r}"
        )
    return int(value)


def _real_number(option: str, value: Any, *, positive: bool, extra: str = "") -> float:
    """A finite real option (``tol``, ``cg_tol``, ``memory_limit``): >= 0, or > 0 if positive.
    Strings and booleans are refused: ``True`` is not a tolerance."""
    if type(value) is float and math.isfinite(value) and (value > 0 if positive else value >= 0):
        return value  # the usual case, quickly
    allowed = f"a finite number {'> 0' if positive else '>= 0'}{extra}"
    if isinstance(value, (bool, np.bool_, str, bytes)):
        raise InvalidOptionError(
            f"{option} must be {allowed}, not {type(value).__name__} {value!r}"
        )
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise InvalidOptionError(f"{option} must be {allowed}, got {value!r}") from None
    if not (math.isfinite(number) and (number > 0 if positive else number >= 0)):
        raise InvalidOptionError(f"{option} must be {allowed}, got {value!r}")
    return number


def _name_list(where: str, value: Any) -> list[str]:
    """One equation's regressor names: a list (any iterable but a string) of names."""
    if isinstance(value, (str, bytes)):
        raise InvalidOptionError(
            f"{where} must be a list of names, one per column of X, not the string {value!r} "
            f"(a string is not split into names: write [{value!r}] for one regressor)"
        )
    try:
        return [str(v) for v in value]
    except TypeError:
        raise InvalidOptionError(
            f"{where} must be a list of names, one per column of X, not "
            f"{type(value).__name__} {value!r}"
        ) from None


def _may_alias(value: Any, arr: np.ndarray) -> bool:
    """Whether ``arr = np.asarray(value)`` (float64 already, no conversion) may read the
    caller's memory. Python lists are built into a new array, and so is a DataFrame of several
    dtypes (its columns are interleaved); arrays, Series and one-dtype DataFrames give views."""
    if isinstance(value, (list, tuple)):
        return False
    if isinstance(value, pd.DataFrame) and value.shape[1] > 0:
        return bool(np.may_share_memory(arr, value.iloc[:, 0].to_numpy()))
    return True


@functools.lru_cache(maxsize=64)
def _default_regressors(k: int) -> tuple[str, ...]:
    return tuple(f"x{j}" for j in range(k))


def _label(key: Any) -> str:
    """A column label as a regressor name: the levels of a MultiIndex column (a tuple) joined
    by ``_``, empty levels left out (``("price", "mean")`` -> ``price_mean``)."""
    if isinstance(key, tuple):
        return "_".join(str(k) for k in key if str(k) != "")
    return str(key)


def _time_hint(dtype: np.dtype) -> str:
    """How to turn dates or durations (numpy counts ``timedelta64`` as integers) into numbers."""
    if dtype.kind == "m":
        return (
            "durations are not numbers until given a unit, for example hours: "
            "td / np.timedelta64(1, 'h')"
        )
    return (
        "dates are not numbers; give for example days since a start date: "
        "(d - start) / np.timedelta64(1, 'D')"
    )


def _not_real(
    name: str, where: str, dtype: np.dtype, column: str | None = None
) -> ShapeMismatchError | None:
    """The error for values of ``dtype`` that are not real numbers (None when they are), about
    ``where`` ("the regressor matrix", "column 'x' of ..."). Durations (``timedelta64``) count
    as integers to numpy and complex values as numbers: both are refused here, as are dates,
    strings and objects."""
    if dtype.kind == "c":
        fix = "is complex; give real numbers"
    elif dtype.kind in "mM":
        fix = f"has dtype {dtype}; {_time_hint(dtype)}"
    elif dtype == object or not (np.issubdtype(dtype, np.number) or dtype == np.bool_):
        fix = f"has dtype {dtype}; give real numbers (any float or integer dtype)"
    else:
        return None
    return ShapeMismatchError(f"equation '{name}': {where} {fix}", equation=name, column=column)


def _refuse_columns(name: str, what: str, value: Any) -> None:
    """Refuses, by column, what numpy would read as numbers though it is none, before it does:
    pandas categoricals (their categories or codes), durations, complex values, strings and
    objects in a DataFrame, a Series or a Categorical. Nullable numeric dtypes pass."""
    if isinstance(value, pd.DataFrame):
        dtypes = [(_label(c), dt) for c, dt in value.dtypes.items()]
    elif isinstance(value, (pd.Series, pd.Categorical)):
        label = getattr(value, "name", None)
        dtypes = [(None if label is None else _label(label), value.dtype)]
    else:
        return
    for col, dtype in dtypes:
        one = col is None or what == "dependent variable"
        where = f"the {what}" if one else f"column {col!r} of the {what}"
        if isinstance(dtype, pd.CategoricalDtype):
            # labels, not quantities
            if what == "dependent variable":
                fix = (
                    "a dependent variable must be real numbers: convert it with .astype(float) "
                    "if its categories are the values"
                )
            else:
                fix = (
                    "categorical columns must be encoded as dummy columns first, for example by "
                    f"EquationSystem.from_table with the formula term C({col or 'column'}); or "
                    "convert it with .astype(float) if its categories are quantities"
                )
            raise ShapeMismatchError(
                f"equation '{name}': {where} is a pandas categorical; {fix}",
                equation=name,
                column=col,
            )
        if isinstance(dtype, np.dtype):
            err = _not_real(name, where, dtype, col)
        elif pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype):
            err = None  # nullable integers, floats, booleans
        else:
            err = ShapeMismatchError(
                f"equation '{name}': {where} has dtype {dtype}; give real numbers (any float or "
                "integer dtype)",
                equation=name,
                column=col,
            )
        if err is not None:
            raise err


def _as_float(name: str, what: str, value: Any, ndim: int) -> np.ndarray:
    """``value`` as a float64 array of ``ndim`` dimensions (any strides), checked; no copy
    beyond what the conversion needs (the system's snapshot is `_snapshot`'s)."""
    if type(value) is np.ndarray and value.ndim == ndim and value.dtype == _F64:
        # already what the core reads (any strides): nothing to check or convert
        return value
    if np.ma.isMaskedArray(value) and np.ma.getmaskarray(value).any():
        raise ShapeMismatchError(
            f"equation '{name}': the {what} is a masked array with masked values; fill them or "
            "drop those rows (the sample must be common to all equations)",
            equation=name,
        )
    _refuse_columns(name, what, value)
    if isinstance(value, pd.DataFrame) or (
        isinstance(value, pd.Series) and not isinstance(value.dtype, np.dtype)
    ):
        # numeric columns of mixed or pandas' own (nullable, pyarrow) dtypes, each checked
        # above: numpy would make one array of objects of them (a float frame with the bool
        # dummies of pd.get_dummies was refused); missing values become NaN, which the core
        # reports with their row
        arr = value.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        arr = np.asarray(value)
    err = _not_real(name, f"the {what}", arr.dtype)
    if err is not None:
        raise err
    if what == "regressor matrix" and arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != ndim:
        shape = "(T,)" if ndim == 1 else "(T, K)"
        raise ShapeMismatchError(
            f"equation '{name}': the {what} has shape {arr.shape}; expected {shape}",
            equation=name,
        )
    return np.asarray(arr, dtype=np.float64)  # no copy when already float64, any strides


def _shares(value: Any, arr: np.ndarray) -> bool:
    """Whether ``arr``, converted from ``value`` without copying, may read the caller's memory
    (then a snapshot needs a copy; a conversion that made a new array needs none)."""
    if isinstance(value, np.ndarray):
        return bool(np.may_share_memory(value, arr))
    return _may_alias(value, arr)


def _snapshot(ys: list[np.ndarray], xs: list[np.ndarray], shared: list[tuple[int, bool, bool]]) -> None:
    """Replaces the arrays that share the caller's memory by copies, all in one new buffer (one
    allocation, on huge pages when large: a copy per array had cost a page fault per 4 kB, 13 ms
    for the 14 MB of 50 equations), each keeping its memory order (Fortran stays Fortran)."""
    todo = [(ys, i) for i, y_sh, _ in shared if y_sh] + [(xs, i) for i, _, x_sh in shared if x_sh]
    if not todo:
        return
    buf = np.empty(sum(lst[i].size for lst, i in todo), dtype=np.float64)
    at = 0
    for lst, i in todo:
        a = lst[i]
        order = "F" if (a.ndim == 2 and a.flags.f_contiguous and not a.flags.c_contiguous) else "C"
        dst = buf[at : at + a.size].reshape(a.shape, order=order)
        np.copyto(dst, a)
        lst[i] = dst
        at += a.size


def _read_only(arr: np.ndarray) -> np.ndarray:
    """A read-only view of ``arr`` (the caller's own array keeps its flags)."""
    view = arr.view()
    view.setflags(write=False)  # (half the time of assigning flags.writeable: per-call cost)
    return view


def _own_read_only(arr: np.ndarray) -> np.ndarray:
    """``arr``, an array of the system's own, made read-only in place (no view needed)."""
    arr.setflags(write=False)
    return arr


def _same_rows(a: pd.Index, b: pd.Index) -> bool:
    """Whether two row indexes label the same rows: equal, or time-zone-aware datetimes that
    are the same instants shown in different zones (pandas calls those unequal)."""
    if a.equals(b):
        return True
    aware = [isinstance(i, pd.DatetimeIndex) and i.tz is not None for i in (a, b)]
    return all(aware) and a.tz_convert("UTC").equals(b.tz_convert("UTC"))


def _check_indexes(
    name: str, y: Any, X: Any, first: tuple[pd.Index, str] | None
) -> tuple[pd.Index, str] | None:
    """Refuses pandas row indexes that differ, within an equation or from the first one seen
    (rows are paired by position). Indexes of other lengths are left to the length check.
    Returns the first (index, equation) seen so far."""
    how = (
        "blocksur pairs rows by position, not by label: reset the indexes "
        "(.reset_index(drop=True)) or align them (e.g. y, X = y.align(X, join='inner', axis=0)) "
        "first"
    )
    y_idx = y.index if isinstance(y, (pd.Series, pd.DataFrame)) else None
    x_idx = X.index if isinstance(X, (pd.Series, pd.DataFrame)) else None
    if y_idx is not None and x_idx is not None and len(y_idx) == len(x_idx):
        if not _same_rows(y_idx, x_idx):
            raise ShapeMismatchError(
                f"equation '{name}': the row indexes of y and X differ; {how}", equation=name
            )
    for idx in (y_idx, x_idx):
        if idx is None:
            continue
        if first is None:
            first = (idx, name)
        elif len(idx) == len(first[0]) and not _same_rows(idx, first[0]):
            raise ShapeMismatchError(
                f"equation '{name}': its row index differs from that of equation '{first[1]}'; "
                f"{how}",
                equation=name,
            )
    return first


def _unrepresentable(name: str, X: np.ndarray, regressors: list[str]) -> InputError:
    """The error for an equation whose condition number came back infinite: a regressor column
    too small to scale to unit length (its values subnormal, below 2.2e-308 in magnitude)."""
    tiny = np.finfo(np.float64).tiny
    for j, reg in enumerate(regressors):
        top = float(np.max(np.abs(X[:, j]))) if X.shape[0] else 0.0
        if 0.0 < top < tiny:
            return InputError(
                f"equation '{name}': the values of regressor '{reg}' are too small to represent "
                f"in double precision (subnormal: largest magnitude {top:.3g}, below {tiny:.3g}), "
                "so its coefficient would overflow; rescale the column (express it in larger "
                "units)",
                equation=name,
                column=reg,
            )
    return InputError(
        f"equation '{name}': the condition number of the regressors is infinite (a column too "
        "small or too large to represent in double precision); rescale the regressors",
        equation=name,
        column=None,
    )


class SystemLabels:
    """Names of a system's equations and regressors, for every object that stands for a system
    (built from data, streamed, or restored from a saved fit). Needs ``_names``, ``_regressors``."""

    _names: list[str]
    _regressors: list[list[str]]

    @property
    def equation_names(self) -> list[str]:
        """The equations' names, in order."""
        return list(self._names)

    @property
    def regressor_names(self) -> dict[str, list[str]]:
        """The regressors of each equation."""
        return {n: list(r) for n, r in zip(self._names, self._regressors)}

    @property
    def n_eq(self) -> int:
        """Number of equations N."""
        return len(self._names)


class EquationSystem(SystemLabels):
    """A system of linear regression equations observed on one common sample.

    Parameters
    ----------
    equations
        ``{name: (y, X)}`` or a list of ``(y, X)`` pairs (then named ``eq0``, ``eq1``, ...).
        ``y`` has shape (T,), ``X`` shape (T, K_i); any float or integer dtype, C or Fortran
        order, strided views. pandas objects are accepted: the column names of a DataFrame ``X``
        name its regressors and the index of ``y`` labels the rows of residuals and fitted values.
        The row indexes of pandas inputs must agree (``y`` with ``X``, and across equations):
        rows are paired by position, so indexes that differ raise
        :class:`~blocksur.errors.ShapeMismatchError`; reset or align them first.
    regressor_names
        Optional names of the columns of each ``X``: a dict ``{equation: [names]}`` or a list of
        lists in equation order. Defaults to the DataFrame columns (the name of a Series ``X``),
        else ``x0, x1, ...``. MultiIndex columns are named by their levels joined with ``_``,
        empty levels left out (``("price", "mean")`` -> ``price_mean``); ``predict`` reads new
        DataFrames with the same columns the same way.
    copy
        ``True`` (default): the system keeps its own copy of the data, made once (none more when
        a conversion to float64 already made a new array), so later edits of the arrays given
        do not reach it or its fits. ``False``: arrays that are already float64 are kept by
        reference, which saves memory on very large data; they must then not be modified while
        the system or any of its fits is in use (a fit caches its preparation, and residuals and
        fitted values are computed later from the data). Either way the system stores read-only
        arrays (views, when kept by reference: your own arrays stay writeable).

    Example
    -------
    >>> import numpy as np, blocksur
    >>> rng = np.random.default_rng(0)
    >>> X1 = np.column_stack([np.ones(50), rng.normal(size=50)])
    >>> X2 = np.column_stack([np.ones(50), rng.normal(size=50), rng.normal(size=50)])
    >>> e = rng.multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], size=50)
    >>> system = blocksur.EquationSystem({"north": (X1 @ [1, 2] + e[:, 0], X1),
    ...                                   "south": (X2 @ [0, 1, -1] + e[:, 1], X2)})
    >>> fit = system.fit("ifgls")
    >>> fit.converged
    True
    """

    def __init__(
        self,
        equations: Mapping[str, tuple[Any, Any]] | Sequence[tuple[Any, Any]],
        regressor_names: Mapping[str, Sequence[str]] | Sequence[Sequence[str]] | None = None,
        *,
        copy: bool = True,
    ) -> None:
        if not isinstance(copy, (bool, np.bool_)):
            raise InvalidOptionError(f"copy must be True or False, got {copy!r}")
        if isinstance(equations, Mapping):
            items = [(str(k), v) for k, v in equations.items()]
        elif isinstance(equations, Sequence) and not isinstance(equations, (str, bytes)):
            items = [(f"eq{i}", v) for i, v in enumerate(equations)]
        else:
            raise ShapeMismatchError(
                "equations must be a dict {name: (y, X)} or a list of (y, X) pairs, "
                f"not {type(equations).__name__}"
            )
        names = [n for n, _ in items]
        if isinstance(regressor_names, Mapping):
            unknown = set(map(str, regressor_names)) - set(names)
            if unknown:
                raise ShapeMismatchError(
                    f"regressor_names mentions unknown equations {sorted(unknown)}; "
                    f"the equations are {names}"
                )
            given = {
                str(k): _name_list(f"regressor_names[{str(k)!r}]", v)
                for k, v in regressor_names.items()
            }
        elif regressor_names is None:
            given = {}
        else:
            if isinstance(regressor_names, (str, bytes)) or not hasattr(
                regressor_names, "__iter__"
            ):
                raise InvalidOptionError(
                    "regressor_names must be a dict {equation: [names]} or a list of name lists "
                    f"in equation order, not {type(regressor_names).__name__} {regressor_names!r}"
                )
            lists = list(regressor_names)
            if len(lists) != len(items):
                raise ShapeMismatchError(
                    f"regressor_names has {len(lists)} entries for {len(items)} equations"
                )
            given = {
                n: _name_list(f"regressor_names[{i}] (equation '{n}')", r)
                for i, (n, r) in enumerate(zip(names, lists))
            }

        self._ys: list[np.ndarray] = []
        self._xs: list[np.ndarray] = []
        self._regressors: list[list[str]] = []
        self._index: pd.Index | None = None
        first: tuple[pd.Index, str] | None = None  # the first pandas row index, its equation
        shared: list[tuple[int, bool, bool]] = []  # (equation, y shares memory, X shares memory)
        for name, pair in items:
            if not ((type(pair) is tuple or isinstance(pair, Sequence)) and len(pair) == 2):
                raise ShapeMismatchError(
                    f"equation '{name}': expected a (y, X) pair", equation=name
                )
            y, X = pair
            plain = type(y) is np.ndarray and type(X) is np.ndarray  # no labels, no index
            if not plain:
                if self._index is None and isinstance(y, (pd.Series, pd.DataFrame)):
                    self._index = y.index
                first = _check_indexes(name, y, X, first)
            yv = _as_float(name, "dependent variable", y, 1)
            Xv = _as_float(name, "regressor matrix", X, 2)
            if copy:
                shared.append((len(self._ys), _shares(y, yv), _shares(X, Xv)))
            if name in given:
                regs = given[name]
            elif plain:
                regs = list(_default_regressors(Xv.shape[1]))
            elif isinstance(X, pd.DataFrame):
                regs = [_label(c) for c in X.columns]
            elif isinstance(X, pd.Series) and X.name is not None:
                regs = [_label(X.name)]
            else:
                regs = list(_default_regressors(Xv.shape[1]))
            if len(regs) != Xv.shape[1]:
                raise ShapeMismatchError(
                    f"equation '{name}': {len(regs)} regressor names for {Xv.shape[1]} columns",
                    equation=name,
                )
            if len(set(regs)) != len(regs):
                twice = [r for r, count in collections.Counter(regs).items() if count > 1]
                labels = (
                    [c for c in X.columns if _label(c) in twice]
                    if isinstance(X, pd.DataFrame) and name not in given
                    else []
                )
                raise ShapeMismatchError(
                    f"equation '{name}': the regressor name(s) {sorted(twice)} appear more than "
                    "once"
                    + (f" (from the column labels {labels}: as names, labels are strings and the "
                       "levels of MultiIndex labels are joined with '_')" if labels else "")
                    + "; rename the columns or give regressor_names",
                    equation=name,
                )
            self._ys.append(yv)
            self._xs.append(Xv)
            self._regressors.append(regs)
        if copy:
            # every array is now the system's own (a snapshot copy or a fresh conversion), but
            # for one that shares nothing with anything (an empty array) and is the caller's
            _snapshot(self._ys, self._xs, shared)
            callers = {id(v) for _, pair in items for v in pair}
            self._ys = [_read_only(a) if id(a) in callers else _own_read_only(a) for a in self._ys]
            self._xs = [_read_only(a) if id(a) in callers else _own_read_only(a) for a in self._xs]
        else:
            # read-only views: no step of the library, and no user edit through a view,
            # changes them (the caller's arrays keep their flags)
            self._ys = [_read_only(y) for y in self._ys]
            self._xs = [_read_only(x) for x in self._xs]
        self._names = names
        self._prepared: Any = None
        self._sample: Any = None  # SampleInfo when built by from_table

    @classmethod
    def from_table(
        cls,
        data: Any,
        equations: Any,
        *,
        constant: bool = False,
        context: Mapping[str, Any] | None = None,
    ) -> "EquationSystem":
        """Builds a system from one table (pandas, polars, pyarrow, or a dict of columns).

        ``equations`` is a list (equations named after their dependent variable) or a dict
        ``{name: spec}``; each spec is a Wilkinson formula parsed by ``formulaic``
        (``"load ~ heating_dd + C(day_type) + np.log(visitors)"``) or a pair
        ``(dependent column, [regressor columns])``; ``constant=True`` puts a column of ones
        named ``Intercept`` first in the pair form (formulas carry their own intercept; remove
        it with ``- 1``). ``context`` adds names (functions) the formulas may call; ``np`` is
        always there. Rows with a missing value in any column used, or where a transform gives
        NaN/inf, are dropped for every equation: see :attr:`sample_info`. A wrong column name
        raises :class:`~blocksur.errors.UnknownColumnError`, an unreadable formula
        :class:`~blocksur.errors.FormulaError`, both naming the equation.

        Example
        -------
        >>> system = EquationSystem.from_table(frame, {                  # doctest: +SKIP
        ...     "north": "load_north ~ heating_dd + C(day_type)",
        ...     "south": ("load_south", ["heating_dd", "visitors"])}, constant=True)
        >>> system.sample_info.rows_dropped                              # doctest: +SKIP
        """
        from ._frame import build_system

        def make(eqs: Any, regressor_names: Any = None) -> "EquationSystem":
            # the arrays were built from the table for this system alone: no second copy
            return cls(eqs, regressor_names=regressor_names, copy=False)

        return build_system(data, equations, constant=constant, context=context, cls=make)

    def __getstate__(self) -> dict[str, Any]:
        state = self.__dict__.copy()
        state["_prepared"] = None  # compiled; rebuilt by the next fit
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        # unpickled (or deep-copied) arrays are fresh and writeable: read-only again
        self._ys = [_read_only(y) for y in self._ys]
        self._xs = [_read_only(x) for x in self._xs]

    @property
    def sample_info(self) -> Any:
        """How the common sample was formed (a :class:`blocksur.SampleInfo`: rows read, used,
        dropped and why) for a system built by :meth:`from_table`; ``None`` otherwise."""
        return self._sample

    # -- description (equation_names, regressor_names, n_eq: SystemLabels) -------------------

    @property
    def n_obs(self) -> int:
        """Number of observations T (rows of the common sample)."""
        return int(self._ys[0].shape[0]) if self._ys else 0

    def __repr__(self) -> str:
        ks = ", ".join(f"{n}:{len(r)}" for n, r in zip(self._names, self._regressors))
        return f"<EquationSystem N={self.n_eq} T={self.n_obs} regressors {{{ks}}}>"

    # -- estimation ----------------------------------------------------------------------------
    def _prepare(self, matrix_free: bool = False, progress: bool | None = False) -> Any:
        if self._prepared is None or not isinstance(self._prepared, dict):
            self._prepared = {}
        if matrix_free not in self._prepared:
            hook = progress_hook(progress, "data pass", None, "block")
            try:
                prepared = _core.prepare(
                    self._ys, self._xs, self._names, self._regressors,
                    matrix_free=matrix_free, progress=hook,
                )
            finally:
                close_hook(hook)
            self._warn_conditions(prepared, stacklevel=4)
            self._prepared[matrix_free] = prepared
        return self._prepared[matrix_free]

    def _full_prepared(self) -> Any:
        """The cached full (direct) preparation, or None."""
        return self._prepared.get(False) if isinstance(self._prepared, dict) else None

    def _warn_conditions(self, prepared: Any, stacklevel: int) -> None:
        for name, cond, X, regs in zip(
            self._names, prepared.conditions, self._xs, self._regressors
        ):
            if cond == math.inf:  # a column whose scaling overflows: refuse, naming it
                raise _unrepresentable(name, X, regs)
            if cond > _COND_WARN:
                warnings.warn(
                    f"equation '{name}': the regressors are ill-conditioned (condition number "
                    f"estimate {cond:.1e} after scaling each column to unit length), so about "
                    f"{int(np.log10(cond))} of 16 significant digits of its coefficients may be "
                    "lost; drop or combine nearly collinear regressors",
                    IllConditionedWarning,
                    stacklevel=stacklevel,
                )

    def direct_memory(self) -> int:
        """Bytes the direct solver needs beyond the data: the (K+N)^2 cross-products plus
        three K x K matrices (the GLS matrix, its factor, the covariance)."""
        cached = self.__dict__.get("_direct_memory")
        if cached is None:
            k = sum(len(r) for r in self._regressors)
            p = k + self.n_eq
            cached = self.__dict__["_direct_memory"] = 8 * (p * p + 3 * k * k)
        return cached

    def _one_pass_memory(self, covariance: str = "classical") -> int:
        """Bytes a two-step fit on the one-pass route needs beyond the data, at its peak: during
        the fit the basis W (T x (K+N)) and the GLS matrix in packed storage (K(K+1)/2 values,
        factored in place); afterwards, with W gone, the packed factor and what a covariance
        takes: a copy of the factor and the K x K matrix (classical) or three K x K matrices
        (the robust kinds: the meat and two solves)."""
        k = sum(len(r) for r in self._regressors)
        packed = k * (k + 1) // 2
        after = 2 * packed + k * k if covariance == "classical" else packed + 3 * k * k
        return 8 * max(self.n_obs * (k + self.n_eq) + packed, after)

    def fit(
        self,
        method: str = "fgls",
        *,
        omega: str = "ml",
        tol: float = 1e-10,
        max_iter: int = 1000,
        restrictions: Any = None,
        covariance: str = "classical",
        inference: str = "z",
        shrink_target: str = "diagonal",
        solver: str = "auto",
        memory_limit: float | None = None,
        cg_tol: float = 1e-10,
        cg_max_iter: int = 5000,
        progress: bool | None = None,
    ) -> FittedSystem:
        """Estimate the system.

        Parameters
        ----------
        method
            ``"ols"`` (equation by equation), ``"fgls"`` (two-step feasible GLS: Omega from the
            OLS residuals, then one GLS step) or ``"ifgls"`` (iterated FGLS: alternate Omega and
            GLS until the coefficients settle; with ``omega="ml"`` its fixed point is the
            Gaussian maximum-likelihood estimator).
        omega
            How Omega is estimated from the residual cross-products S: ``"ml"`` divides by T,
            ``"dof"`` divides S_ij by sqrt((T - K_i)(T - K_j)), ``"ledoit-wolf"`` shrinks S/T
            towards ``shrink_target`` with the Ledoit & Wolf (2004) intensity (reported as
            :attr:`FittedSystem.shrinkage`): for systems with about as many equations as
            observations, or more, where S/T is singular.
        tol
            Iterated FGLS stops when the largest relative change of an equation's fitted values
            between two GLS steps is at most ``tol``.
        max_iter
            Iterated FGLS stops after this many GLS steps; the fit then has ``converged=False``
            and a :class:`NotConvergedWarning` is issued.
        restrictions
            Linear restrictions imposed at estimation, across equations if wanted: a string such
            as ``"north::price = south::price; north::income + south::income = 1"``
            (``equation::regressor``; a name that is not made of letters, digits and
            underscores goes between backticks: see :mod:`blocksur._restrictions` for the
            syntax), a list of such strings, or an
            ``(R, q)`` pair of arrays over the order of :attr:`FittedSystem.coef`. Omega is estimated
            from residuals that satisfy the restrictions (restricted OLS for the first step).
        covariance
            ``"classical"`` (model-based), ``"hc0"`` (heteroskedasticity-robust system sandwich,
            White 1980) or ``"hc1"`` (HC0 times T / (T - K/N)).
        inference
            Reference distribution for coefficient tests and intervals: ``"z"`` (standard normal,
            asymptotic) or ``"t"`` (Student t with T - K_i degrees of freedom for equation i).
        shrink_target
            With ``omega="ledoit-wolf"``: ``"diagonal"`` (keeps each equation's variance,
            shrinks the covariances towards zero) or ``"identity"`` (towards mu I, mu the mean
            variance, as in Ledoit & Wolf 2004).
        solver
            ``"direct"`` (Cholesky of the K x K GLS matrix), ``"cg"`` (matrix-free conjugate
            gradients: memory O(T (K + N)), no K x K matrix; standard errors per equation on
            request, see :meth:`FittedSystem.se_of`) or ``"auto"``: direct unless
            the memory the direct route needs exceeds ``memory_limit``: :meth:`direct_memory`,
            or for a two-step fit on the one-pass route (K >= 1000, omega "ml" or "dof", no
            restrictions: one pass over the data without the (K + N)^2 cross-products) the larger
            of the basis W (8 T (K + N) bytes) with the GLS matrix in packed storage, and what
            the covariance takes afterwards (one K x K matrix, three for the robust kinds).
        memory_limit
            Bytes the direct solver may use: a finite number > 0, or ``None`` for half of the
            machine's memory.
        cg_tol, cg_max_iter
            Conjugate gradients stop at this relative residual (a finite number > 0) or
            iteration count (a whole number >= 1).
        progress
            Progress bars (tqdm) for the data pass and the GLS steps of an iterated fit:
            ``True``, ``False``, or ``None`` for on only when standard error is a terminal.

        Example
        -------
        >>> fit = system.fit("fgls", omega="dof")  # doctest: +SKIP
        >>> fit.coef["north"]                      # doctest: +SKIP
        """
        if method not in _METHODS:
            raise InvalidOptionError(
                f"unknown method {method!r}: use 'ols', 'fgls' (two-step) or 'ifgls' (iterated)"
            )
        if omega not in _DIVISORS:
            raise InvalidOptionError(
                f"unknown omega estimator {omega!r}: use 'ml' (divide by T), 'dof' "
                "(divide by sqrt((T-K_i)(T-K_j))) or 'ledoit-wolf' (shrinkage)"
            )
        if shrink_target not in ("diagonal", "identity"):
            raise InvalidOptionError(
                f"unknown shrink_target {shrink_target!r}: use 'diagonal' or 'identity'"
            )
        if solver not in ("auto", "direct", "cg"):
            raise InvalidOptionError(f"unknown solver {solver!r}: use 'auto', 'direct' or 'cg'")
        max_iter = _whole_number("max_iter", max_iter)
        cg_max_iter = _whole_number("cg_max_iter", cg_max_iter)
        tol = _real_number("tol", tol, positive=False)
        cg_tol = _real_number("cg_tol", cg_tol, positive=True)
        if memory_limit is None:
            memory_limit = _default_memory_limit()
        else:
            memory_limit = _real_number(
                "memory_limit", memory_limit, positive=True,
                extra=" of bytes, or None for half of the machine's memory",
            )
        k = sum(len(r) for r in self._regressors)
        one_pass = (
            method == "fgls" and restrictions is None and omega in ("ml", "dof")
            and self.n_eq > 1 and k >= _DIRECT_FGLS_MIN_K and self._full_prepared() is None
        )
        need = self._one_pass_memory(covariance) if one_pass else self.direct_memory()
        matrix_free = solver == "cg" or (solver == "auto" and need > memory_limit)
        if matrix_free and covariance != "classical":
            raise InvalidOptionError(
                "robust covariances need the direct solver (they form K x K matrices); "
                "use solver='direct' or covariance='classical'"
            )
        core_omega = {"ledoit-wolf": f"lw-{shrink_target}"}.get(omega, omega)
        if covariance not in _COVARIANCES:
            raise InvalidOptionError(
                f"unknown covariance {covariance!r}: use 'classical', 'hc0' or 'hc1'"
            )
        if inference not in ("z", "t"):
            raise InvalidOptionError(f"unknown inference {inference!r}: use 'z' (normal) or 't'")
        if one_pass and not matrix_free:
            # one pass, nothing cached: a later GLS fit of this system prepares it in full
            hook = progress_hook(progress, "data pass", None, "block")
            try:
                prepared, est = _core.fgls_from_data(
                    self._ys, self._xs, self._names, self._regressors, omega, progress=hook
                )
            finally:
                close_hook(hook)
            self._warn_conditions(prepared, stacklevel=3)
            warn_about(est, int(max_iter), tol, stacklevel=3)
            return FittedSystem(
                self, prepared, est, None, tol=tol, max_iter=int(max_iter), restrictions=None,
                covariance=covariance, inference=inference,
            )
        prepared = self._prepare(matrix_free, progress)
        lw_data = omega == "ledoit-wolf" and not matrix_free
        est, rset = run_estimation(
            prepared,
            self._names,
            self._regressors,
            method=method,
            core_omega=core_omega,
            tol=tol,
            max_iter=int(max_iter),
            restrictions=restrictions,
            progress=progress,
            ys=self._ys if lw_data else None,
            xs=self._xs if lw_data else None,
            cg_tol=cg_tol,
            cg_max_iter=cg_max_iter,
        )
        return FittedSystem(
            self,
            prepared,
            est,
            None,  # residuals: computed from the data on first use
            tol=tol,
            max_iter=int(max_iter),
            restrictions=rset,
            covariance=covariance,
            inference=inference,
        )
