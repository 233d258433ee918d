"""Building a system from one table: Wilkinson formulas (through ``formulaic``) or column lists.

Each equation is given either as a formula, ``"load ~ heating_dd + cooling_dd + C(day_type)"``
(intercepts, categorical expansion, transforms such as ``np.log(x)``, interactions ``a:b``), or
as a pair ``(dependent column, [regressor columns])``. Rows with a missing value in any column
that any equation uses are dropped for the whole system, so that every equation has the same
sample; so are rows where a transform gives NaN or infinity (``np.log(0)``). The system keeps
the labels of the rows used and of the rows dropped.

Accepted tables: a pandas DataFrame, a polars DataFrame, a pyarrow Table, or a dict of
equal-length columns. Only the columns the equations use are read; polars and Arrow columns are
converted once (through numpy or Arrow), never copied twice.

Example
-------
>>> import blocksur
>>> from blocksur.scenarios import grid_load_table
>>> data = grid_load_table(n_districts=2, n_days=120, seed=3)
>>> system = blocksur.EquationSystem.from_table(data.frame, [
...     "load_harbour ~ hdd_harbour + C(day_type) + np.log(industry_harbour)",
...     ("load_hillside", ["hdd_hillside", "visitors_hillside"]),
... ], constant=True)
>>> system.equation_names
['load_harbour', 'load_hillside']
>>> system.sample_info.n_dropped
8
"""

from __future__ import annotations

import difflib
import re
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from .errors import (
    FormulaError,
    InputError,
    MissingDependencyError,
    ShapeMismatchError,
    UnknownColumnError,
)

if TYPE_CHECKING:  # pragma: no cover
    from ._system import EquationSystem

__all__ = ["SampleInfo", "build_system", "expand_new"]

CONSTANT_NAME = "Intercept"


@dataclass
class _Spec:
    name: str
    formula: str | None  # the formula text, or None for the column form
    dependent: str | None
    regressors: list[str]
    needs: list[str]  # data columns read, in first-use order
    model_spec: Any = None  # formulaic ModelSpec of the right-hand side, after building


@dataclass
class SampleInfo:
    """How the common sample of a table-built system was formed.

    Attributes
    ----------
    n_rows_in : rows of the table given
    rows_used : index labels of the rows kept (the common sample)
    rows_dropped : index labels of the rows dropped
    dropped_missing : how many were dropped for a missing value in a column used
    dropped_nonfinite : how many more were dropped because a transform gave NaN or infinity
    columns_missing : per column used, how many of the table's rows are missing

    Example
    -------
    >>> system.sample_info.rows_dropped     # doctest: +SKIP
    """

    n_rows_in: int
    rows_used: pd.Index
    rows_dropped: pd.Index
    dropped_missing: int
    dropped_nonfinite: int
    columns_missing: dict[str, int] = field(default_factory=dict)
    specs: list[_Spec] = field(default_factory=list, repr=False)
    constant: bool = False

    @property
    def n_dropped(self) -> int:
        """Rows dropped in total."""
        return len(self.rows_dropped)

    def describe(self) -> str:
        """One line for reports: rows read, used and dropped, and why."""
        if not self.n_dropped:
            return f"all {self.n_rows_in} rows of the table used"
        why = []
        if self.dropped_missing:
            worst = sorted(((v, k) for k, v in self.columns_missing.items() if v), reverse=True)[:3]
            cols = ", ".join(f"{k} {v}" for v, k in worst)
            why.append(f"{self.dropped_missing} with a missing value ({cols})")
        if self.dropped_nonfinite:
            why.append(f"{self.dropped_nonfinite} where a transform gave NaN or inf")
        return f"{self.n_dropped} of {self.n_rows_in} rows dropped: " + "; ".join(why)

    def formulas(self) -> dict[str, str]:
        """Each equation's specification as text (the formula, or ``y ~ a + b`` for columns)."""
        out = {}
        for s in self.specs:
            if s.formula is not None:
                out[s.name] = s.formula
            else:
                rhs = ([CONSTANT_NAME] if self.constant else []) + s.regressors
                out[s.name] = f"{s.dependent} ~ " + (" + ".join(rhs) if rhs else "0")
        return out


