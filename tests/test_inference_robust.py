"""Heteroskedasticity-robust (HC0/HC1) system covariance against a brute-force sandwich, and a
Monte Carlo check of the coverage it delivers.

References:
* the system sandwich (White 1980, system form, from memory), computed by an explicit loop over
  rows t with the N x K row design X_t (inference_reference.sandwich_by_rows):
  Cov = A^-1 B A^-1, A = sum_t X_t' Omega^-1 X_t, B = sum_t X_t' Omega^-1 e_t e_t' Omega^-1 X_t
  (Omega^-1 -> I for OLS); HC1 = HC0 * T / (T - K/N) (the library's documented convention);
* restricted fits: b_r is the linear map P b + const of the unrestricted estimator
  (P = I - A^-1 R'(R A^-1 R')^-1 R, Greene from memory), hence Cov(b_r) = P A^-1 B A^-1 P'; we
  cross-check it by substitution (b = J theta + c, Z_t = X_t J, the unrestricted sandwich of
  theta mapped through J);
* statsmodels ``wald_test(cov_p=...)`` for the robust Wald statistic;
* scipy.stats / binomial standard errors for the Monte Carlo bands.
"""

import numpy as np
import pytest
import statsmodels.api as sm

import blocksur
import inference_reference as ir
import reference as ref

KS = (3, 2, 3)


def _hetero_data(seed, T=25):
    """make_sur_data with the errors rescaled by a function of the regressors, so HC0 and the
    classical covariance differ visibly."""
    eqs = ref.make_sur_data(seed, T=T, ks=KS)
    rng = np.random.default_rng(seed + 1000)
    out = {}
    for nm, (y, X) in eqs.items():
        fitted = X @ np.linalg.lstsq(X, y, rcond=None)[0]
        scale = 0.3 + np.abs(X[:, 1]) / np.abs(X[:, 1]).mean()
        out[nm] = (fitted + (y - fitted) * scale + 0.1 * rng.standard_normal(T), X)
    return out


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_hc0_hc1_vs_brute_force_sandwich(method):
    eqs = _hetero_data(51)
    s = blocksur.EquationSystem(eqs)
    f0 = s.fit(method, covariance="hc0", tol=1e-12)
    f1 = s.fit(method, covariance="hc1", tol=1e-12)
    fc = s.fit(method, tol=1e-12)
    T, N, K = f0.n_obs, f0.n_eq, f0.n_coef
    omega = None if method == "ols" else f0.omega.to_numpy()
    A, B = ir.sandwich_by_rows(eqs, f0.resid.to_numpy(), omega)
    Ai = np.linalg.inv(A)
    V0 = Ai @ B @ Ai
    err = ref.record(f"inference: HC0 vs brute-force sandwich (rel), {method}",
                     ref.max_rel_cov(f0.vcov.to_numpy(), V0))
    assert err < 1e-9
    err = ref.record(f"inference: HC1 vs brute-force sandwich * T/(T-K/N) (rel), {method}",
                     ref.max_rel_cov(f1.vcov.to_numpy(), V0 * T / (T - K / N)))
    assert err < 1e-9
    # the covariance kind changes nothing but the covariance
    np.testing.assert_array_equal(f0.coef.to_numpy(), fc.coef.to_numpy())
    np.testing.assert_allclose(f0.se.to_numpy(), np.sqrt(np.diag(V0)), rtol=1e-9)
    # with heteroskedastic errors it is visibly not the classical covariance
    assert np.max(np.abs(f0.se.to_numpy() / fc.se.to_numpy() - 1)) > 0.05


@pytest.mark.parametrize("method", ["ols", "fgls"])
def test_hc0_restricted_vs_projected_sandwich(method):
    eqs = _hetero_data(52)
    text = "a::x1 = b::x1; a::x2 + c::x2 = 1"
    pos = ir.coef_positions(eqs)
    R = np.zeros((2, sum(KS)))
    R[0, pos["a", "x1"]], R[0, pos["b", "x1"]] = 1.0, -1.0
    R[1, pos["a", "x2"]], R[1, pos["c", "x2"]] = 1.0, 1.0
    q = np.array([0.0, 1.0])
    s = blocksur.EquationSystem(eqs)
    f0 = s.fit(method, covariance="hc0", restrictions=text)
    f1 = s.fit(method, covariance="hc1", restrictions=text)
    T, N, K = f0.n_obs, f0.n_eq, f0.n_coef
    E = f0.resid.to_numpy()
    omega = None if method == "ols" else f0.omega.to_numpy()
    A, B = ir.sandwich_by_rows(eqs, E, omega)
    Ai = np.linalg.inv(A)
    _, _, P = ir.restricted_closed_form(np.zeros(K), A, R, q)
    V0 = P @ Ai @ B @ Ai @ P.T
    # the same by substitution: theta = (Z'WZ)^-1 Z'W y*, sandwich over rows with Z_t = X_t J
    J, _, _ = ir.substitution(R, q)
    Oi = np.eye(N) if omega is None else np.linalg.inv(omega)
    Az = np.zeros((K - 2, K - 2))
    Bz = np.zeros((K - 2, K - 2))
    for t in range(T):
        Zt = ir.row_design(eqs, t) @ J
        Az += Zt.T @ Oi @ Zt
        g = Zt.T @ Oi @ E[t]
        Bz += np.outer(g, g)
    Azi = np.linalg.inv(Az)
    V_sub = J @ Azi @ Bz @ Azi @ J.T
    np.testing.assert_allclose(V_sub, V0, rtol=1e-9, atol=1e-12 * np.abs(V0).max())
    err = ref.record(f"inference: restricted HC0 vs projected sandwich (rel), {method}",
                     ref.max_rel_cov(f0.vcov.to_numpy(), V0))
    assert err < 1e-9
    # HC1 with the documented factor T / (T - K/N), K counting all coefficients
    err = ref.record(f"inference: restricted HC1 vs projected sandwich * T/(T-K/N) (rel), {method}",
                     ref.max_rel_cov(f1.vcov.to_numpy(), V0 * T / (T - K / N)))
    assert err < 1e-9


