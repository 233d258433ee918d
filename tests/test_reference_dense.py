"""blocksur vs the dense textbook SUR estimator (statsmodels GLS on the stacked
system) and vs statsmodels OLS equation by equation, on seeded random systems
with correlated errors and unequal K_i."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import blocksur
from reference import (
    dense_gls,
    dense_ifgls,
    dense_ols_cov,
    expected_index,
    make_sur_data,
    max_rel,
    max_rel_coef,
    max_rel_cov,
    ols_by_equation,
    omega_from_resid,
    record,
    resid_matrix,
    stack,
)

# (seed, T, ks, const): unequal K_i; one equation without a constant column.
CASES = [
    (11, 60, (3, 5, 2, 4), (True, True, False, True)),
    (12, 25, (2, 6, 3), (True, True, True)),
    (13, 40, (4, 1, 3, 2, 5), (True, False, True, True, True)),
]
CASE_IDS = [f"seed{c[0]}-T{c[1]}-K{'-'.join(map(str, c[2]))}" for c in CASES]

RTOL = 1e-9  # relative agreement asked of every dense-reference comparison


def _data(case):
    seed, T, ks, const = case
    return make_sur_data(seed, T=T, ks=ks, const=const)


def _ks(eqs):
    return [X.shape[1] for _, X in eqs.values()]


# ---------------------------------------------------------------------------
# The reference itself


def test_reference_covariance_attribute():
    # Check of the reference (no blocksur): statsmodels GLS
    # normalized_cov_params is (X' Sigma^-1 X)^-1 with no scale, computed here
    # independently by numpy from the textbook formula; cov_params() carries
    # the extra factor `scale` and is therefore NOT the SUR covariance.
    eqs = _data(CASES[0])
    y, Xb, T, ks = stack(eqs)
    E = np.column_stack([r.resid for r in ols_by_equation(eqs).values()])
    # x4 so that the whitened residual variance (statsmodels' `scale`) is far
    # from 1 and the two covariance attributes cannot coincide.
    omega = 4.0 * omega_from_resid(E, ks, "ml")
    sigma = np.kron(omega, np.eye(T))
    res = sm.GLS(y, Xb, sigma=sigma).fit()
    si = np.linalg.inv(sigma)
    textbook_cov = np.linalg.inv(Xb.T @ si @ Xb)
    textbook_b = textbook_cov @ Xb.T @ si @ y
    np.testing.assert_allclose(res.normalized_cov_params, textbook_cov, rtol=1e-9, atol=0)
    np.testing.assert_allclose(res.params, textbook_b, rtol=1e-9, atol=0)
    np.testing.assert_allclose(res.cov_params(), res.scale * textbook_cov, rtol=1e-9, atol=0)
    assert abs(res.scale - 1.0) > 0.5  # so the two attributes really differ here
    b, V = dense_gls(eqs, omega)
    np.testing.assert_allclose(V, textbook_cov, rtol=1e-9, atol=0)


# ---------------------------------------------------------------------------
# Two-step FGLS


@pytest.mark.parametrize("divisor", ["ml", "dof"])
@pytest.mark.parametrize("case", CASES, ids=CASE_IDS)
def test_fgls_vs_dense_gls(case, divisor, route):
    eqs = _data(case)
    fit = blocksur.EquationSystem(eqs).fit("fgls", omega=divisor)
    assert fit._prepared.residuals_only == (route == "one-pass")
    names = list(eqs)
    idx = expected_index(eqs)

    # Labels and bookkeeping (API contract).
    assert list(fit.coef.index) == idx
    assert list(fit.se.index) == idx
    assert list(fit.vcov.index) == idx and list(fit.vcov.columns) == idx
    assert list(fit.omega.index) == names and list(fit.omega.columns) == names
    assert list(fit.resid.columns) == names and list(fit.fitted.columns) == names
    assert fit.method == "fgls" and fit.omega_divisor == divisor
    assert fit.n_iter == 1 and fit.converged is True
    assert (fit.n_obs, fit.n_eq, fit.n_coef) == (case[1], len(eqs), sum(_ks(eqs)))

    # Omega of the GLS step = the divisor formula on statsmodels OLS residuals.
    E_ols = np.column_stack([r.resid for r in ols_by_equation(eqs).values()])
    omega_ref = omega_from_resid(E_ols, _ks(eqs), divisor)
    d = record(f"dense: fgls omega vs statsmodels-OLS resid formula [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel, CS-scaled)",
               max_rel_cov(fit.omega.to_numpy(), omega_ref))
    assert d <= 1e-10

    # Coefficients and covariance: statsmodels GLS on the dense textbook
    # system with the Omega blocksur reports.
    b_ref, V_ref = dense_gls(eqs, fit.omega.to_numpy())
    se_ref = np.sqrt(np.diag(V_ref))
    d = record(f"dense: fgls coef [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel)", max_rel_coef(fit.coef.to_numpy(), b_ref, se_ref))
    assert d <= RTOL
    d = record(f"dense: fgls vcov [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel, CS-scaled)", max_rel_cov(fit.vcov.to_numpy(), V_ref))
    assert d <= RTOL
    d = record(f"dense: fgls se [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel)", max_rel(fit.se.to_numpy(), se_ref))
    assert d <= RTOL

    # Residuals / fitted values from the reference coefficients.
    E_ref = resid_matrix(eqs, b_ref)
    ys = np.column_stack([y for y, _ in eqs.values()])
    scale = np.std(ys, axis=0)
    np.testing.assert_allclose(fit.resid.to_numpy(), E_ref, rtol=0, atol=RTOL * scale.max())
    np.testing.assert_allclose(fit.fitted.to_numpy(), ys - E_ref, rtol=0, atol=RTOL * scale.max())
    # ssr and resid_se by their definitions (sum of squares; sqrt(ssr/(T-K_i))).
    ssr_ref = (E_ref**2).sum(axis=0)
    np.testing.assert_allclose(fit.ssr.to_numpy(), ssr_ref, rtol=RTOL, atol=0)
    T = case[1]
    np.testing.assert_allclose(
        fit.resid_se.to_numpy(), np.sqrt(ssr_ref / (T - np.array(_ks(eqs)))), rtol=RTOL, atol=0
    )
    assert list(fit.ssr.index) == names


@pytest.mark.parametrize("divisor", ["ml", "dof"])
@pytest.mark.parametrize("case", CASES[:2], ids=CASE_IDS[:2])
def test_fgls_full_pipeline_vs_dense(case, divisor, route):
    # Independent end to end: statsmodels OLS -> Omega formula -> statsmodels
    # GLS on the dense system, without using anything blocksur reports.
    eqs = _data(case)
    fit = blocksur.EquationSystem(eqs).fit("fgls", omega=divisor)
    assert fit._prepared.residuals_only == (route == "one-pass")
    E_ols = np.column_stack([r.resid for r in ols_by_equation(eqs).values()])
    b_ref, V_ref = dense_gls(eqs, omega_from_resid(E_ols, _ks(eqs), divisor))
    d = record(f"dense: fgls end-to-end coef [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel)",
               max_rel_coef(fit.coef.to_numpy(), b_ref, np.sqrt(np.diag(V_ref))))
    assert d <= RTOL
    d = record(f"dense: fgls end-to-end vcov [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel, CS-scaled)", max_rel_cov(fit.vcov.to_numpy(), V_ref))
    assert d <= RTOL


def test_fgls_differs_from_ols():
    # Guard that the data really exercise the cross-equation weighting: with
    # correlated errors and different regressors FGLS != OLS (Zellner 1962).
    eqs = _data(CASES[0])
    sysm = blocksur.EquationSystem(eqs)
    b_ols = sysm.fit("ols").coef.to_numpy()
    f = sysm.fit("fgls")
    assert max_rel_coef(f.coef.to_numpy(), b_ols, f.se.to_numpy()) > 1e-3


# ---------------------------------------------------------------------------
# Iterated FGLS


@pytest.mark.parametrize("divisor", ["ml", "dof"])
@pytest.mark.parametrize("case", CASES, ids=CASE_IDS)
def test_ifgls_vs_dense_gls(case, divisor):
    eqs = _data(case)
    fit = blocksur.EquationSystem(eqs).fit("ifgls", omega=divisor, tol=1e-12)
    assert fit.method == "ifgls" and fit.omega_divisor == divisor
    assert fit.converged is True
    assert fit.n_iter >= 2
    path = np.asarray(fit.criterion_path, dtype=float)
    assert path.ndim == 1 and 1 <= path.size <= fit.n_iter
    assert path[-1] <= 1e-12  # converged => last criterion within tol

    # Final GLS step vs statsmodels GLS on the dense system with the same Omega.
    b_ref, V_ref = dense_gls(eqs, fit.omega.to_numpy())
    se_ref = np.sqrt(np.diag(V_ref))
    d = record(f"dense: ifgls coef [{divisor}] (rel)", max_rel_coef(fit.coef.to_numpy(), b_ref, se_ref))
    assert d <= RTOL
    d = record(f"dense: ifgls vcov [{divisor}] (rel, CS-scaled)", max_rel_cov(fit.vcov.to_numpy(), V_ref))
    assert d <= RTOL

    # Independent fixed point: dense statsmodels GLS iterated to full
    # convergence. blocksur stops at tol=1e-12 on its own criterion, so the
    # remaining gap is an iteration gap, hence the looser 1e-7.
    b_it, V_it, omega_it, _ = dense_ifgls(eqs, divisor)
    d = record(f"dense: ifgls coef vs independent iteration [{divisor}] (rel)",
               max_rel_coef(fit.coef.to_numpy(), b_it, np.sqrt(np.diag(V_it))))
    assert d <= 1e-7
    d = record(f"dense: ifgls omega vs independent iteration [{divisor}] (rel, CS-scaled)",
               max_rel_cov(fit.omega.to_numpy(), omega_it))
    assert d <= 1e-7


# ---------------------------------------------------------------------------
# OLS step


@pytest.mark.parametrize("case", CASES, ids=CASE_IDS)
def test_ols_vs_statsmodels_ols(case):
    eqs = _data(case)
    T = case[1]
    sysm = blocksur.EquationSystem(eqs)
    fit = sysm.fit("ols", omega="dof")
    assert fit.method == "ols" and fit.n_iter == 0 and fit.converged is True
    ref = ols_by_equation(eqs)
    V = fit.vcov
    worst = {"coef": 0.0, "se": 0.0, "vcov": 0.0, "r2": 0.0, "r2_adj": 0.0, "ssr": 0.0, "resid": 0.0}
    for nm, r in ref.items():
        # statsmodels OLS, equation by equation.
        bse = np.asarray(r.bse)
        worst["coef"] = max(worst["coef"], max_rel_coef(fit.coef[nm].to_numpy(), r.params, bse))
        # omega="dof": omega_ii = ssr_i / (T - K_i) = statsmodels' scale, so the
        # diagonal blocks are statsmodels' cov_params exactly (API contract).
        worst["se"] = max(worst["se"], max_rel(fit.se[nm].to_numpy(), bse))
        worst["vcov"] = max(worst["vcov"], max_rel_cov(V.loc[nm, nm].to_numpy(), np.asarray(r.cov_params())))
        # r2 centred with a constant, uncentred without, like statsmodels OLS.
        worst["r2"] = max(worst["r2"], abs(fit.r2[nm] - r.rsquared) / abs(r.rsquared))
        worst["r2_adj"] = max(worst["r2_adj"], abs(fit.r2_adj[nm] - r.rsquared_adj) / abs(r.rsquared_adj))
        worst["ssr"] = max(worst["ssr"], abs(fit.ssr[nm] - r.ssr) / r.ssr)
        sd = np.std(eqs[nm][0])
        worst["resid"] = max(worst["resid"], float(np.max(np.abs(fit.resid[nm].to_numpy() - r.resid))) / sd)
        np.testing.assert_allclose(fit.fitted[nm].to_numpy(), r.fittedvalues, rtol=0, atol=1e-10 * sd)
        np.testing.assert_allclose(fit.resid_se[nm], np.sqrt(r.scale), rtol=1e-10, atol=0)
    for k, v in worst.items():
        record(f"statsmodels OLS: ols {k} (rel)", v)
    assert worst["coef"] <= 1e-10
    assert worst["se"] <= 1e-10
    assert worst["vcov"] <= 1e-10
    assert worst["r2"] <= 1e-10
    assert worst["r2_adj"] <= 1e-10
    assert worst["ssr"] <= 1e-10
    assert worst["resid"] <= 1e-10


def test_ols_uncentred_r2_really_differs():
    # Guard for the previous test: in CASES[0] equation "c" has no constant,
    # and statsmodels' uncentred R^2 differs from the centred formula there.
    eqs = _data(CASES[0])
    y, X = eqs["c"]
    r = sm.OLS(y, X).fit()
    centred = 1 - r.ssr / np.sum((y - y.mean()) ** 2)
    assert abs(r.rsquared - centred) > 1e-3
    fit = blocksur.EquationSystem(eqs).fit("ols")
    np.testing.assert_allclose(fit.r2["c"], r.rsquared, rtol=1e-10, atol=0)


@pytest.mark.parametrize("divisor", ["ml", "dof"])
@pytest.mark.parametrize("case", CASES, ids=CASE_IDS)
def test_ols_full_vcov_vs_dense_sandwich(case, divisor):
    eqs = _data(case)
    fit = blocksur.EquationSystem(eqs).fit("ols", omega=divisor)
    assert fit.omega_divisor == divisor
    # Omega = divisor formula on statsmodels OLS residuals.
    E_ols = np.column_stack([r.resid for r in ols_by_equation(eqs).values()])
    omega_ref = omega_from_resid(E_ols, _ks(eqs), divisor)
    d = record(f"dense: ols omega [{divisor}] (rel, CS-scaled)", max_rel_cov(fit.omega.to_numpy(), omega_ref))
    assert d <= 1e-10
    # Full system covariance incl. cross-equation blocks: textbook sandwich
    # (X'X)^-1 X'(Omega kron I)X (X'X)^-1 of stacked OLS, dense numpy.
    V_ref = dense_ols_cov(eqs, omega_ref)
    d = record(f"dense: ols full vcov sandwich [{divisor}] (rel, CS-scaled)", max_rel_cov(fit.vcov.to_numpy(), V_ref))
    assert d <= RTOL
    np.testing.assert_allclose(fit.se.to_numpy(), np.sqrt(np.diag(V_ref)), rtol=RTOL, atol=0)
    if divisor == "ml":
        # omega_ii = ssr/T, so the diagonal blocks are (T-K_i)/T times
        # statsmodels' OLS cov_params.
        T = case[1]
        for nm, r in ols_by_equation(eqs).items():
            k = eqs[nm][1].shape[1]
            np.testing.assert_allclose(
                fit.vcov.loc[nm, nm].to_numpy(), np.asarray(r.cov_params()) * (T - k) / T, rtol=1e-9, atol=1e-9 * np.max(np.abs(r.cov_params()))
            )


def test_regressor_names_label_results():
    eqs = _data(CASES[1])
    names = {nm: [f"{nm}_r{j}" for j in range(X.shape[1])] for nm, (_, X) in eqs.items()}
    fit = blocksur.EquationSystem(eqs, regressor_names=names).fit("fgls")
    assert list(fit.coef.index) == expected_index(eqs, names)
    assert list(fit.vcov.columns) == expected_index(eqs, names)
    # Same numbers as with default names.
    base = blocksur.EquationSystem(eqs).fit("fgls")
    np.testing.assert_array_equal(fit.coef.to_numpy(), base.coef.to_numpy())
    # List-of-lists form in equation order gives the same labels.
    fit2 = blocksur.EquationSystem(eqs, regressor_names=[names[k] for k in eqs]).fit("fgls")
    assert list(fit2.coef.index) == expected_index(eqs, names)
    assert isinstance(fit.coef, pd.Series) and isinstance(fit.vcov, pd.DataFrame)


# ---------------------------------------------------------------------------
# Equations with a single regressor (K_i = 1): a regression through the origin
# and a constant-only equation.


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_single_regressor_equations(method):
    base = make_sur_data(14, T=30, ks=(3, 1, 2), const=(True, False, True))
    rng = np.random.default_rng(14)
    # Equation "d": constant only (its OLS coefficient is the mean of y).
    eqs = dict(base)
    eqs["d"] = (2.0 + base["a"][0] * 0.3 + rng.standard_normal(30), np.ones((30, 1)))
    fit = blocksur.EquationSystem(eqs).fit(method, omega="dof")
    if method == "ols":
        for nm, r in ols_by_equation(eqs).items():
            np.testing.assert_allclose(fit.coef[nm].to_numpy(), r.params, rtol=1e-10, atol=0)
            np.testing.assert_allclose(fit.se[nm].to_numpy(), r.bse, rtol=1e-10, atol=0)
        np.testing.assert_allclose(fit.coef["d"].iloc[0], eqs["d"][0].mean(), rtol=1e-12, atol=0)
    b_ref, V_ref = (
        dense_gls(eqs, fit.omega.to_numpy()) if method != "ols" else (None, dense_ols_cov(eqs, fit.omega.to_numpy()))
    )
    if b_ref is not None:
        d = record(f"dense: K_i=1 equations, {method} coef (rel)",
                   max_rel_coef(fit.coef.to_numpy(), b_ref, np.sqrt(np.diag(V_ref))))
        assert d <= RTOL
    d = record(f"dense: K_i=1 equations, {method} vcov (rel, CS-scaled)", max_rel_cov(fit.vcov.to_numpy(), V_ref))
    assert d <= RTOL
