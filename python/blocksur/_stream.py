"""Fits from rows that arrive in chunks: iterators of DataFrames or arrays, and Parquet files.

A streamed fit reads the rows once and keeps only a small summary: each chunk is reduced to
the R factor of the QR of all its columns ``[X_1 y_1 .. X_N y_N]`` (P x P, P = K + N), merged
into a running factor (the R of two stacked R factors), with column sums and the moments of each
y. From the merged factor, one small QR per equation gives what a second pass over the rows
would: the R factor of every equation's ``[X_i | y_i]`` and the cross-products of the
orthonormal basis ``W`` (orthogonal transformations only: no digits are lost to squaring the
conditioning, as forming ``Z'Z`` would). Dask fits use two passes over the partitions.

The result is exactly the in-memory computation, reordered: coefficients, standard errors, Omega,
R-squared and the log-likelihood agree with :meth:`EquationSystem.fit` to rounding, whatever the
chunking. At most one chunk is held at a time, plus the summaries.

What a streamed fit cannot do, because it keeps no rows: residuals and fitted values per row,
robust (HC) covariances, ``omega="ledoit-wolf"`` (its intensity needs fourth moments of the
residuals of each estimation step), saving with ``to_dict``/pickle. Those raise
:class:`~blocksur.errors.DataNotKeptError` or :class:`~blocksur.errors.InvalidOptionError`
saying so. Re-estimating with other options does not need the rows: :meth:`RowlessFit.refit`.

Example
-------
>>> import numpy as np, pandas as pd, blocksur
>>> rng = np.random.default_rng(4)
>>> frame = pd.DataFrame(rng.normal(size=(500, 4)), columns=["a", "b", "ya", "yb"])
>>> frame["ya"] += 2 * frame["a"]
>>> eqs = {"north": ("ya", ["a"]), "south": ("yb", ["a", "b"])}
>>> chunks = [frame.iloc[i:i + 128] for i in range(0, 500, 128)]
>>> fit = blocksur.fit_chunks(chunks, eqs, constant=True)
>>> ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit()
>>> bool(np.allclose(fit.coef, ref.coef, rtol=1e-12, atol=0))
True
"""

from __future__ import annotations

import os
import sys
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd

from . import _core
from ._fit import FittedSystem
from ._frame import CONSTANT_NAME, _numeric, _parse_specs, _Table, _unknown
from ._progress import _wanted as progress_wanted
from ._estimation import COND_WARN as _COND_WARN
from ._estimation import run_estimation
from ._system import SystemLabels, _as_float, _real_number, _whole_number
from .errors import (
    DataNotKeptError,
    FormulaError,
    IllConditionedWarning,
    InputError,
    InvalidOptionError,
    MissingDependencyError,
    ShapeMismatchError,
)

__all__ = ["StreamInfo", "RowlessFit", "fit_chunks", "fit_parquet"]

_METHODS = ("ols", "fgls", "ifgls")
# Pass 2 must see the rows of pass 1: the sums of squares of y from both passes must agree.
_SAME_DATA_RTOL = 1e-8
# Parquet: bytes read at a time within a column chunk (the row group is not loaded whole).
_READ_BUFFER = 1 << 22
_READ_THREADS = True


# -- options -----------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Options:
    method: str
    omega: str
    tol: float
    max_iter: int
    restrictions: Any
    inference: str


def check_options(method: str, omega: str, tol: Any, max_iter: Any, restrictions: Any,
                  inference: str, *, shrink_allowed: bool = False, shrink_target: str = "diagonal",
                  where: str = "a streamed fit") -> _Options:
    """Validates the estimation options shared by the streamed, Dask and batch front ends and
    returns them with ``omega`` as the core expects it."""
    if method not in _METHODS:
        raise InvalidOptionError(
            f"unknown method {method!r}: use 'ols', 'fgls' (two-step) or 'ifgls' (iterated)"
        )
    if omega == "ledoit-wolf" and not shrink_allowed:
        raise InvalidOptionError(
            f"omega='ledoit-wolf' is not available for {where}: its shrinkage intensity needs "
            "fourth moments of the residuals of every estimation step, which a two-pass fit "
            "over chunks does not keep; use omega='ml' or 'dof', or fit the rows in memory "
            "(EquationSystem.fit, whose solver='cg' path needs no K x K matrix)"
        )
    if omega not in ("ml", "dof", "ledoit-wolf"):
        raise InvalidOptionError(
            f"unknown omega estimator {omega!r}: use 'ml' (divide by T) or 'dof' "
            "(divide by sqrt((T-K_i)(T-K_j)))" + (" or 'ledoit-wolf'" if shrink_allowed else "")
        )
    if shrink_target not in ("diagonal", "identity"):
        raise InvalidOptionError(f"unknown shrink_target {shrink_target!r}: use 'diagonal' or 'identity'")
    max_iter = _whole_number("max_iter", max_iter)
    tol = _real_number("tol", tol, positive=False)
    if inference not in ("z", "t"):
        raise InvalidOptionError(f"unknown inference {inference!r}: use 'z' (normal) or 't'")
    core_omega = f"lw-{shrink_target}" if omega == "ledoit-wolf" else omega
    return _Options(method, core_omega, tol, int(max_iter), restrictions, inference)