# -- reading the table ---------------------------------------------------------------------------
class _Table:
    """Column access without copying: pandas, polars, pyarrow or a dict of columns."""

    def __init__(self, data: Any) -> None:
        mod = type(data).__module__.split(".")[0]
        self.kind = "pandas"
        if isinstance(data, pd.DataFrame):
            self.data = data
        elif mod == "polars":
            self.kind = "polars"
            self.data = data
        elif mod == "pyarrow" and hasattr(data, "column_names"):
            self.kind = "arrow"
            self.data = data
        elif isinstance(data, Mapping):
            self.data = pd.DataFrame({str(k): np.asarray(v) for k, v in data.items()})
        else:
            raise InputError(
                "the data must be a pandas DataFrame, a polars DataFrame, a pyarrow Table or a "
                f"dict of columns, not {type(data).__name__}"
            )
        if self.kind == "pandas":
            cols = list(self.data.columns)
            if self.data.columns.has_duplicates:
                dup = sorted({str(c) for c in self.data.columns[self.data.columns.duplicated()]})
                raise InputError(f"the data have duplicate column names {dup}: rename them")
            self.columns = {str(c): c for c in cols}
            self.index = self.data.index
        elif self.kind == "polars":
            self.columns = {str(c): c for c in self.data.columns}
            self.index = pd.RangeIndex(self.data.height)
        else:
            self.columns = {str(c): c for c in self.data.column_names}
            self.index = pd.RangeIndex(self.data.num_rows)

    def __len__(self) -> int:
        return len(self.index)

    def values(self, name: str) -> np.ndarray:
        """The column as a numpy array (zero-copy where the source allows)."""
        col = self.columns[name]
        if self.kind == "pandas":
            s = self.data[col]
            if isinstance(s.dtype, pd.CategoricalDtype) or s.dtype == object or pd.api.types.is_string_dtype(s.dtype):
                return s.to_numpy()
            if s.hasnans or isinstance(s.dtype, pd.api.extensions.ExtensionDtype):
                return s.to_numpy(dtype=float, na_value=np.nan)
            return s.to_numpy()
        if self.kind == "polars":
            s = self.data.get_column(col)
            return s.to_numpy()
        arr = self.data.column(col)
        return arr.to_numpy()

    def missing(self, name: str) -> np.ndarray:
        col = self.columns[name]
        if self.kind == "pandas":
            return self.data[col].isna().to_numpy()
        if self.kind == "polars":
            s = self.data.get_column(col)
            m = s.is_null().to_numpy()
            if s.dtype.is_float():
                m = m | s.is_nan().fill_null(False).to_numpy()
            return m
        import pyarrow.compute as pc

        arr = self.data.column(col)
        m = pc.is_null(arr, nan_is_null=True)
        return np.asarray(m.to_numpy(zero_copy_only=False), dtype=bool)

    def frame(self, names: list[str], keep: np.ndarray | None) -> pd.DataFrame:
        """A pandas DataFrame of the named columns over the kept rows (one copy)."""
        cols = [self.columns[n] for n in names]
        if self.kind == "pandas":
            sub = self.data.loc[:, cols] if keep is None else self.data.loc[keep, cols]
            sub.columns = names
            return sub
        if self.kind == "polars":
            sub = self.data.select(cols)
            if keep is not None:
                import polars as pl

                sub = sub.filter(pl.Series(keep))
            out = sub.to_pandas()
        else:
            sub = self.data.select(cols)
            if keep is not None:
                import pyarrow as pa

                sub = sub.filter(pa.array(keep))
            out = sub.to_pandas()
        out.columns = names
        out.index = self.index if keep is None else self.index[keep]
        return out


# -- reading the equations -----------------------------------------------------------------------
def _formulaic() -> Any:
    try:
        import formulaic
    except ImportError:  # pragma: no cover - exercised only without formulaic
        raise MissingDependencyError(
            "equations written as formulas need the formulaic package: pip install formulaic",
            package="formulaic",
        ) from None
    return formulaic


def _unknown(table: _Table, equation: str, column: str, what: str,
             where: str = "is not a column of the data") -> UnknownColumnError:
    close = difflib.get_close_matches(column, list(table.columns), n=3, cutoff=0.6)
    hint = f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""
    return UnknownColumnError(
        f"equation '{equation}': {what} {column!r} {where}{hint}",
        equation=equation,
        column=column,
        suggestions=close,
    )


