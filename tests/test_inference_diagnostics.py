"""System diagnostics against outside references: Breusch-Pagan LM and LR tests of a diagonal
Omega, the GRS intercept test, McElroy's R-squared of the system, AIC/BIC, residual correlation.

References (named beside each check):
* statsmodels' general ``sm.OLS`` per equation (residuals, intercepts) and the dense iterated
  statsmodels ``sm.GLS`` of tests/reference.py (Omega_ML);
* formulas from memory: Breusch & Pagan (1980) LM = T sum_{i<j} r_ij^2; the LR test of a diagonal
  Omega T (sum ln s_ii - ln det Omega_ML); Gibbons, Ross & Shanken (1989) F statistic and its
  Sharpe-ratio identity; McElroy (1977) R-squared; Akaike / Schwarz criteria;
* scipy.stats chi2 / f distributions; binomial standard errors for the Monte Carlo bands.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

import blocksur
import inference_reference as ir
import reference as ref

KS = (3, 2, 3)


def _data(seed=61, T=30):
    return ref.make_sur_data(seed, T=T, ks=KS)


# ---------------------------------------------------------------------------
# Breusch-Pagan LM and LR tests of a diagonal Omega


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_breusch_pagan_lm_vs_formula(method):
    eqs = _data()
    fit = blocksur.EquationSystem(eqs).fit(method)
    # statsmodels OLS residuals whatever the fit's method (the test is built on OLS residuals)
    E = np.column_stack([r.resid for r in ref.ols_by_equation(eqs).values()])
    T, N = E.shape
    S = E.T @ E
    r = S / np.sqrt(np.outer(np.diag(S), np.diag(S)))
    lm = T * sum(r[i, j] ** 2 for i in range(N) for j in range(i + 1, N))  # Breusch & Pagan 1980
    res = fit.omega_diagonal_lm()
    err = ref.record("inference: Breusch-Pagan LM vs formula (rel)", abs(res.statistic - lm) / lm)
    assert err < 1e-10
    assert (res.dist, res.df, res.df_denom) == ("chi2", 3, None)
    np.testing.assert_allclose(res.pvalue, stats.chi2.sf(lm, 3), rtol=1e-9)  # scipy.stats.chi2


def _diagonal_omega_system(seed, T=50, rho=0.0):
    rng = np.random.default_rng(seed)
    eqs = {}
    C = np.full((3, 3), rho) + (1 - rho) * np.eye(3)
    E = rng.standard_normal((T, 3)) @ np.linalg.cholesky(C).T * [1.0, 2.0, 3.0]
    for i, k in enumerate((2, 3, 2)):
        X = np.column_stack([np.ones(T), rng.standard_normal((T, k - 1))])
        eqs["abc"[i]] = (X @ np.ones(k) + E[:, i], X)
    return blocksur.EquationSystem(eqs)


def test_breusch_pagan_size_and_power_monte_carlo():
    # Size: 400 seeded replications with a truly diagonal Omega (independent errors of unequal
    # variances), N = 3, T = 50. Rejection rate at 5% must lie in [0.02, 0.085]: 0.05 -/+ about
    # 3 binomial se (sqrt(0.05 * 0.95 / 400) = 0.011), the LM test being only asymptotically
    # chi2(3).
    p = np.array([_diagonal_omega_system(20_000 + r).fit("ols").omega_diagonal_lm().pvalue for r in range(400)])
    rate = float(np.mean(p < 0.05))
    ref.record("inference: MC Breusch-Pagan |size - 0.05| (400 reps)", abs(rate - 0.05))
    assert 0.02 <= rate <= 0.085, rate
    # Power: with error correlation 0.4 the statistic has noncentrality ~ T * 3 * 0.16 = 24, so
    # it rejects nearly always; require > 0.9 over 100 replications.
    p1 = np.array([_diagonal_omega_system(30_000 + r, rho=0.4).fit("ols").omega_diagonal_lm().pvalue for r in range(100)])
    assert np.mean(p1 < 0.05) > 0.9


def test_omega_diagonal_lr_vs_formula():
    eqs = _data(seed=62)
    s = blocksur.EquationSystem(eqs)
    # Omega_ML from the dense iterated statsmodels GLS run to convergence (tests/reference.py);
    # s_ii = SSR_i / T of statsmodels OLS.
    b, _, _, _ = ref.dense_ifgls(eqs, "ml")
    E = ref.resid_matrix(eqs, b)
    T = E.shape[0]
    omega_ml = E.T @ E / T
    ssr = np.array([r.ssr for r in ref.ols_by_equation(eqs).values()])
    lr = T * (np.sum(np.log(ssr / T)) - np.linalg.slogdet(omega_ml)[1])
    # whatever fit it is called on (non-ML fits refit the unrestricted ML internally)
    for fit in (s.fit("ifgls", tol=1e-13), s.fit("fgls"), s.fit("ols", omega="dof"),
                s.fit("ifgls", restrictions="a::x1 = b::x1")):
        res = fit.omega_diagonal_lr()
        err = ref.record("inference: LR diagonal Omega vs formula (rel)", abs(res.statistic - lr) / lr)
        assert err < 1e-8
        assert (res.dist, res.df) == ("chi2", 3)
        np.testing.assert_allclose(res.pvalue, stats.chi2.sf(lr, 3), rtol=1e-6)
    # with the OLS-residual correlations r: for large T LR ~ LM; here just both are positive
    # and of the same order (loose sanity, asymptotic equivalence)
    lm = s.fit("ols").omega_diagonal_lm().statistic
    assert 0.3 < lr / lm < 3


# ---------------------------------------------------------------------------
# GRS intercept test


def _factor_system(seed, T=60, N=5, L=1, alpha=None):
    rng = np.random.default_rng(seed)
    F = rng.normal(0.05, 0.2, size=(T, L)) * np.array([1.0, 0.7])[:L]
    X = np.column_stack([np.ones(T), F])
    B = rng.uniform(0.5, 1.5, size=(L, N))
    C = np.full((N, N), 0.3) + 0.7 * np.eye(N)
    E = rng.standard_normal((T, N)) @ np.linalg.cholesky(C).T * 0.1
    a = np.zeros(N) if alpha is None else np.asarray(alpha)
    Y = a + F @ B + E
    return Y, X, F


def _grs_by_hand(Y, X, F):
    """GRS (Gibbons, Ross & Shanken 1989, from memory) from statsmodels OLS per asset."""
    T, N = Y.shape
    L = F.shape[1]
    fits = [sm.OLS(Y[:, i], X).fit() for i in range(N)]
    a = np.array([f.params[0] for f in fits])
    E = np.column_stack([f.resid for f in fits])
    S = E.T @ E / T
    mu = F.mean(axis=0)
    W = (F - mu).T @ (F - mu) / T
    return (T - N - L) / N * (a @ np.linalg.solve(S, a)) / (1 + mu @ np.linalg.solve(W, mu)), a, S, mu, W


@pytest.mark.parametrize("L", [1, 2])
def test_grs_vs_formula(L):
    Y, X, F = _factor_system(71, L=L, alpha=[0.01, -0.02, 0.0, 0.015, 0.005])
    T, N = Y.shape
    grs, *_ = _grs_by_hand(Y, X, F)
    for method in ("ols", "fgls"):
        res = blocksur.EquationSystem([(Y[:, i], X) for i in range(N)]).fit(method).grs_test()
        err = ref.record("inference: GRS vs formula from statsmodels OLS (rel)", abs(res.statistic - grs) / grs)
        assert err < 1e-10
        assert (res.dist, res.df, res.df_denom) == ("F", N, T - N - L)
        np.testing.assert_allclose(res.pvalue, stats.f.sf(grs, N, T - N - L), rtol=1e-9)  # scipy.stats.f


def test_grs_sharpe_ratio_identity_one_factor():
    # Gibbons, Ross & Shanken (1989), from memory: with one factor and ML moments,
    # a'S^-1 a = sh_q^2 - sh_f^2, sh_f^2 = m^2/w the factor's squared Sharpe ratio and
    # sh_q^2 = mu_z' S_z^-1 mu_z for z = [asset returns, factor] (the tangency portfolio's).
    # Hence GRS = ((T-N-1)/N) (sh_q^2 - sh_f^2) / (1 + sh_f^2).
    Y, X, F = _factor_system(72, L=1, alpha=[0.02, -0.01, 0.01, 0.0, 0.03])
    T, N = Y.shape
    grs, a, S, mu, W = _grs_by_hand(Y, X, F)
    Z = np.column_stack([Y, F])
    mz = Z.mean(axis=0)
    Sz = (Z - mz).T @ (Z - mz) / T
    sh_q2 = mz @ np.linalg.solve(Sz, mz)
    sh_f2 = float(mu[0] ** 2 / W[0, 0])
    np.testing.assert_allclose(a @ np.linalg.solve(S, a), sh_q2 - sh_f2, rtol=1e-9)
    res = blocksur.EquationSystem([(Y[:, i], X) for i in range(N)]).fit("ols").grs_test()
    expected = (T - N - 1) / N * (sh_q2 - sh_f2) / (1 + sh_f2)
    err = ref.record("inference: GRS vs Sharpe-ratio identity (rel)", abs(res.statistic - expected) / expected)
    assert err < 1e-9


@pytest.mark.parametrize("L", [1, 2])
def test_grs_size_monte_carlo(L):
    # Under the null (zero intercepts, normal errors) GRS is exactly F(N, T-N-L) (GRS 1989).
    # 1000 seeded replications, T = 60, N = 5: rejection rate at 5% in [0.03, 0.07] =
    # 0.05 -/+ 2.9 binomial se (sqrt(0.05 * 0.95 / 1000) = 0.0069); the p-values also pass a
    # Kolmogorov-Smirnov test of uniformity (scipy.stats.kstest) at the 0.1% level.
    p = []
    for r in range(1000):
        Y, X, _ = _factor_system(40_000 + 10_000 * L + r, L=L)
        p.append(blocksur.EquationSystem([(Y[:, i], X) for i in range(5)]).fit("ols").grs_test().pvalue)
    p = np.array(p)
    rate = float(np.mean(p < 0.05))
    ref.record(f"inference: MC GRS |size - 0.05| (1000 reps, L={L})", abs(rate - 0.05))
    assert 0.03 <= rate <= 0.07, rate
    assert stats.kstest(p, "uniform").pvalue > 1e-3


def test_grs_refuses_unequal_regressors():
    with pytest.raises(blocksur.InvalidOptionError):
        blocksur.EquationSystem(_data(seed=73)).fit("ols").grs_test()


# ---------------------------------------------------------------------------
# McElroy R-squared, AIC/BIC, residual correlation


@pytest.mark.parametrize("method,divisor", [("ols", "dof"), ("fgls", "ml"), ("ifgls", "ml")])
def test_mcelroy_r2_vs_dense_formula(method, divisor):
    eqs = _data(seed=63, T=20)
    fit = blocksur.EquationSystem(eqs).fit(method, omega=divisor)
    y, _, T, _, _ = ir.design(eqs)
    e = fit.resid.to_numpy().T.reshape(-1)  # stacked equation by equation
    Oi = np.linalg.inv(fit.omega.to_numpy())
    D = np.eye(T) - np.ones((T, T)) / T
    # McElroy (1977), from memory, with the dense Kronecker products
    r2 = 1 - (e @ np.kron(Oi, np.eye(T)) @ e) / (y @ np.kron(Oi, D) @ y)
    err = ref.record("inference: McElroy system R2 vs dense kron formula (abs)", abs(fit.mcelroy_r2 - r2))
    assert err < 1e-12
    assert 0 < fit.mcelroy_r2 < 1


@pytest.mark.parametrize("restrictions", [None, "a::x1 = b::x1; a::x2 + c::x2 = 1"])
def test_aic_bic_vs_formula(restrictions):
    eqs = _data(seed=64)
    fit = blocksur.EquationSystem(eqs).fit("ifgls", restrictions=restrictions)
    ll = ref.gaussian_loglik(fit.resid.to_numpy())  # textbook concentrated log-likelihood
    np.testing.assert_allclose(fit.loglik, ll, rtol=1e-12)
    r = 0 if restrictions is None else 2
    n_params = sum(KS) - r + 3 * 4 // 2
    assert fit.n_params == n_params
    # Akaike (1974) and Schwarz (1978), from memory
    np.testing.assert_allclose(fit.aic, -2 * ll + 2 * n_params, rtol=1e-12)
    np.testing.assert_allclose(fit.bic, -2 * ll + np.log(fit.n_obs) * n_params, rtol=1e-12)


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_resid_corr_vs_numpy(method):
    # Every equation has a constant, so OLS and GLS residuals have mean zero (normal equations)
    # and the cross-product correlations equal numpy's corrcoef of fit.resid.
    eqs = _data(seed=65)
    fit = blocksur.EquationSystem(eqs).fit(method)
    E = fit.resid.to_numpy()
    np.testing.assert_allclose(E.mean(axis=0), 0, atol=1e-10 * np.abs(E).max())
    np.testing.assert_allclose(fit.resid_corr.to_numpy(), np.corrcoef(E.T), rtol=1e-10, atol=1e-12)