def _check_missing(missing: str) -> None:
    if missing not in ("drop", "raise"):
        raise InvalidOptionError(
            f"missing must be 'drop' (skip rows with a missing or infinite value in a column "
            f"used) or 'raise', got {missing!r}"
        )


# -- progress bars -----------------------------------------------------------------------------
class _NoBar:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def _bar(on: bool, desc: str, total: int | None) -> Any:
    if not on:
        return _NoBar()
    try:
        from tqdm.auto import tqdm
    except ImportError:
        raise MissingDependencyError(
            "progress bars need the tqdm package: pip install tqdm (or pass progress=False)",
            package="tqdm",
        ) from None
    return tqdm(total=total, desc=desc, unit="row", unit_scale=True, leave=True, file=sys.stderr)


# -- how the rows of a chunk become (ys, xs) ---------------------------------------------------
class ColumnLayout:
    """Equations given as ``(dependent column, [regressor columns])`` of table chunks (pandas,
    polars, pyarrow Table or RecordBatch, dict of columns). Picklable: Dask ships it to the
    workers."""

    def __init__(self, specs: list[Any], constant: bool, missing: str) -> None:
        self.names = [s.name for s in specs]
        self.dependents = [s.dependent for s in specs]
        self.columns_of = [list(s.regressors) for s in specs]
        self.regressors = [([CONSTANT_NAME] if constant else []) + list(s.regressors) for s in specs]
        self.constant = bool(constant)
        self.missing = missing
        needed: list[str] = []
        for s in specs:
            needed.extend(c for c in [s.dependent, *s.regressors] if c not in needed)
        self.needed = needed
        self._specs = specs
        self._spec_of = {}
        for s in specs:
            for c in [s.dependent, *s.regressors]:
                self._spec_of.setdefault(c, s)

    @classmethod
    def from_equations(cls, equations: Any, template: Any, constant: bool, missing: str) -> "ColumnLayout":
        """Reads the equations against a table with the chunks' columns (rows not needed)."""
        if equations is None:
            raise InputError(
                "table chunks need the equations: a dict {name: (dependent column, [regressor "
                "columns])} or a list of such pairs"
            )
        table = template if isinstance(template, _Table) else _as_table(template)
        specs = _parse_specs(equations, table)
        for s in specs:
            if s.formula is not None:
                raise FormulaError(
                    f"equation '{s.name}': a fit over chunks takes (dependent column, [regressor "
                    f"columns]) pairs, not formulas ({s.formula!r}): the categories and transforms "
                    "of a formula would have to be learned from all chunks first; compute the "
                    "columns in the chunks and name them",
                    equation=s.name,
                    formula=s.formula,
                )
        return cls(specs, constant, missing)

    def values(self, chunk: Any, where: str) -> dict[str, np.ndarray]:
        """The columns the equations use, as float64 arrays."""
        table = chunk if isinstance(chunk, _Table) else _as_table(chunk)
        for c in self.needed:
            if c not in table.columns:
                raise _unknown(table, self._spec_of[c].name, c, "the column", f"is missing from {where}")
        return {c: np.asarray(_numeric(table, self._spec_of[c], c, table.values(c)), dtype=np.float64)
                for c in self.needed}

    @staticmethod
    def bad_rows(values: Mapping[str, np.ndarray], n: int) -> np.ndarray:
        """Rows with a missing (NaN) or infinite value in any column."""
        bad = np.zeros(n, dtype=bool)
        for v in values.values():
            bad |= ~np.isfinite(v)
        return bad

    def matrices(self, values: Mapping[str, np.ndarray]) -> tuple[list[np.ndarray], list[np.ndarray]]:
        """(ys, xs) from the columns (X in Fortran order, the constant first if asked)."""
        t = len(next(iter(values.values())))
        ys, xs = [], []
        for dep, cols in zip(self.dependents, self.columns_of):
            ys.append(np.ascontiguousarray(values[dep]))
            X = np.empty((t, len(cols) + int(self.constant)), dtype=np.float64, order="F")
            j = 0
            if self.constant:
                X[:, 0] = 1.0
                j = 1
            for c in cols:
                X[:, j] = values[c]
                j += 1
            xs.append(X)
        return ys, xs

    def extract(self, chunk: Any, where: str) -> tuple[list[np.ndarray], list[np.ndarray], int, int]:
        """(ys, xs, rows read, rows dropped) of one chunk."""
        values = self.values(chunk, where)
        n_read = len(next(iter(values.values())))
        dropped = 0
        if self.missing == "drop" and n_read:
            bad = self.bad_rows(values, n_read)
            dropped = int(bad.sum())
            if dropped:
                values = {c: v[~bad] for c, v in values.items()}
        ys, xs = self.matrices(values)
        return ys, xs, n_read, dropped


