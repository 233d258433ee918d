"""Known theorems about SUR estimators, checked on blocksur (and, where the
theorem is about GLS itself, on the dense reference first)."""

import numpy as np
import pytest
import statsmodels.api as sm

import blocksur
from reference import (
    dense_gls,
    gaussian_loglik,
    identical_regressor_data,
    make_sur_data,
    max_rel,
    max_rel_coef,
    max_rel_cov,
    ols_by_equation,
    omega_from_resid,
    record,
)


def _ks(eqs):
    return [X.shape[1] for _, X in eqs.values()]


# ---------------------------------------------------------------------------
# GLS with a diagonal Omega is OLS (block-diagonal Sigma decouples the normal
# equations; textbook). A check of the dense reference itself.


def test_reference_diagonal_sigma_gives_ols():
    eqs = make_sur_data(21, T=40, ks=(3, 4, 2))
    omega = np.diag([0.7, 2.5, 9.0])
    b, V = dense_gls(eqs, omega)
    pos = 0
    for i, (nm, r) in enumerate(ols_by_equation(eqs).items()):
        X = eqs[nm][1]
        k = X.shape[1]
        np.testing.assert_allclose(b[pos : pos + k], r.params, rtol=1e-10, atol=0)
        np.testing.assert_allclose(V[pos : pos + k, pos : pos + k], omega[i, i] * np.linalg.inv(X.T @ X), rtol=1e-10, atol=0)
        # cross-equation blocks vanish
        assert np.max(np.abs(V[pos : pos + k, :pos]), initial=0.0) <= 1e-13 * np.max(np.abs(V))
        pos += k


# ---------------------------------------------------------------------------
# Identical regressors (or regressors spanning the same column space):
# FGLS = OLS (Zellner 1962; Kruskal's theorem).


@pytest.mark.parametrize("method", ["fgls", "ifgls"])
@pytest.mark.parametrize("divisor", ["ml", "dof"])
@pytest.mark.parametrize("seed", [31, 32])
def test_identical_regressors_fgls_equals_ols(seed, divisor, method):
    eqs = identical_regressor_data(seed, T=50, k=4, n=3)
    sysm = blocksur.EquationSystem(eqs)
    ols = sysm.fit("ols", omega=divisor)
    fit = sysm.fit(method, omega=divisor)
    d = record("theorem: identical regressors, FGLS/IFGLS coef vs OLS (rel)",
               max_rel_coef(fit.coef.to_numpy(), ols.coef.to_numpy(), ols.se.to_numpy()))
    assert d <= 1e-12
    # Same Omega (OLS residuals), and with identical X the GLS covariance
    # Omega kron (X'X)^-1 equals the OLS sandwich: vcov identical too.
    d = record("theorem: identical regressors, FGLS/IFGLS vcov vs OLS vcov (rel, CS-scaled)",
               max_rel_cov(fit.vcov.to_numpy(), ols.vcov.to_numpy()))
    assert d <= 1e-10
    # And OLS itself is statsmodels OLS equation by equation.
    for nm, r in ols_by_equation(eqs).items():
        np.testing.assert_allclose(fit.coef[nm].to_numpy(), r.params, rtol=1e-10, atol=1e-10 * np.max(np.abs(r.bse)))
    if method == "ifgls":
        # The residuals never change, so IFGLS stops after its second step.
        assert fit.converged is True and fit.n_iter <= 3


def test_same_column_space_fgls_equals_ols():
    # Kruskal's theorem needs only equal column spaces: X_b = X_a A with A
    # nonsingular (and X_c = X_a with columns permuted).
    base = identical_regressor_data(33, T=45, k=3, n=3)
    rng = np.random.default_rng(33)
    X = base["a"][1]
    A = rng.standard_normal((3, 3)) + 2 * np.eye(3)
    eqs = {"a": base["a"], "b": (base["b"][0], X @ A), "c": (base["c"][0], X[:, [2, 0, 1]])}
    sysm = blocksur.EquationSystem(eqs)
    ols, fgls = sysm.fit("ols"), sysm.fit("fgls")
    d = record("theorem: equal column spaces, FGLS coef vs OLS (rel)",
               max_rel_coef(fgls.coef.to_numpy(), ols.coef.to_numpy(), ols.se.to_numpy()))
    assert d <= 1e-10


