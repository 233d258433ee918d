"""Fits from data on a Dask cluster: a dask DataFrame, or dask arrays.

Each partition is summarised where it lives, by the compiled kernel running inside the worker:
pass 1 reduces it to the R factors of the equations' ``[X_i | y_i]``, pass 2 (given the merged
factors) to a P x P cross-product matrix. The summaries are merged by a Dask tree reduction
(``split_every`` summaries per task), so only these small matrices travel between workers and to
the client; the rows never leave the workers. The result equals the in-memory fit to rounding.

The two passes read the partitions twice; persist the collection first
(``frame = frame.persist()``) if computing its partitions is expensive.

Example
-------
>>> import dask.dataframe as dd                                    # doctest: +SKIP
>>> frame = dd.read_parquet("sales/")                               # doctest: +SKIP
>>> fit = blocksur.fit_dask(frame, {"north": ("sales_n", ["price_n"]),   # doctest: +SKIP
...                                 "south": ("sales_s", ["price_s"])}, constant=True)
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import pandas as pd

from . import _core
from ._frame import _Table
from ._stream import (
    ArrayLayout,
    ColumnLayout,
    RowlessFit,
    StreamInfo,
    _check_missing,
    check_options,
    check_same_rows,
    finish,
)
from .errors import BlocksurError, InputError, InvalidOptionError, MissingDependencyError, ShapeMismatchError

__all__ = ["fit_dask"]


def _dask() -> Any:
    try:
        import dask
    except ImportError:
        raise MissingDependencyError(
            "fits from Dask collections need dask: pip install 'dask[dataframe]' distributed",
            package="dask",
        ) from None
    return dask


def _located(err: BlocksurError, where: str) -> BlocksurError:
    details = {k: v for k, v in err.__dict__.items() if k != "message"}
    return type(err)(f"{where}: {err.message}", **details)


# -- work done inside the workers (module-level functions: pickled by reference) --------------
def _part_pass1(part: Any, layout: Any, index: int, offset: int) -> tuple[Any, int, int]:
    """Pass 1 of one partition: (factors or None, rows read, rows dropped)."""
    where = f"partition {index}"
    try:
        ys, xs, n_read, n_drop = layout.extract(part, where)
        out = None
        if len(ys[0]):
            out = _core.pass1_chunk(ys, xs, layout.names, layout.regressors, offset)
    except BlocksurError as err:
        raise _located(err, where) from None
    return out, n_read, n_drop


def _part_pass2(part: Any, layout: Any, factors: Any, index: int, offset: int) -> Any:
    """Pass 2 of one partition: the cross-product summary (None without rows)."""
    where = f"partition {index}"
    try:
        ys, xs, _, _ = layout.extract(part, where)
        if not len(ys[0]):
            return None
        return _core.pass2_chunk(ys, xs, factors, offset)
    except BlocksurError as err:
        raise _located(err, where) from None


def _merge_pass1(parts: list[tuple[Any, int, int]]) -> tuple[Any, int, int]:
    acc, read, dropped = None, 0, 0
    for f, r, d in parts:
        if f is not None:
            acc = f if acc is None else _core.pass1_merge(acc, f)
        read += r
        dropped += d
    return acc, read, dropped


def _merge_pass2(parts: list[Any]) -> Any:
    acc = None
    for s in parts:
        if s is not None:
            acc = s if acc is None else _core.pass2_merge(acc, s)
    return acc


def _arrays_block(ys: list[np.ndarray], xs: list[np.ndarray]) -> tuple[list[np.ndarray], list[np.ndarray]]:
    return list(ys), list(xs)


def _tree(delayed: Any, items: list[Any], merge: Any, split_every: int) -> Any:
    """Merges delayed summaries in a tree with ``split_every`` of them per task."""
    items = [delayed(merge, pure=True)(items[i : i + split_every]) for i in range(0, len(items), split_every)]
    while len(items) > 1:
        items = [delayed(merge, pure=True)(items[i : i + split_every]) for i in range(0, len(items), split_every)]
    return items[0]


# -- partitions of the two kinds of collection ------------------------------------------------
def _frame_parts(data: Any, equations: Any, constant: bool, missing: str) -> tuple[Any, list[Any], list[int]]:
    try:
        meta = data._meta
    except AttributeError:  # pragma: no cover - dask always has _meta
        meta = pd.DataFrame({c: pd.Series(dtype=t) for c, t in data.dtypes.items()})
    layout = ColumnLayout.from_equations(equations, _Table(meta), constant, missing)
    parts = data[layout.needed].to_delayed()
    return layout, list(parts), [0] * len(parts)


def _array_parts(data: Any, equations: Any, constant: bool) -> tuple[Any, list[Any], list[int]]:
    import dask.array as da

    if not (isinstance(data, (tuple, list)) and len(data) == 2):
        raise InputError("give a dask DataFrame or a pair (ys, xs) of dask arrays")
    ys, xs = data
    if isinstance(ys, da.Array) and ys.ndim == 2:
        ys = [ys[:, i] for i in range(ys.shape[1])]
    ys, xs = list(ys), list(xs)
    if len(ys) != len(xs) or not ys:
        raise ShapeMismatchError(f"{len(ys)} dependent variables and {len(xs)} regressor matrices")
    for a in [*ys, *xs]:
        if not isinstance(a, da.Array):
            raise InputError(f"expected dask arrays, got a {type(a).__name__}; for numpy arrays use EquationSystem")
    xs = [x if x.ndim == 2 else x[:, None] for x in xs]
    t = ys[0].shape[0]
    if any(np.isnan(a.shape[0]) for a in [*ys, *xs]):
        raise InputError("the arrays have unknown chunk sizes: call compute_chunk_sizes() on them first")
    for i, a in enumerate([*ys, *xs]):
        if a.shape[0] != t:
            raise ShapeMismatchError(f"array {i} has {a.shape[0]} rows, the first dependent variable {t}")
    rows = ys[0].chunks[0]
    ys = [y.rechunk((rows,)) for y in ys]
    xs = [x.rechunk((rows, -1)) for x in xs]
    meta = ([np.zeros(0) for _ in ys], [np.zeros((0, x.shape[1])) for x in xs])
    layout = ArrayLayout.from_first(meta, equations, constant)
    yb = [y.to_delayed().ravel() for y in ys]
    xb = [x.to_delayed()[:, 0] for x in xs]
    from dask import delayed

    parts = [
        delayed(_arrays_block, pure=True)([b[j] for b in yb], [b[j] for b in xb]) for j in range(len(rows))
    ]
    offsets = list(np.concatenate([[0], np.cumsum(rows)[:-1]]).astype(int))
    return layout, parts, offsets


def fit_dask(
    data: Any,
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
    split_every: int = 8,
    scheduler: Any = None,
) -> RowlessFit:
    """Estimates a system from a dask DataFrame or dask arrays; the rows stay in the workers.

    Parameters
    ----------
    data
        A dask DataFrame (with ``equations`` as column pairs), or a pair ``(ys, xs)`` of dask
        arrays: ``ys`` a list of N 1-D arrays (or one (T, N) array), ``xs`` a list of N (T, K_i)
        arrays, all with the same number of rows (rechunked to the row chunks of the first y).
    equations
        For a DataFrame: ``{name: (dependent column, [regressor columns])}`` or a list of pairs.
        For arrays: None, a list of names or ``{name: [regressor names]}``.
    constant, missing, method, omega, tol, max_iter, restrictions, inference
        As in :func:`fit_chunks` (``omega`` is ``"ml"`` or ``"dof"``).
    split_every
        How many partition summaries one reduction task merges (the fan-in of the tree).
    scheduler
        Passed to ``dask.compute``; by default the active ``distributed.Client`` if any, else
        Dask's default scheduler.

    Returns
    -------
    RowlessFit
        A :class:`FittedSystem` without row-level results; ``stream_info.n_chunks`` counts the
        partitions. Errors in a partition (a missing column, a non-number) name it.
    """
    dask = _dask()
    from dask import delayed

    _check_missing(missing)
    opts = check_options(method, omega, tol, max_iter, restrictions, inference, where="a Dask fit")
    if isinstance(split_every, bool) or not isinstance(split_every, (int, np.integer)) or split_every < 2:
        raise InvalidOptionError(f"split_every must be a whole number >= 2, got {split_every!r}")
    kw = {} if scheduler is None else {"scheduler": scheduler}
    if hasattr(data, "to_delayed") and hasattr(data, "columns"):
        layout, parts, offsets = _frame_parts(data, equations, constant, missing)
    elif isinstance(data, (tuple, list)):
        layout, parts, offsets = _array_parts(data, equations, constant)
    else:
        raise InputError(
            f"fit_dask takes a dask DataFrame or a pair (ys, xs) of dask arrays, not {type(data).__name__}"
        )
    if not parts:
        raise InputError("the collection has no partitions")
    t0 = time.perf_counter()
    # delayed(...) of the layout once, so that it is shipped once per worker, not per task
    lay = delayed(layout, pure=True)
    p1 = [delayed(_part_pass1, pure=True)(p, lay, i, off) for i, (p, off) in enumerate(zip(parts, offsets))]
    (factors, read, dropped), = dask.compute(_tree(delayed, p1, _merge_pass1, split_every), **kw)
    if factors is None:
        raise InputError(
            "the collection held no rows" + (f" ({dropped} rows dropped for missing values)" if dropped else "")
        )
    _core.pass1_check(layout.names, factors)  # a y out of range stops here, before pass 2
    t1 = time.perf_counter()
    fac = delayed(factors, pure=True)
    p2 = [delayed(_part_pass2, pure=True)(p, lay, fac, i, off) for i, (p, off) in enumerate(zip(parts, offsets))]
    (stats,) = dask.compute(_tree(delayed, p2, _merge_pass2, split_every), **kw)
    if stats is None:
        raise InputError("the second pass read no rows: the partitions changed between the passes")
    check_same_rows(factors, stats, layout.names)
    info = StreamInfo("dask", len(parts), int(read), int(dropped), (t1 - t0, time.perf_counter() - t1))
    return finish(layout, factors, stats, info, opts)