class ArrayLayout:
    """Chunks given as ``(ys, xs)``: ``ys`` a list of N 1-D arrays (or one (T, N) array), ``xs``
    a list of N (T, K_i) arrays."""

    def __init__(self, names: list[str], regressors: list[list[str]], constant: bool) -> None:
        self.names = names
        self.regressors = [([CONSTANT_NAME] if constant else []) + list(r) for r in regressors]
        self.constant = bool(constant)
        self.n_cols = [len(r) for r in regressors]

    @classmethod
    def from_first(cls, chunk: Any, equations: Any, constant: bool) -> "ArrayLayout":
        ys, xs = _split_pair(chunk, "the first chunk")
        n = len(ys)
        ks = [1 if np.ndim(x) == 1 else int(np.shape(x)[1]) for x in xs]
        if equations is None:
            names = [f"eq{i}" for i in range(n)]
            regs = [[f"x{j}" for j in range(k)] for k in ks]
        elif isinstance(equations, Mapping):
            names = [str(k) for k in equations]
            regs = [[str(r) for r in v] for v in equations.values()]
        elif isinstance(equations, Sequence) and not isinstance(equations, (str, bytes)):
            names = [str(e) for e in equations]
            regs = [[f"x{j}" for j in range(k)] for k in ks]
        else:
            raise InputError(
                "for chunks of arrays, equations is None, a list of equation names, or a dict "
                f"{{name: [regressor names]}}, not {type(equations).__name__}"
            )
        if len(names) != n:
            raise ShapeMismatchError(f"{len(names)} equation names for {n} equations in the chunks")
        for name, r, k in zip(names, regs, ks):
            if len(r) != k:
                raise ShapeMismatchError(
                    f"equation '{name}': {len(r)} regressor names for {k} columns", equation=name
                )
        return cls(names, regs, constant)

    def extract(self, chunk: Any, where: str) -> tuple[list[np.ndarray], list[np.ndarray], int, int]:
        ys, xs = _split_pair(chunk, where)
        if len(ys) != len(self.names):
            raise ShapeMismatchError(f"{where} has {len(ys)} equations; the first chunk had {len(self.names)}")
        yo, xo = [], []
        t = None
        for name, y, x, k in zip(self.names, ys, xs, self.n_cols):
            yv = _as_float(name, "dependent variable", y, 1)
            xv = _as_float(name, "regressor matrix", x, 2)
            if xv.shape[1] != k:
                raise ShapeMismatchError(
                    f"equation '{name}': {where} has {xv.shape[1]} regressor columns; the first chunk had {k}",
                    equation=name,
                )
            if t is None:
                t = yv.shape[0]
            if yv.shape[0] != t or xv.shape[0] != t:
                raise ShapeMismatchError(
                    f"equation '{name}': {where} has {yv.shape[0]} values of y and {xv.shape[0]} rows "
                    f"of X, the first equation {t} rows",
                    equation=name,
                )
            if self.constant:
                xv = np.column_stack([np.ones(t), xv])
            yo.append(yv)
            xo.append(xv)
        return yo, xo, int(t or 0), 0