def _parse_formula(text: str, label: str | None, table: _Table) -> _Spec:
    formulaic = _formulaic()
    from formulaic.errors import FormulaicError

    where = label or text
    if "~" not in text:
        raise FormulaError(
            f"equation {where!r}: the formula {text!r} has no '~'; write 'dependent ~ regressors'",
            equation=label,
            formula=text,
        )
    if not text.split("~", 1)[0].strip():
        # formulaic reads "~ x" as a formula without sides and fails on its missing `lhs`
        raise FormulaError(
            f"equation {where!r}: the formula {text!r} has no dependent variable; write the "
            "dependent column on the left of '~' ('dependent ~ regressors')",
            equation=label,
            formula=text,
        )
    try:
        f = formulaic.Formula(text)
        lhs_terms = list(f.lhs)
        required = [str(v) for v in f.required_variables]
    except (FormulaicError, SyntaxError, AttributeError, ValueError, TypeError) as err:
        # formulaic reports some unreadable formulas with Python's own exceptions ("~" alone,
        # a syntax error inside I(...)): all of them mean the same to the user
        first = (str(err).splitlines() or [type(err).__name__])[0]
        raise FormulaError(
            f"equation {where!r}: cannot read the formula {text!r}: {first}",
            equation=label,
            formula=text,
        ) from None
    bad = [v for v in required if not v or not str(v).strip()]
    if bad or not lhs_terms or not str(f.lhs).strip():
        raise FormulaError(
            f"equation {where!r}: cannot read the formula {text!r}: write 'dependent ~ regressors' "
            "with column names on both sides",
            equation=label,
            formula=text,
        )
    if len(lhs_terms) != 1:
        raise FormulaError(
            f"equation {where!r}: the left of '~' in {text!r} must be one dependent variable, "
            f"found {len(lhs_terms)} terms",
            equation=label,
            formula=text,
        )
    name = label if label is not None else str(f.lhs).strip()
    # keep the order in which columns appear in the text (the set from formulaic has none)
    required.sort(key=lambda v: (text.find(v) if v in text else len(text), v))
    for v in required:
        if v not in table.columns:
            raise _unknown(table, name, v, "the name", "in the formula is not a column of the data")
    return _Spec(name=name, formula=text, dependent=None, regressors=[], needs=required)


def _parse_columns(spec: Sequence[Any], label: str | None, table: _Table) -> _Spec:
    if len(spec) != 2:
        raise InputError(
            f"equation {label or spec!r}: give (dependent column, [regressor columns]), "
            f"got {len(spec)} items"
        )
    dep, regs = spec
    if not isinstance(dep, str):
        raise InputError(f"equation {label or dep!r}: the dependent column must be a name (str)")
    regs = [regs] if isinstance(regs, str) else [str(r) for r in regs]
    name = label if label is not None else dep
    if dep not in table.columns:
        raise _unknown(table, name, dep, "the dependent variable")
    for r in regs:
        if r not in table.columns:
            raise _unknown(table, name, r, "the regressor")
    if len(set(regs)) != len(regs):
        dup = sorted({r for r in regs if regs.count(r) > 1})
        raise ShapeMismatchError(f"equation '{name}': regressors {dup} are listed twice", equation=name)
    return _Spec(name=name, formula=None, dependent=dep, regressors=regs, needs=[dep, *regs])


def _parse_specs(equations: Any, table: _Table) -> list[_Spec]:
    if isinstance(equations, str):
        parts = [p.strip() for p in equations.replace(";", "\n").splitlines() if p.strip()]
        items: list[tuple[str | None, Any]] = [(None, p) for p in parts]
    elif isinstance(equations, Mapping):
        items = [(str(k), v) for k, v in equations.items()]
    elif isinstance(equations, Sequence):
        items = [(None, v) for v in equations]
    else:
        raise InputError(
            "equations must be a list of formulas or (dependent, [regressors]) pairs, or a dict "
            f"{{name: formula or pair}}, not {type(equations).__name__}"
        )
    if not items:
        from .errors import EmptySystemError

        raise EmptySystemError("no equations were given")
    specs = []
    for label, spec in items:
        if isinstance(spec, str):
            specs.append(_parse_formula(spec, label, table))
        elif isinstance(spec, Sequence):
            specs.append(_parse_columns(spec, label, table))
        else:
            raise InputError(
                f"equation {label!r}: expected a formula string or (dependent, [regressors]), "
                f"not {type(spec).__name__}"
            )
    names = [s.name for s in specs]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ShapeMismatchError(
            f"equation names {dup} occur more than once: give the equations as a dict "
            "{name: formula} to name them"
        )
    return specs


