"""Shared data and comparisons for tests/test_scale_*.py (a helper module, not tests).

The reference for every fit over chunks, Parquet batches or Dask partitions is the in-memory fit
of the same rows (``EquationSystem.from_table(...).fit(...)`` or ``EquationSystem(...).fit``):
the streamed paths reorder the same computation, so they must agree to rounding.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from blocksur.scenarios import random_system
from reference import record

# Quantities of a fit compared between a streamed fit and its in-memory reference.
VECTORS = ("coef", "se", "omega", "ssr", "r2", "r2_adj", "resid_se", "stat", "pval")
SCALARS = ("loglik", "mcelroy_r2", "n_iter")


def wide_frame(n_eq: int = 4, n_obs: int = 157, ks=(3, 2, 4, 3), seed: int = 5, rho: float = 0.6):
    """A seeded system as one wide table (columns ``eqI_y``, ``eqI_x1``, ...; the constant is
    left out, to be added with ``constant=True``) and its column-pair equations."""
    data = random_system(n_eq, n_obs, k=list(ks)[:n_eq], rho=rho, seed=seed)
    cols = {}
    eqs = {}
    for name, (y, X) in data.equations.items():
        cols[f"{name}_y"] = y.to_numpy()
        regs = []
        for c in X.columns[1:]:  # x0 is the constant
            cols[f"{name}_{c}"] = X[c].to_numpy()
            regs.append(f"{name}_{c}")
        eqs[name] = (f"{name}_y", regs)
    return pd.DataFrame(cols), eqs


def arrays(frame: pd.DataFrame, eqs: dict) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """(ys, xs) of the wide table, without a constant column."""
    ys = [frame[y].to_numpy() for y, _ in eqs.values()]
    xs = [frame[r].to_numpy() for _, r in eqs.values()]
    return ys, xs


def rel(a, b) -> float:
    """Normwise relative difference max|a - b| / max|b|."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), np.finfo(float).tiny))


def assert_same_fit(fit, ref, key: str, rtol: float = 1e-10, scalars=SCALARS) -> None:
    """``fit`` equals the in-memory ``ref`` (reference: in-memory EquationSystem.fit on the same
    rows) to relative ``rtol`` in every coefficient-shaped, per-equation and system quantity."""
    assert fit.coef.index.equals(ref.coef.index)
    for name in VECTORS:
        d = record(f"{key} vs in-memory fit: {name} (rel)", rel(getattr(fit, name), getattr(ref, name)))
        assert d <= rtol, (name, d)
    for name in scalars:
        a, b = getattr(fit, name), getattr(ref, name)
        d = record(f"{key} vs in-memory fit: {name} (rel)", abs(a - b) / max(abs(b), 1.0))
        assert d <= rtol, (name, a, b)
    assert fit.n_obs == ref.n_obs
    assert fit.converged == ref.converged