def _split_pair(chunk: Any, where: str) -> tuple[list[Any], list[Any]]:
    if not (isinstance(chunk, (tuple, list)) and len(chunk) == 2):
        raise InputError(
            f"{where} is a {type(chunk).__name__}: give tables (with the equations as column "
            "pairs) or (ys, xs) pairs of arrays"
        )
    ys, xs = chunk
    if isinstance(ys, np.ndarray) and ys.ndim == 2:
        ys = [ys[:, i] for i in range(ys.shape[1])]
    ys, xs = list(ys), list(xs)
    if len(ys) != len(xs):
        raise ShapeMismatchError(f"{where} has {len(ys)} dependent variables and {len(xs)} regressor matrices")
    if not ys:
        from .errors import EmptySystemError

        raise EmptySystemError("the chunks hold no equations")
    return ys, xs


def _as_table(chunk: Any) -> _Table:
    mod = type(chunk).__module__.split(".")[0]
    if mod == "pyarrow" and type(chunk).__name__ == "RecordBatch":
        import pyarrow as pa

        chunk = pa.Table.from_batches([chunk])
    return _Table(chunk)


def _is_pair(chunk: Any) -> bool:
    return isinstance(chunk, (tuple, list)) and len(chunk) == 2 and not isinstance(chunk[0], str)


# -- reading the rows --------------------------------------------------------------------------
@dataclass(frozen=True)
class StreamInfo:
    """Where the rows of a fit over chunks came from.

    Attributes
    ----------
    source : ``"chunks"``, ``"parquet"`` or ``"dask"``
    n_chunks : chunks (record batches, partitions) read in each pass
    n_rows_read : rows read in each pass
    n_rows_dropped : rows skipped for a missing or infinite value (``missing="drop"``)
    seconds : wall time of (reading and summarising the rows, finishing the summaries) for
        chunks and Parquet files, which are read once; of (pass 1, pass 2) for Dask
    """

    source: str
    n_chunks: int
    n_rows_read: int
    n_rows_dropped: int
    seconds: tuple[float, float]

    @property
    def n_rows(self) -> int:
        """Rows used (read less dropped)."""
        return self.n_rows_read - self.n_rows_dropped


def merge_factors(a: Any, b: Any) -> Any:
    return b if a is None else _core.pass1_merge(a, b)


def merge_stats(a: Any, b: Any) -> Any:
    return b if a is None else _core.pass2_merge(a, b)


def check_same_rows(factors: Any, stats: Mapping[str, Any], names: list[str]) -> None:
    """Pass 2 must read the rows of pass 1: same count, and each y's sum of squares (the last
    column norm of its R factor from pass 1, summed directly in pass 2) must agree."""
    n1, n2 = int(factors[0]), int(stats["n_rows"])
    if n1 != n2:
        raise InputError(
            f"the second pass read {n2} rows, the first {n1}: the chunk source must yield the same "
            "rows each time it is iterated (a callable returning a fresh iterator over the same data)"
        )
    for name, r, raw in zip(names, factors[1], stats["y_raw"]):
        ss = float(np.dot(r[:, -1], r[:, -1]))
        if abs(ss - raw) > _SAME_DATA_RTOL * max(ss, raw, np.finfo(float).tiny):
            raise InputError(
                f"equation '{name}': the second pass read different values than the first (sum of "
                f"squares of y {raw:.17g} against {ss:.17g}): the chunk source must yield the same "
                "rows, in any chunking, each time it is iterated"
            )


def _close(it: Any) -> None:
    """Closes a generator (and the files it holds) left before its end by an error."""
    close = getattr(it, "close", None)
    if close is not None:
        close()


