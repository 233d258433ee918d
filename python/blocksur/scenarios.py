"""Seeded generators of synthetic systems for demos, notebooks and tests.

The scenarios are invented; no real names or data. Each generator returns plain pandas objects
and the true parameters, so that a fit can be compared with the truth.

Example
-------
>>> from blocksur.scenarios import grid_load
>>> data = grid_load(n_districts=3, n_days=100, seed=1)
>>> sorted(data.equations)[:2]
['district_1', 'district_2']
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["Scenario", "grid_load", "random_system"]


@dataclass
class Scenario:
    """A generated system: ``equations`` maps a name to ``(y, X)`` (a Series and a DataFrame),
    ``true_coef`` to the coefficients used to generate it, ``true_omega`` is the error
    covariance (N x N DataFrame)."""

    equations: dict[str, tuple[pd.Series, pd.DataFrame]]
    true_coef: dict[str, pd.Series]
    true_omega: pd.DataFrame
    description: str


def grid_load(n_districts: int = 6, n_days: int = 730, seed: int = 2024) -> Scenario:
    """Daily electricity load (MWh) in the districts of a regional grid.

    Each district's load responds to its own heating and cooling degree-days, a weekend effect,
    and one local driver (an industrial activity index in odd districts, a visitor index in even
    ones). Weather fronts hit all districts on the same day, so the errors are correlated across
    districts: the setting where a system estimator beats district-by-district OLS.
    """
    rng = np.random.default_rng(seed)
    days = pd.date_range("2023-01-01", periods=n_days, freq="D", name="date")
    doy = days.dayofyear.to_numpy()
    base_temp = 12 - 10 * np.cos(2 * np.pi * (doy - 15) / 365.25)
    weekend = (days.dayofweek >= 5).astype(float)
    # a regional weather shock shared by all districts, plus district noise
    names = [f"district_{i + 1}" for i in range(n_districts)]
    corr = 0.55 + 0.35 * rng.random((n_districts, n_districts))
    corr = (corr + corr.T) / 2
    np.fill_diagonal(corr, 1.0)
    evals, evecs = np.linalg.eigh(corr)
    corr = evecs @ np.diag(np.maximum(evals, 0.05)) @ evecs.T
    d = np.sqrt(np.diag(corr))
    corr = corr / np.outer(d, d)
    scale = 8 + 6 * rng.random(n_districts)
    omega = corr * np.outer(scale, scale)
    errors = rng.multivariate_normal(np.zeros(n_districts), omega, size=n_days)
    equations: dict[str, tuple[pd.Series, pd.DataFrame]] = {}
    truth: dict[str, pd.Series] = {}
    for i, name in enumerate(names):
        temp = base_temp + rng.normal(0, 2.5, n_days) + rng.normal(0, 1.0)
        hdd = np.maximum(15.5 - temp, 0)
        cdd = np.maximum(temp - 22.0, 0)
        if i % 2 == 0:
            driver_name = "industry_index"
            driver = 100 + np.cumsum(rng.normal(0, 0.6, n_days))
        else:
            driver_name = "visitors_k"
            driver = 20 + 8 * np.sin(2 * np.pi * doy / 365.25 + i) + rng.normal(0, 2, n_days)
        X = pd.DataFrame(
            {
                "const": 1.0,
                "heating_dd": hdd,
                "cooling_dd": cdd,
                "weekend": weekend,
                driver_name: driver,
            },
            index=days,
        )
        beta = pd.Series(
            [
                150 + 60 * rng.random(),
                3.0 + 2 * rng.random(),
                4.0 + 3 * rng.random(),
                -18 - 10 * rng.random(),
                0.4 + 0.4 * rng.random(),
            ],
            index=X.columns,
        )
        y = pd.Series(X.to_numpy() @ beta.to_numpy() + errors[:, i], index=days, name=name)
        equations[name] = (y, X)
        truth[name] = beta
    return Scenario(
        equations=equations,
        true_coef=truth,
        true_omega=pd.DataFrame(omega, index=names, columns=names),
        description=(
            f"daily load of {n_districts} districts over {n_days} days; errors share weather shocks"
        ),
    )


def random_system(
    n_eq: int,
    n_obs: int,
    k: int | list[int] = 4,
    *,
    rho: float = 0.5,
    seed: int = 0,
) -> Scenario:
    """A generic system with N equations, K_i regressors each (constant first) and
    equicorrelated errors (correlation ``rho``), for benchmarks and tests."""
    rng = np.random.default_rng(seed)
    ks = [k] * n_eq if isinstance(k, int) else list(k)
    names = [f"eq{i}" for i in range(n_eq)]
    scale = 0.5 + rng.random(n_eq)
    corr = np.full((n_eq, n_eq), rho)
    np.fill_diagonal(corr, 1.0)
    chol = np.linalg.cholesky(corr)
    errors = (rng.standard_normal((n_obs, n_eq)) @ chol.T) * scale
    omega = corr * np.outer(scale, scale)
    equations = {}
    truth = {}
    for i, name in enumerate(names):
        cols = [f"x{j}" for j in range(ks[i])]
        X = np.column_stack([np.ones(n_obs), rng.standard_normal((n_obs, ks[i] - 1))])
        beta = rng.normal(0, 1, ks[i])
        y = X @ beta + errors[:, i]
        equations[name] = (pd.Series(y, name=name), pd.DataFrame(X, columns=cols))
        truth[name] = pd.Series(beta, index=cols)
    return Scenario(
        equations=equations,
        true_coef=truth,
        true_omega=pd.DataFrame(omega, index=names, columns=names),
        description=f"random system N={n_eq}, T={n_obs}",
    )
