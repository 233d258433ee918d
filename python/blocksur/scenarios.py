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

__all__ = [
    "Scenario",
    "TableScenario",
    "grid_load",
    "grid_load_table",
    "household_budget",
    "random_system",
    "store_network",
]


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
    doy = days.day_of_year.to_numpy()
    base_temp = 12 - 10 * np.cos(2 * np.pi * (doy - 15) / 365.25)
    weekend = (days.day_of_week >= 5).astype(float)
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


# -- scenarios as one table (for EquationSystem.from_table and the notebooks) ---------------------
@dataclass
class TableScenario:
    """A generated system stored as one wide table.

    ``frame`` holds every column (missing values included where the scenario has them),
    ``equations`` the specification to give :meth:`EquationSystem.from_table` (formulas or
    column pairs), ``future`` new rows for a forecast (or ``None``), ``true_coef`` the
    generating coefficients per equation (named as the fit names them), ``true_omega`` the
    error covariance.
    """

    frame: pd.DataFrame
    equations: dict[str, object]
    true_coef: dict[str, pd.Series]
    true_omega: pd.DataFrame
    description: str
    future: pd.DataFrame | None = None


_DISTRICTS = ["harbour", "hillside", "oldtown", "riverside", "millfield", "airfield", "lakeshore", "northgate"]


def _day_types(days: pd.DatetimeIndex) -> np.ndarray:
    out = np.where(days.day_of_week == 5, "saturday", np.where(days.day_of_week == 6, "sunday", "workday"))
    holiday = ((days.month == 1) & (days.day == 1)) | ((days.month == 5) & (days.day == 1)) | (
        (days.month == 12) & np.isin(days.day, [25, 26])
    )
    return np.where(holiday, "holiday", out).astype(object)


def grid_load_table(
    n_districts: int = 4, n_days: int = 730, seed: int = 7, n_future: int = 14, missing: float = 0.01
) -> TableScenario:
    """Daily electricity load (MWh) of the districts of an invented regional grid, as one table.

    Columns per district ``d``: ``load_d``, ``hdd_d`` and ``cdd_d`` (heating and cooling
    degree-days from the district's own temperature), and a local driver (``industry_d``, an
    activity index, or ``visitors_d``, thousands of visitors); shared columns: ``day_type``
    (workday, saturday, sunday, holiday). A regional weather shock hits every district on the
    same day, so the errors are strongly correlated across districts. About ``missing`` of the
    load and temperature readings are lost (meter outages). ``future`` holds the next
    ``n_future`` days with forecast weather and drivers, for prediction.

    Example
    -------
    >>> from blocksur.scenarios import grid_load_table
    >>> s = grid_load_table(n_districts=2, n_days=60, seed=1)
    >>> list(s.equations)
    ['harbour', 'hillside']
    """
    if not 1 <= n_districts <= len(_DISTRICTS):
        raise ValueError(f"n_districts must be between 1 and {len(_DISTRICTS)}")
    rng = np.random.default_rng(seed)
    total = n_days + n_future
    days = pd.date_range("2022-01-03", periods=total, freq="D", name="date")
    doy = days.day_of_year.to_numpy()
    day_type = _day_types(days)
    regional = 13 - 10 * np.cos(2 * np.pi * (doy - 20) / 365.25) + np.convolve(
        rng.normal(0, 2.0, total + 6), np.ones(7) / np.sqrt(7), mode="valid"
    )
    names = _DISTRICTS[:n_districts]
    # errors: one shared weather shock plus district noise
    load = rng.uniform(0.6, 0.9, n_districts)
    noise_sd = rng.uniform(5.0, 9.0, n_districts)
    scale = rng.uniform(8.0, 14.0, n_districts)
    omega = np.outer(load * scale, load * scale) + np.diag((1 - load**2) * scale**2)
    shock = rng.standard_normal(total)
    errors = np.outer(shock, load * scale) + rng.standard_normal((total, n_districts)) * np.sqrt(
        (1 - load**2) * scale**2
    )
    del noise_sd
    cols: dict[str, np.ndarray] = {"day_type": day_type}
    equations: dict[str, object] = {}
    truth: dict[str, pd.Series] = {}
    for i, d in enumerate(names):
        temp = regional + rng.normal(0, 1.2, total) + rng.normal(0, 1.5)
        hdd = np.maximum(15.5 - temp, 0.0)
        cdd = np.maximum(temp - 20.0, 0.0)
        if i % 2 == 0:
            driver = f"industry_{d}"
            x = 100 + np.cumsum(rng.normal(0, 0.5, total))
        else:
            driver = f"visitors_{d}"
            x = 20 + 8 * np.sin(2 * np.pi * doy / 365.25 + i) + rng.normal(0, 2, total)
        beta = {
            "Intercept": 120 + 60 * rng.random(),
            "C(day_type)[T.saturday]": -12 - 6 * rng.random(),
            "C(day_type)[T.sunday]": -20 - 8 * rng.random(),
            "C(day_type)[T.workday]": 6 + 4 * rng.random(),
            f"hdd_{d}": 3.0 + 2.0 * rng.random(),
            f"cdd_{d}": 4.0 + 3.0 * rng.random(),
            driver: 0.4 + 0.5 * rng.random(),
        }
        effect = np.select(
            [day_type == "saturday", day_type == "sunday", day_type == "workday"],
            [beta["C(day_type)[T.saturday]"], beta["C(day_type)[T.sunday]"], beta["C(day_type)[T.workday]"]],
            0.0,
        )
        y = beta["Intercept"] + effect + beta[f"hdd_{d}"] * hdd + beta[f"cdd_{d}"] * cdd + beta[driver] * x
        y = y + errors[:, i]
        cols[f"load_{d}"] = y
        cols[f"hdd_{d}"] = hdd
        cols[f"cdd_{d}"] = cdd
        cols[driver] = x
        equations[d] = f"load_{d} ~ C(day_type) + hdd_{d} + cdd_{d} + {driver}"
        truth[d] = pd.Series(beta)
    frame = pd.DataFrame(cols, index=days)
    past, future = frame.iloc[:n_days].copy(), frame.iloc[n_days:].copy()
    for d in names:
        for c in (f"load_{d}", f"hdd_{d}"):
            lost = rng.random(n_days) < missing
            past.loc[lost, c] = np.nan
        future = future.drop(columns=f"load_{d}")
    return TableScenario(
        frame=past,
        equations=equations,
        true_coef=truth,
        true_omega=pd.DataFrame(omega, index=names, columns=names),
        description=(
            f"daily load of {n_districts} districts over {n_days} days; a shared weather shock "
            "correlates their errors"
        ),
        future=future if n_future else None,
    )