def run_passes(
    open_chunks: Callable[[], Iterable[Any]],
    layout: Any,
    *,
    progress: bool,
    total: int | None = None,
    source: str = "chunks",
    what: str = "chunk",
) -> tuple[Any, Any, Any, StreamInfo]:
    """One read of the chunks ``open_chunks()`` yields: each chunk is reduced to a one-pass
    summary (a tall-skinny QR of all its columns), the summaries are merged, and the result is
    finished into the pass-1 factors and pass-2 statistics. ``layout`` is a layout, or a
    function making one from the first chunk. Returns (layout, factors, stats, info)."""
    summary = None
    read = dropped = chunks = 0
    t0 = time.perf_counter()
    bar = _bar(progress, "blocksur (one pass over the rows)", total)
    it = iter(open_chunks())
    try:
        for chunk in it:
            if callable(layout):
                layout = layout(chunk)
            names, regs = layout.names, layout.regressors
            ys, xs, n_read, n_drop = layout.extract(chunk, f"{what} {chunks}")
            del chunk
            if len(ys[0]):
                part = _core.row_chunk(ys, xs, names, regs, read)
                summary = part if summary is None else _core.row_merge(summary, part)
            del ys, xs
            read += n_read
            dropped += n_drop
            chunks += 1
            bar.update(n_read)
    finally:
        bar.close()
        _close(it)
    if chunks == 0:
        raise InputError(f"the {source} yielded no chunks")
    if summary is None:
        raise InputError(
            f"the {source} held no rows" + (f" ({dropped} rows dropped for missing values)" if dropped else "")
        )
    t1 = time.perf_counter()
    factors, stats = _core.row_finish(summary, [len(r) + 1 for r in layout.regressors], layout.names)
    info = StreamInfo(source, chunks, read, dropped, (t1 - t0, time.perf_counter() - t1))
    return layout, factors, stats, info


# -- estimation from the summaries -------------------------------------------------------------
def estimate_prepared(prepared: Any, names: list[str], regressors: list[list[str]], opts: _Options,
                      stacklevel: int = 3, progress: bool = False) -> tuple[Any, Any]:
    """One estimation on a prepared system, with the warnings and messages of
    :meth:`EquationSystem.fit`. Returns (estimate, restriction set or None)."""
    return run_estimation(
        prepared,
        names,
        regressors,
        method=opts.method,
        core_omega=opts.omega,
        tol=opts.tol,
        max_iter=opts.max_iter,
        restrictions=opts.restrictions,
        progress=progress,
        stacklevel=stacklevel + 1,
    )


def _y_crossprod(names: list[str], regressors: list[list[str]], factors: Any, stats: Mapping[str, Any]) -> np.ndarray:
    """Centred cross-products of the dependent variables across equations (N x N), from the
    summaries: y_i = Q_i z_i + rho_i q_i = W a_i, so y_i'y_j = a_i' G a_j (G = W'W), using the
    sparsity of a_i; the diagonal is the directly merged sum of squares about the mean."""
    n = len(names)
    k = sum(len(r) for r in regressors)
    gram = np.asarray(stats["gram"])
    offs = np.concatenate([[0], np.cumsum([len(r) for r in regressors])])
    ga = np.empty((gram.shape[0], n))
    zs = []
    for i, r in enumerate(factors[1]):
        ki = len(regressors[i])
        z, rho = r[:ki, ki], abs(r[ki, ki])
        zs.append((z, rho))
        ga[:, i] = gram[:, offs[i] : offs[i + 1]] @ z + gram[:, k + i] * rho
    yy = np.empty((n, n))
    for i, (z, rho) in enumerate(zs):
        yy[i] = z @ ga[offs[i] : offs[i + 1]] + rho * ga[k + i]
    yy = (yy + yy.T) / 2
    t = float(stats["n_rows"])
    mean = np.asarray(stats["y_mean"], dtype=float)
    out = yy - t * np.outer(mean, mean)
    np.fill_diagonal(out, np.asarray(stats["y_m2"], dtype=float))
    return out


class _RowlessSystem(SystemLabels):
    """Stands in for the system of a fit over chunks: labels and sizes, no rows."""

    def __init__(self, names: list[str], regressors: list[list[str]], n_obs: int, source: str) -> None:
        self._names = list(names)
        self._regressors = [list(r) for r in regressors]
        self._index = None
        self._sample = None
        self._n_obs = int(n_obs)
        self._source = source

    def _not_kept(self) -> DataNotKeptError:
        return DataNotKeptError(
            f"this fit was computed from {self._source} and keeps no rows, so "
            "residuals, fitted values, robust covariances, the intercept F test and saving "
            "(to_dict, pickle) are not available; compute row-level quantities chunk by chunk "
            "with fit.predict, or fit the rows in memory with EquationSystem"
        )

    @property
    def _ys(self) -> list[np.ndarray]:
        raise self._not_kept()

    @property
    def _xs(self) -> list[np.ndarray]:
        raise self._not_kept()

    @property
    def n_obs(self) -> int:
        return self._n_obs

    @property
    def sample_info(self) -> None:
        return None