@pytest.mark.parametrize("kind", ["HC0", "HC1"])
def test_ols_hc_diagonal_blocks_vs_statsmodels_per_equation(kind):
    # Equal K_i: the diagonal blocks of the system OLS sandwich are each equation's own White
    # covariance, and T/(T - K/N) = T/(T - K_i) is statsmodels' HC1 factor: statsmodels
    # OLS(...).fit(cov_type="HC0"/"HC1") per equation.
    eqs = ref.make_sur_data(54, T=25, ks=(3, 3, 3))
    fit = blocksur.EquationSystem(eqs).fit("ols", covariance=kind.lower())
    V = fit.vcov.to_numpy()
    for i, (nm, (y, X)) in enumerate(eqs.items()):
        res = sm.OLS(y, X).fit(cov_type=kind)
        blk = V[3 * i : 3 * i + 3, 3 * i : 3 * i + 3]
        err = ref.record(f"inference: OLS {kind} diagonal block vs statsmodels cov_type={kind} (rel)",
                         ref.max_rel_cov(blk, res.cov_params()))
        assert err < 1e-9


def test_robust_wald_vs_statsmodels_with_sandwich():
    eqs = _hetero_data(53)
    fit = blocksur.EquationSystem(eqs).fit("fgls", covariance="hc1")
    T, N, K = fit.n_obs, fit.n_eq, fit.n_coef
    A, B = ir.sandwich_by_rows(eqs, fit.resid.to_numpy(), fit.omega.to_numpy())
    Ai = np.linalg.inv(A)
    V1 = Ai @ B @ Ai * T / (T - K / N)
    y, Xb, _, _, _ = ir.design(eqs)
    res = sm.GLS(y, Xb, sigma=np.kron(fit.omega.to_numpy(), np.eye(T))).fit()
    pos = ir.coef_positions(eqs)
    R = np.zeros((2, K))
    R[0, pos["a", "x1"]], R[0, pos["b", "x1"]] = 1.0, -1.0
    R[1, pos["c", "x0"]] = 1.0
    q = np.array([0.0, 0.0])
    sm_w = res.wald_test((R, q), cov_p=V1, use_f=False, scalar=True)  # statsmodels wald_test
    w = fit.wald("a::x1 = b::x1; c::x0 = 0")
    err = ref.record("inference: robust Wald vs statsmodels wald_test(cov_p=sandwich) (rel)",
                     abs(w.statistic - sm_w.statistic) / sm_w.statistic)
    assert err < 1e-9


def _coverage_replication(seed, T=100):
    rng = np.random.default_rng(seed)
    x1, x2, z = rng.normal(size=(3, T))
    X1 = np.column_stack([np.ones(T), x1])
    X2 = np.column_stack([np.ones(T), x2, z])
    e = rng.standard_normal((T, 2)) @ np.linalg.cholesky(np.array([[1.0, 0.6], [0.6, 1.0]])).T
    e[:, 0] *= np.sqrt(0.2 + x1**2)  # error variance grows with the regressor's square
    e[:, 1] *= np.sqrt(0.2 + x2**2)
    truth = np.array([1.0, 2.0, -1.0, 0.5, 1.0])
    s = blocksur.EquationSystem({"a": (X1 @ truth[:2] + e[:, 0], X1), "b": (X2 @ truth[2:] + e[:, 1], X2)})
    out = {}
    for cov in ("classical", "hc0", "hc1"):
        ci = s.fit("fgls", covariance=cov).interval(0.95)
        out[cov] = (ci["lower"].to_numpy() <= truth) & (truth <= ci["upper"].to_numpy())
    return out


def test_monte_carlo_robust_coverage():
    # 300 seeded replications, T = 100, two equations, error variance 0.2 + x^2 in the slope's
    # regressor. Band for the robust 95% intervals of the two heteroskedasticity-affected slopes
    # (a::x1, b::x1): [0.91, 0.99] = 0.95 -/+ ~3.2 binomial standard errors
    # (sqrt(0.95 * 0.05 / 300) = 0.0126), slightly widened downwards for HC0's known
    # small-sample undercoverage. The classical intervals must clearly under-cover those slopes:
    # below 0.86 (7 binomial se under 0.95; the design gives about 0.77).
    reps = [_coverage_replication(10_000 + r) for r in range(300)]
    slopes = [1, 3]  # a::x1 and b::x1 in fit.coef order
    rates = {cov: np.mean([r[cov] for r in reps], axis=0) for cov in ("classical", "hc0", "hc1")}
    for cov in ("hc0", "hc1"):
        for j in slopes:
            ref.record(f"inference: MC |coverage - 0.95| of {cov} slope {j}", abs(rates[cov][j] - 0.95))
            assert 0.91 <= rates[cov][j] <= 0.99, (cov, j, rates[cov][j])
    for j in slopes:
        ref.record(f"inference: MC classical coverage shortfall slope {j}", 0.95 - rates["classical"][j])
        assert rates["classical"][j] < 0.86, rates["classical"][j]
    # the coefficients not touched by the heteroskedasticity (intercepts, b::x2 on z) are covered
    # near 0.95 by every kind
    for cov in ("classical", "hc0", "hc1"):
        for j in (0, 2, 4):
            assert 0.91 <= rates[cov][j] <= 0.99, (cov, j, rates[cov][j])