def test_scalar_multiple_of_omega_same_coefficients():
    # GLS is invariant to a scalar multiple of Sigma and its covariance scales
    # by it (textbook). With equal K_i the "dof" Omega is T/(T-K) times the
    # "ml" Omega, so FGLS coefficients agree and vcov scales by T/(T-K).
    eqs = make_sur_data(34, T=30, ks=(3, 3, 3))
    sysm = blocksur.EquationSystem(eqs)
    ml, dof = sysm.fit("fgls", omega="ml"), sysm.fit("fgls", omega="dof")
    np.testing.assert_allclose(dof.coef.to_numpy(), ml.coef.to_numpy(), rtol=1e-11, atol=1e-11 * ml.se.max())
    d = max_rel_cov(dof.vcov.to_numpy(), ml.vcov.to_numpy() * 30 / 27)
    record("theorem: Omega scale invariance, vcov ratio T/(T-K) (rel, CS-scaled)", d)
    assert d <= 1e-10


# ---------------------------------------------------------------------------
# Iterated FGLS converges to the Gaussian ML estimator (Oberhofer & Kmenta
# 1974): at the fixed point Omega = S/T of the final residuals, and the
# concentrated log-likelihood is at a maximum.


@pytest.mark.parametrize("seed", [41, 42, 43])
def test_ifgls_fixed_point_ml(seed):
    eqs = make_sur_data(seed, T=50, ks=(2, 4, 3, 5))
    sysm = blocksur.EquationSystem(eqs)
    fit = sysm.fit("ifgls", omega="ml")  # default tol 1e-10
    assert fit.converged is True
    E = fit.resid.to_numpy()
    T = E.shape[0]
    # First-order condition in Omega: Omega = E'E / T.
    d = record("theorem: ifgls fixed point, omega vs S/T of resid (rel, CS-scaled)",
               max_rel_cov(fit.omega.to_numpy(), E.T @ E / T))
    assert d <= 1e-8
    # First-order condition in beta: X_i' sum_j (Omega^-1)_ij e_j = 0 with
    # Omega = S/T (gradient of ln det(E'E)); measured relative to the size
    # of the individual terms.
    W = np.linalg.inv(E.T @ E / T)
    grad_rel = 0.0
    for i, (_, X) in enumerate(eqs.values()):
        terms = [W[i, j] * (X.T @ E[:, j]) for j in range(len(eqs))]
        scale = max(np.max(np.abs(t)) for t in terms)
        grad_rel = max(grad_rel, float(np.max(np.abs(np.sum(terms, axis=0))) / scale))
    record("theorem: ifgls score in beta at fixed point (rel to terms)", grad_rel)
    assert grad_rel <= 1e-7
    # ML maximises the likelihood: IFGLS >= FGLS and >= OLS.
    ll_i = fit.loglik
    assert ll_i >= sysm.fit("fgls").loglik - 1e-9 * abs(ll_i)
    assert ll_i >= sysm.fit("ols").loglik - 1e-9 * abs(ll_i)
    # Local maximum: moving the coefficients lowers the concentrated loglik.
    rng = np.random.default_rng(seed)
    ys = [y for y, _ in eqs.values()]
    Xs = [X for _, X in eqs.values()]
    b = fit.coef.to_numpy()
    se = fit.se.to_numpy()
    for _ in range(10):
        step = 1e-3 * se * rng.standard_normal(b.size)
        bb, pos, cols = b + step, 0, []
        for y, X in zip(ys, Xs):
            k = X.shape[1]
            cols.append(y - X @ bb[pos : pos + k])
            pos += k
        assert gaussian_loglik(np.column_stack(cols)) < ll_i