class RowlessFit(FittedSystem):
    """A :class:`FittedSystem` computed from summaries of the rows (chunks, Parquet batches, Dask
    partitions) rather than the rows themselves.

    Everything computed from the cross-products is available and equals the in-memory fit:
    coefficients, standard errors and covariance, Omega, SSR, R-squared, the log-likelihood,
    McElroy's R-squared, Wald and LR tests, predictions and reports. Residuals, fitted values and
    anything else that needs the rows raise :class:`~blocksur.errors.DataNotKeptError`.
    :attr:`stream_info` says how the rows were read; :meth:`refit` re-estimates from the same
    summaries without reading the rows again.
    """

    def _init_rowless(self, info: StreamInfo, ycross: np.ndarray) -> None:
        self._stream_info = info
        self._ycross = ycross

    @property
    def stream_info(self) -> StreamInfo:
        """How the rows were read: chunks, rows read and dropped, time of each pass."""
        return self._stream_info

    @cached_property
    def resid(self) -> pd.DataFrame:
        """Not available: the rows were not kept (raises DataNotKeptError)."""
        raise self._system._not_kept()

    @cached_property
    def fitted(self) -> pd.DataFrame:
        """Not available: the rows were not kept (raises DataNotKeptError)."""
        raise self._system._not_kept()

    @cached_property
    def mcelroy_r2(self) -> float:
        """McElroy's (1977) R-squared of the system, from the summaries (see :attr:`FittedSystem.mcelroy_r2`)."""
        oinv = np.linalg.inv(self._est.omega)
        num = np.sum(oinv * np.asarray(self._est.resid_crossprod))
        den = np.sum(oinv * self._ycross)
        return float(1.0 - num / den)

    def refit(self, method: str = "fgls", *, omega: str = "ml", tol: float = 1e-10, max_iter: int = 1000,
              restrictions: Any = None, inference: str = "z", progress: bool | None = None) -> "RowlessFit":
        """Another estimation (method, Omega divisor, restrictions) from the same summaries,
        without reading the rows again. Fits refitted from one another share their system, so
        :meth:`lr_against` can compare them."""
        opts = check_options(method, omega, tol, max_iter, restrictions, inference)
        return _make_fit(self._system, self._prepared, opts, self._stream_info, self._ycross, stacklevel=3,
                         progress=progress_wanted(progress))

    def __getstate__(self) -> dict[str, Any]:
        raise self._system._not_kept()


def _make_fit(system: _RowlessSystem, prepared: Any, opts: _Options, info: StreamInfo, ycross: np.ndarray,
              stacklevel: int, progress: bool = False) -> RowlessFit:
    est, rset = estimate_prepared(prepared, system._names, system._regressors, opts, stacklevel=stacklevel + 1,
                                  progress=progress)
    fit = RowlessFit(system, prepared, est, None, tol=opts.tol, max_iter=opts.max_iter,
                     restrictions=rset, covariance="classical", inference=opts.inference)
    fit._init_rowless(info, ycross)
    return fit


def finish(layout: Any, factors: Any, stats: Any, info: StreamInfo, opts: _Options, stacklevel: int = 3,
           progress: bool = False) -> RowlessFit:
    """The fit from merged pass-1 and pass-2 summaries of all rows."""
    names, regs = layout.names, layout.regressors
    prepared = _core.prepare_from_summaries(names, regs, factors, stats)
    for name, cond in zip(names, prepared.conditions):
        if cond > _COND_WARN:
            warnings.warn(
                f"equation '{name}': the regressors are ill-conditioned (condition number estimate "
                f"{cond:.1e} after scaling each column to unit length), so about {int(np.log10(cond))} "
                "of 16 significant digits of its coefficients may be lost; drop or combine nearly "
                "collinear regressors",
                IllConditionedWarning,
                stacklevel=stacklevel,
            )
    ycross = _y_crossprod(names, regs, factors, stats)
    system = _RowlessSystem(names, regs, prepared.n_obs, {"chunks": "chunks", "parquet": "Parquet record batches",
                                                         "dask": "Dask partitions"}.get(info.source, info.source))
    return _make_fit(system, prepared, opts, info, ycross, stacklevel=stacklevel, progress=progress)


