"""Restricted estimation (R b = q imposed at fit time) against outside references.

References:
* statsmodels' general ``sm.OLS`` / ``sm.GLS`` on the dense stacked design with the restrictions
  imposed by substitution (inference_reference.dense_restricted_ols / dense_restricted_gls);
* the closed form of restricted GLS / least squares (Greene, Econometric Analysis, from memory):
  b_r = b - A^-1 R'(R A^-1 R')^-1 (R b - q), Cov = A^-1 - A^-1 R'(R A^-1 R')^-1 R A^-1.
"""

import numpy as np
import pytest

import blocksur
import inference_reference as ir
import reference as ref

KS = (3, 2, 3)
TEXT = "a::x1 = b::x1; a::x2 + c::x2 = 1"


def _data(seed=11, T=30):
    return ref.make_sur_data(seed, T=T, ks=KS)


def _rq(eqs):
    """R, q of TEXT written by hand over the order of fit.coef."""
    pos = ir.coef_positions(eqs)
    R = np.zeros((2, sum(KS)))
    R[0, pos["a", "x1"]], R[0, pos["b", "x1"]] = 1.0, -1.0
    R[1, pos["a", "x2"]], R[1, pos["c", "x2"]] = 1.0, 1.0
    return R, np.array([0.0, 1.0]), [pos["b", "x1"], pos["c", "x2"]]


def _explicit_substitution_design(eqs):
    """The substitution written out by hand for TEXT (no generic algebra): b_b.x1 := b_a.x1
    merges the two columns; b_c.x2 := 1 - b_a.x2 moves X_c[:, 2] to the left-hand side and
    subtracts it from the column of a::x2. Returns (y*, Z, labels of the free coefficients)."""
    T = len(eqs["a"][0])
    (ya, Xa), (yb, Xb), (yc, Xc) = eqs["a"], eqs["b"], eqs["c"]
    zero = np.zeros(T)
    cols = {
        ("a", "x0"): np.concatenate([Xa[:, 0], zero, zero]),
        ("a", "x1"): np.concatenate([Xa[:, 1], Xb[:, 1], zero]),  # merged with b::x1
        ("a", "x2"): np.concatenate([Xa[:, 2], zero, -Xc[:, 2]]),  # c::x2 = 1 - a::x2
        ("b", "x0"): np.concatenate([zero, Xb[:, 0], zero]),
        ("c", "x0"): np.concatenate([zero, zero, Xc[:, 0]]),
        ("c", "x1"): np.concatenate([zero, zero, Xc[:, 1]]),
    }
    ystar = np.concatenate([ya, yb, yc - 1.0 * Xc[:, 2]])
    return ystar, np.column_stack(list(cols.values())), list(cols)


def test_explicit_substitution_matches_generic_helper():
    # Sanity of the helper itself: the hand-written substitution and the generic one give the
    # same statsmodels GLS estimates (statsmodels GLS, two parameterisations of one model).
    import statsmodels.api as sm

    eqs = _data()
    R, q, piv = _rq(eqs)
    omega = np.array([[2.0, 0.5, 0.3], [0.5, 1.0, 0.2], [0.3, 0.2, 1.5]])
    ystar, Z, labels = _explicit_substitution_design(eqs)
    res = sm.GLS(ystar, Z, sigma=np.kron(omega, np.eye(len(eqs["a"][0])))).fit()
    b, _, _, _, _ = ir.dense_restricted_gls(eqs, omega, R, q, pivots=piv)
    pos = ir.coef_positions(eqs)
    got = np.array([b[pos[lab]] for lab in labels])
    np.testing.assert_allclose(got, res.params, rtol=1e-12, atol=0)
    np.testing.assert_allclose(b[pos["b", "x1"]], b[pos["a", "x1"]], rtol=1e-14)
    np.testing.assert_allclose(b[pos["a", "x2"]] + b[pos["c", "x2"]], 1.0, rtol=1e-14)