# -- building the matrices -----------------------------------------------------------------------
def _numeric(table: _Table, spec: _Spec, col: str, values: np.ndarray) -> np.ndarray:
    """A column of the pair form, refused unless its values are real numbers. numpy counts
    durations and complex values as numbers, and a pandas categorical of numbers reads as them."""
    from ._system import _time_hint

    dtype = values.dtype
    if table.kind == "pandas" and isinstance(table.data[table.columns[col]].dtype, pd.CategoricalDtype):
        problem = "is a pandas categorical"
        if col == spec.dependent:
            hint = ("; a dependent variable must be real numbers: convert it with .astype(float) "
                    "if its categories are the values")
        else:
            hint = (f"; encode it as dummy columns with a formula term C({col}), or convert it "
                    "with .astype(float) if its categories are quantities")
    elif dtype.kind == "c":
        problem, hint = "has complex values", "; give real numbers"
    elif dtype.kind in "mM":
        problem, hint = f"has values of type {dtype}", f": {_time_hint(dtype)}"
    elif dtype == object or not (np.issubdtype(dtype, np.number) or dtype == np.bool_):
        problem = f"has values of type {dtype} that are not numbers"
        hint = f"; for categories use a formula with C({col})" if spec.formula is None else ""
    else:
        return values
    raise InputError(
        f"equation '{spec.name}': column {col!r} {problem}{hint}",
        equation=spec.name,
        column=col,
    )