# -- public entry points -----------------------------------------------------------------------
def _opener(chunks: Any) -> Callable[[], Iterable[Any]]:
    if callable(chunks) and not isinstance(chunks, (list, tuple)):
        def open_chunks() -> Iterable[Any]:
            it = chunks()
            if not isinstance(it, Iterable):
                raise InputError(
                    f"the chunk function returned a {type(it).__name__}; it must return an iterable of chunks"
                )
            return it

        return open_chunks
    if not isinstance(chunks, Iterable):
        raise InputError(
            f"chunks must be a list, an iterator or generator of chunks, or a function returning "
            f"one; got a {type(chunks).__name__}"
        )
    if _is_single(chunks):
        raise InputError(
            "give the chunks as a list (or a function returning an iterator of them), not one "
            f"{type(chunks).__name__}; for data in memory use EquationSystem"
        )
    return lambda: chunks


def _is_single(chunks: Any) -> bool:
    """One table or one (ys, xs) pair given where a list of chunks is expected."""
    if isinstance(chunks, (pd.DataFrame, np.ndarray, Mapping)) or _is_table_like(chunks):
        return True
    if isinstance(chunks, (tuple, list)) and len(chunks) == 2:
        head = chunks[0]
        if isinstance(head, np.ndarray):
            return True
        if isinstance(head, (list, tuple)) and head and isinstance(head[0], np.ndarray) and head[0].ndim == 1:
            return True
    return False


def _is_table_like(obj: Any) -> bool:
    mod = type(obj).__module__.split(".")[0]
    return mod in ("polars", "pyarrow") and hasattr(obj, "column_names" if mod == "pyarrow" else "columns")


def fit_chunks(
    chunks: Any,
    equations: Any = None,
    *,
    constant: bool = False,
    missing: str = "drop",
    method: str = "fgls",
    omega: str = "ml",
    tol: float = 1e-10,
    max_iter: int = 1000,
    restrictions: Any = None,
    inference: str = "z",
    progress: bool | None = None,
) -> RowlessFit:
    """Estimates a system from rows that arrive in chunks, reading them once and holding one
    chunk at a time.

    Parameters
    ----------
    chunks
        A list, iterator or generator of chunks, or a function returning an iterable of chunks
        (called once). A chunk is either a table (pandas or polars DataFrame,
        pyarrow Table or RecordBatch, dict of columns), or a pair ``(ys, xs)`` of arrays:
        ``ys`` a list of N arrays of shape (t,) or one (t, N) array, ``xs`` a list of N arrays of
        shape (t, K_i). Chunks may have any number of rows, one included.
    equations
        For table chunks: ``{name: (dependent column, [regressor columns])}`` or a list of such
        pairs (then named after the dependent column), as in :meth:`EquationSystem.from_table`.
        For array chunks: None (``eq0, eq1, ...``), a list of equation names, or
        ``{name: [regressor names]}``.
    constant
        Put a column of ones named ``Intercept`` first in every equation.
    missing
        Table chunks: ``"drop"`` skips rows with a missing or infinite value in any column the
        equations use (as :meth:`EquationSystem.from_table` does); ``"raise"`` raises
        :class:`~blocksur.errors.NonFiniteError` naming the row (counted over all chunks).
        Array chunks always raise.
    method, omega, tol, max_iter, restrictions, inference
        As in :meth:`EquationSystem.fit`; ``omega`` is ``"ml"`` or ``"dof"`` (Ledoit-Wolf
        shrinkage needs the residual rows of every step, which a streamed fit does not keep).
    progress
        tqdm progress bars for each pass (rows read) and for the GLS steps of an iterated fit:
        None (default) shows them when stderr is a terminal, True or False forces them on or
        off.

    Returns
    -------
    RowlessFit
        A :class:`FittedSystem` without row-level results (see :class:`RowlessFit`).

    Example
    -------
    >>> def chunks():                                        # doctest: +SKIP
    ...     for path in sorted(glob.glob("sales-*.csv")):
    ...         yield pandas.read_csv(path)
    >>> fit = blocksur.fit_chunks(chunks, {"north": ("sales_n", ["price_n"]),   # doctest: +SKIP
    ...                                    "south": ("sales_s", ["price_s"])}, constant=True)
    """
    _check_missing(missing)
    opts = check_options(method, omega, tol, max_iter, restrictions, inference)
    show = progress_wanted(progress)
    open_chunks = _opener(chunks)

    def make_layout(first: Any) -> Any:
        if _is_pair(first):
            return ArrayLayout.from_first(first, equations, constant)
        return ColumnLayout.from_equations(equations, first, constant, missing)

    layout, factors, stats, info = run_passes(open_chunks, make_layout, progress=show, source="chunks")
    return finish(layout, factors, stats, info, opts, progress=show)