@pytest.mark.parametrize("divisor", ["ml", "dof"])
def test_restricted_ols_vs_statsmodels_substitution(divisor):
    eqs = _data()
    R, q, piv = _rq(eqs)
    fit = blocksur.EquationSystem(eqs).fit("ols", omega=divisor, restrictions=TEXT)
    # statsmodels OLS on the substituted stacked design (restricted least squares).
    b, res, J, c = ir.dense_restricted_ols(eqs, R, q, pivots=piv)
    err = ref.record("inference: restricted OLS coef vs statsmodels substitution (rel)",
                     ref.max_rel_coef(fit.coef, b, fit.se))
    assert err < 1e-10
    np.testing.assert_allclose(R @ fit.coef.to_numpy(), q, rtol=0, atol=1e-12)
    E = ref.resid_matrix(eqs, b)
    np.testing.assert_allclose(fit.resid.to_numpy(), E, rtol=1e-9, atol=1e-10 * np.abs(E).max())
    # Omega from the restricted residuals, with the documented divisor (S/T or
    # S_ij/sqrt((T-K_i)(T-K_j))).
    np.testing.assert_allclose(fit.omega.to_numpy(), ref.omega_from_resid(E, KS, divisor), rtol=1e-10)
    # Covariance of the restricted OLS estimator b_r = J (Z'Z)^-1 Z'y* + c with errors of
    # covariance Omega kron I: J (Z'Z)^-1 Z'(Omega kron I)Z (Z'Z)^-1 J' (sandwich of a linear
    # estimator, textbook); (Z'Z)^-1 is statsmodels' normalized_cov_params.
    _, Xb, T, _, _ = ir.design(eqs)
    Z = Xb @ J
    ZZi = np.asarray(res.normalized_cov_params)
    V = J @ ZZi @ Z.T @ np.kron(fit.omega.to_numpy(), np.eye(T)) @ Z @ ZZi @ J.T
    err = ref.record("inference: restricted OLS vcov vs substitution sandwich (rel)",
                     ref.max_rel_cov(fit.vcov.to_numpy(), V))
    assert err < 1e-9
    # Greene's closed form with A = X'X (restricted least squares) gives the same b.
    b_u = np.concatenate([np.linalg.lstsq(X, y, rcond=None)[0] for y, X in eqs.values()])
    br, _, _ = ir.restricted_closed_form(b_u, Xb.T @ Xb, R, q)
    np.testing.assert_allclose(fit.coef.to_numpy(), br, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("divisor", ["ml", "dof"])
def test_restricted_fgls_vs_statsmodels_gls_substitution(divisor):
    eqs = _data(seed=12)
    R, q, piv = _rq(eqs)
    fit = blocksur.EquationSystem(eqs).fit("fgls", omega=divisor, restrictions=TEXT)
    # Step 1: Omega from the residuals of restricted OLS (statsmodels OLS on the substituted
    # design), with the chosen divisor.
    b_ols, _, _, _ = ir.dense_restricted_ols(eqs, R, q, pivots=piv)
    omega1 = ref.omega_from_resid(ref.resid_matrix(eqs, b_ols), KS, divisor)
    np.testing.assert_allclose(fit.omega.to_numpy(), omega1, rtol=1e-10)
    # Step 2: statsmodels GLS on the substituted design with sigma = Omega kron I.
    b, V, _, _, _ = ir.dense_restricted_gls(eqs, fit.omega.to_numpy(), R, q, pivots=piv)
    err = ref.record("inference: restricted FGLS coef vs statsmodels GLS substitution (rel)",
                     ref.max_rel_coef(fit.coef, b, fit.se))
    assert err < 1e-9
    err = ref.record("inference: restricted FGLS vcov vs statsmodels GLS substitution (rel)",
                     ref.max_rel_cov(fit.vcov.to_numpy(), V))
    assert err < 1e-9
    np.testing.assert_allclose(R @ fit.coef.to_numpy(), q, rtol=0, atol=1e-12)
    # Greene's closed form of restricted GLS at the same Omega.
    A, h = ir.gls_normal_matrix(eqs, fit.omega.to_numpy())
    b_u = np.linalg.solve(A, h)
    br, cov_r, _ = ir.restricted_closed_form(b_u, A, R, q)
    err = ref.record("inference: restricted FGLS vs Greene closed form (rel)",
                     max(ref.max_rel_coef(fit.coef, br, fit.se), ref.max_rel_cov(fit.vcov.to_numpy(), cov_r)))
    assert err < 1e-9


def test_restricted_ifgls_fixed_point():
    eqs = _data(seed=13, T=40)
    R, q, piv = _rq(eqs)
    fit = blocksur.EquationSystem(eqs).fit("ifgls", tol=1e-13, restrictions=TEXT)
    assert fit.converged and fit.n_iter > 2
    # Fixed point (definition of iterated FGLS): Omega used in the last step is S/T of the
    # final restricted residuals ...
    E = fit.resid.to_numpy()
    np.testing.assert_allclose(fit.omega.to_numpy(), E.T @ E / E.shape[0], rtol=1e-9)
    # ... and the coefficients are the dense restricted GLS (statsmodels GLS, substitution)
    # at that Omega.
    b, V, _, _, _ = ir.dense_restricted_gls(eqs, fit.omega.to_numpy(), R, q, pivots=piv)
    err = ref.record("inference: restricted IFGLS fixed point vs statsmodels GLS (rel)",
                     ref.max_rel_coef(fit.coef, b, fit.se))
    assert err < 1e-9
    assert ref.max_rel_cov(fit.vcov.to_numpy(), V) < 1e-9
    np.testing.assert_allclose(R @ fit.coef.to_numpy(), q, rtol=0, atol=1e-12)
    # The restricted ML estimate maximises the concentrated likelihood over {R b = q}: moving
    # along the null space of R (b + eps J d) lowers it (first-order condition, textbook).
    J, _, _ = ir.substitution(R, q, piv)
    ll0 = ir.concentrated_loglik(eqs, fit.coef.to_numpy())
    np.testing.assert_allclose(fit.loglik, ll0, rtol=1e-12)
    rng = np.random.default_rng(5)
    se = fit.se.to_numpy()
    for _ in range(6):
        d = J @ rng.standard_normal(J.shape[1])
        d *= 0.05 * np.min(se[se > 0]) / np.max(np.abs(d))
        for sgn in (1.0, -1.0):
            assert ir.concentrated_loglik(eqs, fit.coef.to_numpy() + sgn * d) < ll0


def test_restricted_fit_with_shared_regressors_is_restricted_gls():
    # With the same X in every equation unrestricted GLS equals OLS, but a cross-equation
    # restriction breaks that: the restricted FGLS must match statsmodels GLS on the
    # substituted design (not restricted OLS).
    eqs = ref.identical_regressor_data(21, T=40, k=3, n=3)
    pos = ir.coef_positions(eqs)
    text = "a::x1 = b::x1; c::x1 + c::x2 = 0.5"
    R = np.zeros((2, 9))
    R[0, pos["a", "x1"]], R[0, pos["b", "x1"]] = 1.0, -1.0
    R[1, pos["c", "x1"]], R[1, pos["c", "x2"]] = 1.0, 1.0
    q = np.array([0.0, 0.5])
    for method in ("fgls", "ifgls"):
        fit = blocksur.EquationSystem(eqs).fit(method, restrictions=text, tol=1e-13)
        b, V, _, _, _ = ir.dense_restricted_gls(eqs, fit.omega.to_numpy(), R, q)
        err = ref.record("inference: restricted FGLS shared regressors vs statsmodels GLS (rel)",
                         max(ref.max_rel_coef(fit.coef, b, fit.se), ref.max_rel_cov(fit.vcov.to_numpy(), V)))
        assert err < 1e-9
        b_ols, _, _, _ = ir.dense_restricted_ols(eqs, R, q)
        assert np.max(np.abs(fit.coef.to_numpy() - b_ols)) > 1e-6  # visibly not restricted OLS


@pytest.mark.parametrize("covariance", ["classical", "hc0"])
@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_coefficient_fixed_by_restriction_has_zero_variance(method, covariance):
    # c::x2 = 0.5 fixes a coefficient: b_r = P b + const with row c::x2 of P equal to zero, so
    # its variance is exactly 0 whatever the covariance of b (algebra of the closed form,
    # Greene from memory), and the documented contract of FittedSystem.stat is NaN for it.
    eqs = _data(seed=14)
    fit = blocksur.EquationSystem(eqs).fit(method, restrictions="c::x2 = 0.5", covariance=covariance)
    key = ("c", "x2")
    assert fit.coef[key] == pytest.approx(0.5, rel=1e-14)
    se_scale = fit.se.drop(key).max()
    assert np.isfinite(fit.se[key]), f"se of the fixed coefficient is {fit.se[key]!r}"
    assert fit.se[key] <= 1e-12 * se_scale
    assert np.isnan(fit.stat[key]), f"stat of the fixed coefficient is {fit.stat[key]!r}, not NaN"
    # every other coefficient keeps a positive variance
    assert (fit.se.drop(key) > 0).all()


@pytest.mark.parametrize("delta", [1e-5, 3e-7])
def test_restricted_standard_errors_of_nearly_collinear_regressors(delta):
    """Restrictions on an equation whose two regressors are nearly collinear (condition number
    about 2e5 and 7e6): the standard errors of every coefficient, classical and HC0, against
    statsmodels GLS on the exact reparametrisation (b2 = 1 - b1, one shared coefficient s for
    eq0::x3 = eq1::x2), whose design is well conditioned. Forming A^-1 G'BG A^-1 had squared the
    conditioning: at delta = 3e-7 the shared coefficient's se was 20% off (classical) and 100%
    (HC0). The HC0 reference is the sandwich on the same design, A^-1 (S'S) A^-1 with the score
    rows S_t = sum_i Z_it w_ti and w = E Omega^-1 (the definition the fit documents)."""
    import statsmodels.api as sm

    rng = np.random.default_rng(2024)
    T = 200
    u = rng.multivariate_normal([0, 0], [[1, 0.4], [0.4, 1]], size=T)
    x1, z, a, c = rng.normal(size=(4, T))
    X0 = np.column_stack([np.ones(T), x1, x1 + delta * z, a])
    X1 = np.column_stack([np.ones(T), c, a])
    y0 = X0 @ [1, 2, -1, 0.5] + u[:, 0]
    y1 = X1 @ [0, 1, 0.5] + u[:, 1]
    system = blocksur.EquationSystem([(y0, X0), (y1, X1)])
    text = "eq0::x1 + eq0::x2 = 1; eq0::x3 = eq1::x2"
    # theta = (b00, b01, s, b10, b11); the columns of b01 scaled by 1/delta so the design is
    # well conditioned (the scale is undone on the standard errors)
    sc = np.array([1.0, 1.0 / delta, 1.0, 1.0, 1.0])
    Z0 = np.column_stack([np.ones(T), X0[:, 1] - X0[:, 2], a, np.zeros(T), np.zeros(T)]) * sc
    Z1 = np.column_stack([np.zeros(T), np.zeros(T), a, np.ones(T), c]) * sc
    expand = [0, 1, 1, 2, 3, 4, 2]  # theta -> the seven coefficients' standard errors
    for covariance in ("classical", "hc0"):
        fit = system.fit("fgls", restrictions=text, covariance=covariance)
        omega = fit.omega.to_numpy()
        if covariance == "classical":
            g = sm.GLS(np.concatenate([y0 - X0[:, 2], y1]), np.vstack([Z0, Z1]),
                       sigma=np.kron(omega, np.eye(T))).fit()
            sv = np.sqrt(np.diag(g.normalized_cov_params))
        else:
            oi = np.linalg.inv(omega)
            b = fit.coef.to_numpy()
            w = np.column_stack([y0 - X0 @ b[:4], y1 - X1 @ b[4:]]) @ oi
            A = oi[0, 0] * Z0.T @ Z0 + oi[0, 1] * (Z0.T @ Z1 + Z1.T @ Z0) + oi[1, 1] * Z1.T @ Z1
            S = Z0 * w[:, [0]] + Z1 * w[:, [1]]
            Ai = np.linalg.inv(A)
            sv = np.sqrt(np.diag(Ai @ (S.T @ S) @ Ai))
        se_ref = (sv * sc)[expand]
        err = ref.record(f"inference: restricted FGLS se, collinear pair (delta {delta:g}), {covariance} (rel)",
                         float(np.max(np.abs(fit.se.to_numpy() / se_ref - 1))))
        assert err < 1e-8


@pytest.mark.parametrize("factor", [1e200, -1e-200, 1e300, 1e-300])
def test_restriction_rows_scaled_by_a_constant_give_the_same_fit(factor):
    """R b = q and (c R) b = c q are the same restrictions (definition), for any c != 0, also
    at c = 1e+-200: rows are scaled by their largest entry before their norm is taken (the
    squares of 1e200 had overflowed: "redundant"; of 1e-200 underflowed: "mentions no
    coefficient")."""
    eqs = _data()
    R, q, _ = _rq(eqs)
    system = blocksur.EquationSystem(eqs)
    base = system.fit("fgls", restrictions=(R, q))
    scaled, qs = R.copy(), q.copy()
    scaled[:, :] *= factor  # both rows; the second has q = 1
    qs *= factor
    fit = system.fit("fgls", restrictions=(scaled, qs))
    np.testing.assert_allclose(fit.coef.to_numpy(), base.coef.to_numpy(), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(fit.se.to_numpy(), base.se.to_numpy(), rtol=1e-12)