def _materialize(spec: _Spec, frame: pd.DataFrame | None, table: _Table, keep: np.ndarray,
                 constant: bool, context: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """(y, X in Fortran order, regressor names) over the kept rows."""
    t = int(keep.sum())
    if spec.formula is None:
        k = len(spec.regressors) + int(constant)
        X = np.empty((t, k), dtype=np.float64, order="F")
        j = 0
        if constant:
            X[:, 0] = 1.0
            j = 1
        for col in spec.regressors:
            X[:, j] = _numeric(table, spec, col, table.values(col))[keep]
            j += 1
        y = np.asarray(_numeric(table, spec, spec.dependent, table.values(spec.dependent))[keep], dtype=np.float64)
        names = ([CONSTANT_NAME] if constant else []) + list(spec.regressors)
        return y, X, names
    formulaic = _formulaic()
    from formulaic.errors import FormulaicError

    assert frame is not None
    try:
        with np.errstate(divide="ignore", invalid="ignore"):  # such rows are dropped and reported
            mm = formulaic.model_matrix(spec.formula, frame, na_action="ignore", context=dict(context))
    except FormulaicError as err:
        raise FormulaError(
            f"equation '{spec.name}': cannot evaluate the formula {spec.formula!r}: "
            f"{str(err).splitlines()[0]}",
            equation=spec.name,
            formula=spec.formula,
        ) from None
    except (TypeError, ValueError) as err:
        raise FormulaError(
            f"equation '{spec.name}': evaluating the formula {spec.formula!r} failed: {err}",
            equation=spec.name,
            formula=spec.formula,
        ) from None
    lhs, rhs = mm.lhs, mm.rhs
    if lhs.shape[1] != 1:
        raise FormulaError(
            f"equation '{spec.name}': the dependent side of {spec.formula!r} expands to "
            f"{lhs.shape[1]} columns {list(lhs.columns)}; it must be one numeric variable",
            equation=spec.name,
            formula=spec.formula,
        )
    spec.model_spec = rhs.model_spec
    y = np.asarray(lhs.iloc[:, 0].to_numpy(), dtype=np.float64)
    X = np.asfortranarray(rhs.to_numpy(dtype=np.float64))
    return y, X, [str(c) for c in rhs.columns]


def build_system(
    data: Any,
    equations: Any,
    *,
    constant: bool = False,
    context: Mapping[str, Any] | None = None,
    cls: type | None = None,
) -> "EquationSystem":
    """Builds an :class:`EquationSystem` from one table (see :meth:`EquationSystem.from_table`)."""
    if cls is None:
        from ._system import EquationSystem as cls  # noqa: N813
    table = _Table(data)
    specs = _parse_specs(equations, table)
    ctx = {"np": np, **dict(context or {})}
    needed: list[str] = []
    for s in specs:
        needed.extend(c for c in s.needs if c not in needed)
    n_in = len(table)
    miss_by_col = {}
    bad = np.zeros(n_in, dtype=bool)
    for c in needed:
        m = table.missing(c)
        miss_by_col[c] = int(m.sum())
        bad |= m
    keep = ~bad
    if not keep.any():
        worst = max(miss_by_col, key=miss_by_col.get)
        raise InputError(
            f"every row has a missing value in a column the equations use (column {worst!r} "
            f"alone is missing in {miss_by_col[worst]} of {n_in} rows): no common sample is left"
        )
    has_formula = any(s.formula is not None for s in specs)
    formula_cols = [c for c in needed if any(c in s.needs for s in specs if s.formula is not None)]
    dropped_nonfinite = 0
    for _attempt in range(3):
        frame = table.frame(formula_cols, keep) if has_formula else None
        built = [_materialize(s, frame, table, keep, constant, ctx) for s in specs]
        rows = np.flatnonzero(keep)
        nonfinite = np.zeros(len(rows), dtype=bool)
        for y, X, _ in built:
            nonfinite |= ~np.isfinite(y)
            nonfinite |= ~np.isfinite(X).all(axis=1)
        if not nonfinite.any():
            break
        dropped_nonfinite += int(nonfinite.sum())
        keep = keep.copy()
        keep[rows[nonfinite]] = False
        if not keep.any():
            raise InputError("after transforms every row has a NaN or an infinity: no common sample is left")
    else:  # pragma: no cover - transforms that keep creating non-finite values
        raise InputError("transforms keep producing NaN or infinity as rows are dropped")
    index = table.index[keep]
    eqs = {
        s.name: (pd.Series(y, index=index, name=s.name, copy=False), X)
        for s, (y, X, _) in zip(specs, built)
    }
    names = {s.name: regs for s, (_, _, regs) in zip(specs, built)}
    system = cls(eqs, regressor_names=names)
    system._sample = SampleInfo(
        n_rows_in=n_in,
        rows_used=index,
        rows_dropped=table.index[~keep],
        dropped_missing=int(bad.sum()),
        dropped_nonfinite=dropped_nonfinite,
        columns_missing=miss_by_col,
        specs=specs,
        constant=constant,
    )
    return system


def _is_table(obj: Any) -> bool:
    mod = type(obj).__module__.split(".")[0]
    return isinstance(obj, pd.DataFrame) or mod == "polars" or (mod == "pyarrow" and hasattr(obj, "column_names"))


# -- categories in new data ---------------------------------------------------------------------
_C_CALL = re.compile(r"C\(\s*(`[^`]+`|[A-Za-z_][A-Za-z0-9_]*)\s*(?:,.*)?\)", re.S)
_SHOW_VALUES = 5
_SHOW_LEVELS = 20


def _categorical_factors(model_spec: Any) -> list[tuple[str, list[Any]]]:
    """(factor expression, levels seen at fit time) of each categorical factor of a fitted
    formula, from the encoder state formulaic keeps in its model spec."""
    out = []
    for expr, entry in (getattr(model_spec, "encoder_state", None) or {}).items():
        try:
            kind, state = entry
            levels = list(state["categories"])
        except (TypeError, ValueError, KeyError):
            continue
        if getattr(kind, "value", kind) == "categorical":
            out.append((str(expr), levels))
    return out


def _factor_column(expr: str, columns: Any) -> str | None:
    """The data column a categorical factor reads: the factor itself (a column name, in
    backticks or not) or the first argument of ``C(...)``; None for anything computed."""
    e = expr.strip()
    m = _C_CALL.fullmatch(e)
    name = m.group(1) if m else e
    if len(name) > 1 and name[0] == name[-1] == "`":
        name = name[1:-1]
    return name if name in columns else None


def _levels_text(levels: list[Any]) -> str:
    shown = ", ".join(repr(v) for v in levels[:_SHOW_LEVELS])
    more = len(levels) - _SHOW_LEVELS
    return shown + (f", ... ({more} more, {len(levels)} in all)" if more > 0 else "")


def _check_categories(spec: _Spec, frame: pd.DataFrame) -> bool:
    """Refuses new data whose categorical columns hold a missing value or a level the fit has no
    coefficient for (formulaic would encode either as the reference level, silently). Returns
    whether some categorical factor could not be traced to one column (left to formulaic's
    warning)."""
    unchecked = False
    for expr, levels in _categorical_factors(spec.model_spec):
        col = _factor_column(expr, frame.columns)
        if col is None:
            unchecked = True
            continue
        values = frame[col]
        missing = values.isna().to_numpy()
        bad = missing | ~values.isin(levels).to_numpy()
        if not bad.any():
            continue
        rows = np.flatnonzero(bad)
        raw = values.to_numpy()
        shown = ", ".join(
            ("a missing value" if missing[r] else repr(raw[r])) + f" (row {r})" for r in rows[:_SHOW_VALUES]
        )
        if len(rows) > _SHOW_VALUES:
            shown += f", ... ({len(rows)} rows in all)"
        odd = list(dict.fromkeys(None if missing[r] else raw[r] for r in rows))
        raise InputError(
            f"equation '{spec.name}': column {col!r} of the new data has values the fit has no "
            f"coefficient for: {shown}. A missing value or a level not seen in the estimation "
            f"sample cannot be predicted (it would count as the reference level); the known "
            f"levels are {_levels_text(levels)}. Map those rows to a known level or drop them",
            equation=spec.name,
            column=col,
            values=odd,
            rows=[int(r) for r in rows],
            levels=levels,
        )
    return unchecked


def _raise_on_mismatch(spec: _Spec, caught: list[Any], unchecked: bool) -> None:
    """Turns formulaic's warning about categories outside the fitted levels into an error;
    passes on any other warning recorded while the formula was applied."""
    try:
        from formulaic.errors import DataMismatchWarning
    except ImportError:  # pragma: no cover - an older formulaic
        DataMismatchWarning = ()  # type: ignore[assignment]  # noqa: N806
    for w in caught:
        if DataMismatchWarning and issubclass(w.category, DataMismatchWarning):
            found = re.search(r"dataset\):\s*(.*?)\.\s*They are", str(w.message), re.S)
            detail = found.group(1) if found else str(w.message).splitlines()[0]
            raise InputError(
                f"equation '{spec.name}': a categorical term of the formula {spec.formula!r} "
                f"gets values in the new data that the fit has no coefficient for: {detail}; "
                "a missing value or a level not seen in the estimation sample cannot be "
                "predicted (it would count as the reference level): map those rows to a known "
                "level or drop them",
                equation=spec.name,
                column=None,
            )
    for w in caught:
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno, source=w.source)