def _parquet_files(source: Any) -> list[str]:
    if isinstance(source, (str, os.PathLike)):
        path = os.fspath(source)
        if os.path.isdir(path):
            files = sorted(
                os.path.join(root, f)
                for root, _, names in os.walk(path)
                for f in names
                if f.endswith((".parquet", ".parq", ".pq")) and not f.startswith((".", "_"))
            )
            if not files:
                raise InputError(f"the directory {path!r} holds no .parquet files")
            return files
        if not os.path.exists(path):
            raise InputError(f"no such Parquet file or directory: {path!r}")
        return [path]
    if isinstance(source, Sequence) and source and all(isinstance(s, (str, os.PathLike)) for s in source):
        files = [os.fspath(s) for s in source]
        for f in files:
            if not os.path.isfile(f):
                raise InputError(f"no such Parquet file: {f!r}")
        return files
    raise InputError(
        "give a Parquet file, a directory of Parquet files or a list of files, "
        f"not {type(source).__name__}"
    )


def fit_parquet(
    source: Any,
    equations: Any,
    *,
    batch_size: int = 65_536,
    constant: bool = False,
    missing: str = "drop",
    method: str = "fgls",
    omega: str = "ml",
    tol: float = 1e-10,
    max_iter: int = 1000,
    restrictions: Any = None,
    inference: str = "z",
    progress: bool | None = None,
) -> RowlessFit:
    """Estimates a system from Parquet files, read once in record batches of ``batch_size``
    rows with pyarrow (only the columns the equations use).

    ``source`` is a file, a directory (its ``.parquet`` files in sorted order, subdirectories
    included) or a list of files with the same columns. ``equations`` maps each equation to
    ``(dependent column, [regressor columns])`` (or is a list of such pairs); the other options
    are those of :func:`fit_chunks`. Memory: one record batch (and pyarrow's buffer of the row
    group being read) plus the P x P cross-products.

    Example
    -------
    >>> fit = blocksur.fit_parquet("sales/", {"north": ("sales_n", ["price_n"]),   # doctest: +SKIP
    ...                                       "south": ("sales_s", ["price_s"])},
    ...                            constant=True, method="ifgls", batch_size=100_000)
    """
    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise MissingDependencyError("reading Parquet needs pyarrow: pip install pyarrow", package="pyarrow") from None
    if isinstance(batch_size, bool) or not isinstance(batch_size, (int, np.integer)) or batch_size < 1:
        raise InvalidOptionError(f"batch_size must be a whole number >= 1, got {batch_size!r}")
    _check_missing(missing)
    opts = check_options(method, omega, tol, max_iter, restrictions, inference)
    show = progress_wanted(progress)
    files = _parquet_files(source)
    schema = pq.read_schema(files[0])
    layout = ColumnLayout.from_equations(equations, schema.empty_table(), constant, missing)
    total = 0
    for f in files:
        meta = pq.read_metadata(f)
        names = set(meta.schema.to_arrow_schema().names)
        lacking = [c for c in layout.needed if c not in names]
        if lacking:
            raise _unknown(_Table(meta.schema.to_arrow_schema().empty_table()), layout._spec_of[lacking[0]].name, lacking[0],
                           "the column", f"is missing from {f!r}")
        total += meta.num_rows

    def open_batches() -> Iterator[Any]:
        for f in files:
            pf = pq.ParquetFile(f, buffer_size=_READ_BUFFER, pre_buffer=False)  # pages read as needed
            try:
                yield from pf.iter_batches(batch_size=int(batch_size), columns=layout.needed, use_threads=_READ_THREADS)
            finally:
                pf.close()

    layout, factors, stats, info = run_passes(open_batches, layout, progress=show, total=total, source="parquet",
                                      what="record batch")
    return finish(layout, factors, stats, info, opts, progress=show)