def test_ifgls_fixed_point_dof():
    # With the dof divisor the fixed point satisfies the same map with that
    # divisor: Omega_ij = S_ij / sqrt((T-K_i)(T-K_j)) of the final residuals.
    eqs = make_sur_data(44, T=40, ks=(2, 4, 3))
    fit = blocksur.EquationSystem(eqs).fit("ifgls", omega="dof")
    assert fit.converged is True
    d = max_rel_cov(fit.omega.to_numpy(), omega_from_resid(fit.resid.to_numpy(), _ks(eqs), "dof"))
    record("theorem: ifgls fixed point [dof], omega vs dof formula of resid (rel, CS-scaled)", d)
    assert d <= 1e-8


# ---------------------------------------------------------------------------
# Log-likelihood formula (textbook concentrated Gaussian log-likelihood).


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
@pytest.mark.parametrize("divisor", ["ml", "dof"])
def test_loglik_formula(method, divisor):
    eqs = make_sur_data(51, T=35, ks=(3, 2, 4))
    fit = blocksur.EquationSystem(eqs).fit(method, omega=divisor)
    ref = gaussian_loglik(fit.resid.to_numpy())
    d = record("loglik vs -(NT/2)(1+ln 2pi) - (T/2) ln det(S/T) of resid (rel)", abs(fit.loglik - ref) / abs(ref))
    assert d <= 1e-10


def test_loglik_single_equation_is_statsmodels_llf():
    # N = 1: the formula is the OLS log-likelihood statsmodels reports.
    eqs = make_sur_data(52, T=30, ks=(4,))
    y, X = eqs["a"]
    fit = blocksur.EquationSystem(eqs).fit("ols")
    llf = sm.OLS(y, X).fit().llf
    d = record("loglik (N=1) vs statsmodels OLS llf (rel)", abs(fit.loglik - llf) / abs(llf))
    assert d <= 1e-10


# ---------------------------------------------------------------------------
# Equation order is a labelling: reordering the equations permutes every
# result and changes nothing else (the estimators are equivariant under a
# permutation of Sigma's blocks; textbook).


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
@pytest.mark.parametrize("divisor", ["ml", "dof"])
def test_equation_order_permutes_results(method, divisor):
    eqs = make_sur_data(61, T=45, ks=(3, 5, 2, 4), const=(True, False, True, True))
    order = ["c", "a", "d", "b"]
    perm = {k: eqs[k] for k in order}
    tol = 1e-12 if method == "ifgls" else None
    kw = {"tol": tol} if tol else {}
    f1 = blocksur.EquationSystem(eqs).fit(method, omega=divisor, **kw)
    f2 = blocksur.EquationSystem(perm).fit(method, omega=divisor, **kw)
    rtol = 1e-8 if method == "ifgls" else 1e-10
    assert list(f2.omega.index) == order
    idx = list(f2.coef.index)
    worst = 0.0
    worst = max(worst, max_rel_coef(f1.coef.loc[idx].to_numpy(), f2.coef.to_numpy(), f2.se.to_numpy()))
    worst = max(worst, max_rel(f1.se.loc[idx].to_numpy(), f2.se.to_numpy()))
    worst = max(worst, max_rel_cov(f1.vcov.loc[idx, idx].to_numpy(), f2.vcov.to_numpy()))
    worst = max(worst, max_rel_cov(f1.omega.loc[order, order].to_numpy(), f2.omega.to_numpy()))
    for attr in ("r2", "r2_adj", "ssr", "resid_se"):
        worst = max(worst, max_rel(getattr(f1, attr)[order].to_numpy(), getattr(f2, attr).to_numpy()))
    worst = max(worst, abs(f1.loglik - f2.loglik) / abs(f2.loglik))
    sd = max(np.std(y) for y, _ in eqs.values())
    np.testing.assert_allclose(f1.resid[order].to_numpy(), f2.resid.to_numpy(), rtol=0, atol=rtol * sd)
    record(f"theorem: equation permutation, {method} (max rel over coef/se/vcov/omega/r2/ssr/loglik)", worst)
    assert worst <= rtol