def expand_new(system: Any, new: Any) -> Any:
    """For a table-built system, turns one new table into ``{equation: regressor DataFrame}``
    (formulas re-applied with the categories and transform state learned at fit time).
    Anything else is returned unchanged."""
    info = getattr(system, "_sample", None)
    if info is None or not _is_table(new) or not info.specs:
        return new
    table = _Table(new)
    out = {}
    for s in info.specs:
        if s.formula is None:
            for c in s.regressors:
                if c not in table.columns:
                    raise _unknown(table, s.name, c, "the regressor", "is not a column of the new data")
            cols = {c: np.asarray(_numeric(table, s, c, table.values(c)), dtype=float) for c in s.regressors}
            X = pd.DataFrame(cols, index=table.index)
            if info.constant:
                X.insert(0, CONSTANT_NAME, 1.0)
            out[s.name] = X
            continue
        if s.model_spec is None:
            raise FormulaError(
                f"equation '{s.name}': the formula's fitted state was not kept; give the new "
                "regressors as {equation: matrix}",
                equation=s.name,
                formula=s.formula,
            )
        rhs_vars = [str(v) for v in s.model_spec.required_variables]
        for v in rhs_vars:
            if v not in table.columns:
                raise _unknown(table, s.name, v, "the name", "used in the formula is not a column of the new data")
        frame = table.frame([v for v in rhs_vars], None)
        unchecked = _check_categories(s, frame)
        try:
            if unchecked:
                # categories of a term not read from one column (C(a + b), a transform): let
                # formulaic's own warning about values outside the fitted levels stop the
                # prediction instead of their silent encoding as the reference level
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    X = s.model_spec.get_model_matrix(frame, na_action="ignore")
            else:
                caught = []
                X = s.model_spec.get_model_matrix(frame, na_action="ignore")
        except Exception as err:  # formulaic raises several kinds here
            raise FormulaError(
                f"equation '{s.name}': cannot apply the formula {s.formula!r} to the new data: "
                f"{str(err).splitlines()[0]}",
                equation=s.name,
                formula=s.formula,
            ) from None
        _raise_on_mismatch(s, caught, unchecked)
        out[s.name] = pd.DataFrame(np.asarray(X, dtype=float), index=table.index, columns=[str(c) for c in X.columns])
    return out