_GOODS = ["food", "housing", "transport", "leisure"]


def household_budget(n_obs: int = 900, seed: int = 11) -> TableScenario:
    """Budget shares of four invented goods groups (food, housing, transport, leisure) in a
    linear approximate demand system:

    ``share_i = a_i + sum_j g_ij lp_j + b_i lx_real + e_i``

    with ``lp_j`` the log price of group j (prices vary across regions and quarters) and
    ``lx_real`` the log of total spending deflated by a fixed-weight price index. The true
    parameters satisfy adding-up (``sum a_i = 1``, ``sum_i g_ij = 0``, ``sum b_i = 0``),
    homogeneity (``sum_j g_ij = 0``) and symmetry (``g_ij = g_ji``); the errors add up to zero
    across the four shares, so their covariance is singular.

    Example
    -------
    >>> from blocksur.scenarios import household_budget
    >>> s = household_budget(n_obs=100)
    >>> bool(abs(s.frame.filter(like="share_").sum(axis=1) - 1).max() < 1e-12)
    True
    """
    rng = np.random.default_rng(seed)
    n = len(_GOODS)
    a = np.array([0.34, 0.31, 0.15, 0.20])
    b = np.array([-0.07, 0.01, 0.02, 0.04])
    raw = rng.normal(0, 0.05, (n, n))
    raw = (raw + raw.T) / 2
    g = raw - raw.mean(axis=0) - raw.mean(axis=1)[:, None] + raw.mean()
    regions, quarters = 8, 12
    cell = rng.integers(0, regions * quarters, n_obs)
    level = rng.normal(0, 0.12, (regions * quarters, n))
    lp = level[cell] + rng.normal(0, 0.04, (n_obs, n))
    w0 = a  # weights of the fixed-weight index
    lx = rng.normal(0.0, 0.45, n_obs) + 0.2 * rng.standard_normal() + lp @ w0
    lx_real = lx - lp @ w0
    c = rng.uniform(0.4, 0.8, (n - 1, n - 1))
    cov3 = 0.015**2 * (c @ c.T + 0.3 * np.eye(n - 1))
    e3 = rng.multivariate_normal(np.zeros(n - 1), cov3, size=n_obs)
    e = np.column_stack([e3, -e3.sum(axis=1)])
    shares = a + lp @ g.T + np.outer(lx_real, b) + e
    cols = {f"share_{k}": shares[:, i] for i, k in enumerate(_GOODS)}
    cols.update({f"lp_{k}": lp[:, i] for i, k in enumerate(_GOODS)})
    cols["lx_real"] = lx_real
    cols["region"] = np.array([f"r{c // quarters + 1}" for c in cell], dtype=object)
    frame = pd.DataFrame(cols, index=pd.RangeIndex(n_obs, name="household"))
    rhs = " + ".join(f"lp_{k}" for k in _GOODS) + " + lx_real"
    equations = {k: f"share_{k} ~ {rhs}" for k in _GOODS}
    truth = {
        k: pd.Series([a[i], *g[i], b[i]], index=["Intercept", *[f"lp_{j}" for j in _GOODS], "lx_real"])
        for i, k in enumerate(_GOODS)
    }
    full = np.zeros((n, n))
    full[: n - 1, : n - 1] = cov3
    full[n - 1, : n - 1] = full[: n - 1, n - 1] = -cov3.sum(axis=1)
    full[n - 1, n - 1] = cov3.sum()
    return TableScenario(
        frame=frame,
        equations=equations,
        true_coef=truth,
        true_omega=pd.DataFrame(full, index=_GOODS, columns=_GOODS),
        description=f"budget shares of {n} goods groups for {n_obs} households",
    )