@pytest.mark.parametrize("scale", [1e200, 1e-200, 1e300, 1e-300])
@pytest.mark.parametrize("covariance", ["classical", "hc0", "hc1"])
def test_rescaled_regressor_rescales_its_coefficient_and_se(scale, covariance):
    """Regressor j times c gives coefficient b_j / c and standard error se_j / |c|, the rest
    unchanged (linear reparametrisation; common practice, no source needed), also where se_j^2
    is beyond double precision: the standard errors come from the column-scaled problem (they
    had been 0 or inf at c = 1e+-200, their squares under- or overflowing)."""
    rng = np.random.default_rng(5)
    T = 80
    X = np.column_stack([np.ones(T), rng.normal(size=T), rng.normal(size=T)])
    X2 = np.column_stack([np.ones(T), rng.normal(size=T)])
    y1 = X @ [1.0, 2.0, -0.5] + rng.normal(size=T)
    y2 = X2 @ [0.0, 1.0] + rng.normal(size=T) + 0.3 * y1
    base = blocksur.EquationSystem({"a": (y1, X), "b": (y2, X2)}).fit("fgls", covariance=covariance)
    c = np.array([1.0, scale, 1.0])
    fit = blocksur.EquationSystem({"a": (y1, X * c), "b": (y2, X2)}).fit("fgls", covariance=covariance)
    np.testing.assert_allclose(fit.coef["a"].to_numpy() * c, base.coef["a"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(fit.se["a"].to_numpy() * c, base.se["a"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(fit.se["b"].to_numpy(), base.se["b"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(fit.stat.to_numpy(), base.stat.to_numpy(), rtol=1e-11)
    assert np.all(np.isfinite(fit.pval.to_numpy()))


@pytest.mark.parametrize("scale", [1e200, 1e-200, 1e300, 1e-300])
@pytest.mark.parametrize("covariance", ["classical", "hc0"])
def test_rescaled_regressor_rescales_its_se_in_a_restricted_fit(scale, covariance):
    """As above, with cross-equation restrictions that do not involve the rescaled regressor:
    coefficient b_j / c and standard error se_j / |c|, the rest unchanged (linear
    reparametrisation; common practice, no source needed). Restricted standard errors come
    from the rows of the covariance's factor, scaled (they had been 0 or inf at c = 1e+-200,
    the covariance's diagonal under- or overflowing); a coefficient the restrictions fix on
    its own keeps a standard error of exactly 0."""
    rng = np.random.default_rng(11)
    T = 90
    X = np.column_stack([np.ones(T), rng.normal(size=T), rng.normal(size=T)])
    X2 = np.column_stack([np.ones(T), rng.normal(size=T), rng.normal(size=T)])
    e = rng.multivariate_normal([0, 0], [[1.0, 0.5], [0.5, 1.0]], size=T)
    y1 = X @ [1.0, 2.0, -0.5] + e[:, 0]
    y2 = X2 @ [0.0, -0.5, 1.0] + e[:, 1]
    rules = "a::x2 = b::x1; b::x0 = 0"
    base = blocksur.EquationSystem({"a": (y1, X), "b": (y2, X2)}).fit(
        "fgls", restrictions=rules, covariance=covariance
    )
    c = np.array([1.0, scale, 1.0])
    fit = blocksur.EquationSystem({"a": (y1, X * c), "b": (y2, X2)}).fit(
        "fgls", restrictions=rules, covariance=covariance
    )
    np.testing.assert_allclose(fit.coef["a"].to_numpy() * c, base.coef["a"].to_numpy(), rtol=1e-10)
    np.testing.assert_allclose(fit.se["a"].to_numpy() * c, base.se["a"].to_numpy(), rtol=1e-10)
    np.testing.assert_allclose(fit.se["b"].to_numpy(), base.se["b"].to_numpy(), rtol=1e-10)
    assert fit.se[("b", "x0")] == 0.0 and base.se[("b", "x0")] == 0.0
    assert np.all(fit.se.drop(("b", "x0")).to_numpy() > 0)
    # the moderate-scale standard errors equal the square roots of the covariance's diagonal
    np.testing.assert_allclose(base.se.to_numpy(), np.sqrt(np.diag(base.vcov.to_numpy())), rtol=1e-12)