def store_network(n_stores: int = 400, n_days: int = 730, seed: int = 5, n_factors: int = 3) -> TableScenario:
    """Daily sales of the stores of an invented retail chain, as one wide table.

    Store ``s`` (named ``s001``, ``s002``, ...) has columns ``sales_s``, ``price_s`` (its own
    price index) and ``promo_s`` (1 on promotion days); ``holiday`` is shared. Regional demand
    shocks (``n_factors`` common factors) correlate the errors of all stores. Each equation is
    given as a column pair, to be built with ``constant=True``.

    Example
    -------
    >>> from blocksur.scenarios import store_network
    >>> s = store_network(n_stores=5, n_days=50)
    >>> s.equations["s001"]
    ('sales_s001', ['price_s001', 'promo_s001', 'holiday'])
    """
    rng = np.random.default_rng(seed)
    days = pd.date_range("2023-01-02", periods=n_days, freq="D", name="date")
    holiday = np.isin(days.day_of_year, [1, 2, 100, 121, 220, 358, 359, 360]).astype(float)
    loadings = rng.normal(0, 1.0, (n_stores, n_factors)) * rng.uniform(0.5, 1.5, (n_stores, 1))
    idio = rng.uniform(0.6, 1.4, n_stores)
    factors = rng.standard_normal((n_days, n_factors))
    errors = factors @ loadings.T + rng.standard_normal((n_days, n_stores)) * idio
    omega = loadings @ loadings.T + np.diag(idio**2)
    names = [f"s{i + 1:03d}" for i in range(n_stores)]
    price = 1.0 + 0.05 * rng.standard_normal((n_days, n_stores)) + 0.03 * np.sin(
        2 * np.pi * np.arange(n_days)[:, None] / 91 + rng.uniform(0, 6, n_stores)
    )
    promo = (rng.random((n_days, n_stores)) < 0.1).astype(float)
    coef = np.column_stack(
        [rng.uniform(40, 80, n_stores), rng.uniform(-30, -10, n_stores), rng.uniform(3, 9, n_stores),
         rng.uniform(5, 15, n_stores)]
    )
    sales = coef[:, 0] + coef[:, 1] * price + coef[:, 2] * promo + np.outer(holiday, coef[:, 3]) + errors
    blocks = {"holiday": holiday}
    for i, s in enumerate(names):
        blocks[f"sales_{s}"] = sales[:, i]
        blocks[f"price_{s}"] = price[:, i]
        blocks[f"promo_{s}"] = promo[:, i]
    frame = pd.DataFrame(blocks, index=days)
    equations = {s: (f"sales_{s}", [f"price_{s}", f"promo_{s}", "holiday"]) for s in names}
    truth = {
        s: pd.Series(coef[i], index=["Intercept", f"price_{s}", f"promo_{s}", "holiday"])
        for i, s in enumerate(names)
    }
    return TableScenario(
        frame=frame,
        equations=equations,
        true_coef=truth,
        true_omega=pd.DataFrame(omega, index=names, columns=names),
        description=f"daily sales of {n_stores} stores over {n_days} days; regional shocks",
    )
