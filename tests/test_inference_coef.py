"""Coefficient inference (se, statistics, p-values, intervals) and prediction against
statsmodels' general OLS, and scipy.stats for the reference distributions."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import blocksur
import inference_reference as ir
import reference as ref

KS = (3, 2, 3)


def _data(seed=81, T=30):
    return ref.make_sur_data(seed, T=T, ks=KS)


def test_ols_dof_t_inference_equals_statsmodels_ols():
    # method="ols", omega="dof", inference="t": each equation's se, t statistics, p-values and
    # 95% intervals are those of statsmodels OLS (bse, tvalues, pvalues, conf_int), df T - K_i.
    eqs = _data()
    fit = blocksur.EquationSystem(eqs).fit("ols", omega="dof", inference="t")
    ci = fit.interval(0.95)
    table = fit.coef_table(0.95)
    worst = 0.0
    for nm, res in ref.ols_by_equation(eqs).items():
        for got, exp in ((fit.se[nm], res.bse), (fit.stat[nm], res.tvalues), (fit.pval[nm], res.pvalues),
                         (ci.loc[nm, "lower"], res.conf_int(0.05)[:, 0]), (ci.loc[nm, "upper"], res.conf_int(0.05)[:, 1])):
            worst = max(worst, ref.max_rel(got.to_numpy(), exp))
            np.testing.assert_allclose(got.to_numpy(), exp, rtol=1e-9)
        assert fit.df_resid[nm] == res.df_resid
        np.testing.assert_allclose(table.loc[nm, "pval"].to_numpy(), res.pvalues, rtol=1e-9)
        np.testing.assert_allclose(table.loc[nm, "se"].to_numpy(), res.bse, rtol=1e-9)
        # other levels too (statsmodels conf_int(alpha))
        ci90 = fit.interval(0.90)
        np.testing.assert_allclose(ci90.loc[nm, "lower"].to_numpy(), res.conf_int(0.10)[:, 0], rtol=1e-9)
    ref.record("inference: OLS t inference vs statsmodels OLS (rel)", worst)


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_z_inference_uses_normal(method):
    eqs = _data(seed=82)
    fit = blocksur.EquationSystem(eqs).fit(method, inference="z")
    b, se = fit.coef.to_numpy(), fit.se.to_numpy()
    np.testing.assert_allclose(fit.stat.to_numpy(), b / se, rtol=1e-14)
    np.testing.assert_allclose(fit.pval.to_numpy(), 2 * stats.norm.sf(np.abs(b / se)), rtol=1e-12)  # scipy.stats.norm
    for level in (0.95, 0.80):
        c = stats.norm.ppf(0.5 + level / 2)  # 1.959963984540054 for 95%
        ci = fit.interval(level)
        np.testing.assert_allclose(ci["lower"].to_numpy(), b - c * se, rtol=1e-13)
        np.testing.assert_allclose(ci["upper"].to_numpy(), b + c * se, rtol=1e-13)
    # t inference with the same fit: Student t with T - K_i df of the coefficient's equation
    fit_t = blocksur.EquationSystem(eqs).fit(method, inference="t")
    df = np.repeat([fit.n_obs - k for k in KS], KS)
    np.testing.assert_allclose(fit_t.pval.to_numpy(), 2 * stats.t.sf(np.abs(b / se), df), rtol=1e-12)
    c = stats.t.ppf(0.975, df)
    np.testing.assert_allclose(fit_t.interval()["upper"].to_numpy(), b + c * se, rtol=1e-13)
    with pytest.raises(blocksur.InvalidOptionError):
        fit.interval(1.5)


def _new_x(seed, m=4):
    rng = np.random.default_rng(seed)
    out = {}
    for nm, k in zip("abc", KS):
        x = rng.normal(size=(m, k)) * 3
        x[:, 0] = 1.0
        out[nm] = x
    return out


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_predict_equals_xb(method):
    eqs = _data(seed=83)
    fit = blocksur.EquationSystem(eqs).fit(method)
    new = _new_x(1)
    pred = fit.predict(new)
    assert list(pred.columns) == ["a", "b", "c"] and pred.shape == (4, 3)
    for nm in "abc":
        np.testing.assert_allclose(pred[nm].to_numpy(), new[nm] @ fit.coef[nm].to_numpy(), rtol=1e-13)
    # the same from a list in equation order and from DataFrames (column order by name)
    np.testing.assert_allclose(fit.predict([new[n] for n in "abc"]).to_numpy(), pred.to_numpy(), rtol=1e-15)
    frames = {n: pd.DataFrame(new[n], columns=[f"x{j}" for j in range(k)], index=list("pqrs")).iloc[:, ::-1]
              for n, k in zip("abc", KS)}
    pf = fit.predict(frames)
    assert list(pf.index) == list("pqrs")
    np.testing.assert_allclose(pf.to_numpy(), pred.to_numpy(), rtol=1e-14)
    # prediction_se = sqrt(diag(X_new V_ii X_new')) with V this fit's covariance
    pse = fit.prediction_se(new)
    V = fit.vcov.to_numpy()
    off = np.concatenate([[0], np.cumsum(KS)])
    for i, nm in enumerate("abc"):
        Vi = V[off[i]:off[i + 1], off[i]:off[i + 1]]
        np.testing.assert_allclose(pse[nm].to_numpy(), np.sqrt(np.diag(new[nm] @ Vi @ new[nm].T)), rtol=1e-12)


def test_prediction_se_equals_statsmodels_for_ols_dof():
    # statsmodels OLS get_prediction(exog).se_mean per equation equals prediction_se of the
    # method="ols", omega="dof" fit (same omega_ii = SSR_i/(T - K_i) scale).
    eqs = _data(seed=84)
    fit = blocksur.EquationSystem(eqs).fit("ols", omega="dof")
    new = _new_x(2, m=6)
    pred, pse = fit.predict(new), fit.prediction_se(new)
    worst = 0.0
    for nm, res in ref.ols_by_equation(eqs).items():
        sp = res.get_prediction(new[nm])
        np.testing.assert_allclose(pred[nm].to_numpy(), sp.predicted_mean, rtol=1e-12)
        np.testing.assert_allclose(pse[nm].to_numpy(), sp.se_mean, rtol=1e-9)
        worst = max(worst, ref.max_rel(pse[nm].to_numpy(), sp.se_mean))
    ref.record("inference: prediction_se vs statsmodels get_prediction se_mean (rel)", worst)


def test_prediction_se_restricted_gls_vs_statsmodels_substitution():
    # For a restricted FGLS fit, prediction variances follow from the covariance of the
    # statsmodels GLS on the substituted design (inference_reference.dense_restricted_gls).
    eqs = _data(seed=85)
    text = "a::x1 = b::x1; a::x2 + c::x2 = 1"
    pos = ir.coef_positions(eqs)
    R = np.zeros((2, sum(KS)))
    R[0, pos["a", "x1"]], R[0, pos["b", "x1"]] = 1.0, -1.0
    R[1, pos["a", "x2"]], R[1, pos["c", "x2"]] = 1.0, 1.0
    fit = blocksur.EquationSystem(eqs).fit("fgls", restrictions=text)
    _, V, _, _, _ = ir.dense_restricted_gls(eqs, fit.omega.to_numpy(), R, np.array([0.0, 1.0]))
    new = _new_x(3)
    pse = fit.prediction_se(new)
    off = np.concatenate([[0], np.cumsum(KS)])
    for i, nm in enumerate("abc"):
        Vi = V[off[i]:off[i + 1], off[i]:off[i + 1]]
        np.testing.assert_allclose(pse[nm].to_numpy(), np.sqrt(np.diag(new[nm] @ Vi @ new[nm].T)), rtol=1e-9)


def _exact_quadratic_forms(A, rows):
    """x A^-1 x' for each row x, in exact rational arithmetic (the float entries taken as the
    exact binary fractions they are): a reference free of rounding."""
    from fractions import Fraction as Fr

    n = len(A)

    def solve(rhs):
        M = [list(A[i]) + [rhs[i]] for i in range(n)]
        for c in range(n):
            p = next(r for r in range(c, n) if M[r][c] != 0)
            M[c], M[p] = M[p], M[c]
            for r in range(n):
                if r != c and M[r][c] != 0:
                    f = M[r][c] / M[c][c]
                    M[r] = [a - f * b for a, b in zip(M[r], M[c])]
        return [M[i][n] / M[i][i] for i in range(n)]

    out = []
    for row in rows:
        x = [Fr(float(v)) for v in row]
        out.append(float(sum(a * b for a, b in zip(x, solve(x)))))
    return np.array(out)


def test_prediction_se_along_a_nearly_collinear_direction_is_exact_to_rounding():
    """New rows that follow the sample's near-collinearity (x2 = x1 + 1e-6 z, condition number
    about 1e6): the prediction variance is small while the covariance has entries of order
    1e10, so x V x' from the covariance matrix cancels (it lost three digits). Reference: exact
    rational arithmetic on the same float data, x (X'X)^-1 x' omega_ii for OLS and
    x_i (sum_jl omega^jl X_j'X_l)^-1_ii x_i' for GLS at the fit's Omega (the textbook formulas;
    Omega^-1 from numpy, taken as exact)."""
    from fractions import Fraction as Fr

    rng = np.random.default_rng(7)
    T = 30
    x1, z, c, a = rng.normal(size=(4, T))
    X0 = np.column_stack([np.ones(T), x1, x1 + 1e-6 * z])
    X1 = np.column_stack([np.ones(T), c, a])
    u = rng.multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], size=T)
    y0 = X0 @ [1.0, 2.0, -1.0] + u[:, 0]
    y1 = X1 @ [0.5, 1.0, -0.5] + u[:, 1]
    t_new = rng.normal(size=4)
    new0 = np.column_stack([np.ones(4), t_new, t_new + 1e-6 * rng.normal(size=4)])
    new1 = np.column_stack([np.ones(4), rng.normal(size=4), rng.normal(size=4)])
    system = blocksur.EquationSystem({"a": (y0, X0), "b": (y1, X1)})
    new = {"a": new0, "b": new1}
    Xf = [[[Fr(float(v)) for v in row] for row in X] for X in (X0, X1)]

    def cross(i, j, w):
        return [[w * sum(Xf[i][t][p] * Xf[j][t][q] for t in range(T)) for q in range(3)] for p in range(3)]

    # OLS: omega_ii x (X_i'X_i)^-1 x'
    ols = system.fit("ols")
    om = ols.omega.to_numpy()
    got = ols.prediction_se(new)
    worst = 0.0
    for i, (nm, rows) in enumerate(new.items()):
        exact = np.sqrt(om[i, i] * _exact_quadratic_forms(cross(i, i, Fr(1)), rows))
        worst = max(worst, ref.max_rel(got[nm].to_numpy(), exact))
    # FGLS: the GLS matrix at the fit's Omega, its (0, 0) block of the inverse
    fgls = system.fit("fgls")
    oi = [[Fr(float(v)) for v in row] for row in np.linalg.inv(fgls.omega.to_numpy())]
    blocks = [[cross(i, j, oi[i][j]) for j in range(2)] for i in range(2)]
    A = [blocks[i][0][p] + blocks[i][1][p] for i in range(2) for p in range(3)]  # 6 x 6
    got = fgls.prediction_se(new)["a"].to_numpy()
    rows6 = [list(r) + [0.0, 0.0, 0.0] for r in new0]
    exact = np.sqrt(_exact_quadratic_forms(A, rows6))
    worst = max(worst, ref.max_rel(got, exact))
    err = ref.record("inference: prediction_se along a near-collinear direction vs exact rationals (rel)", worst)
    assert err < 1e-8


@pytest.mark.parametrize("identical", [True, False])
@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
@pytest.mark.parametrize("covariance", ["classical", "hc0", "hc1"])
@pytest.mark.parametrize("restrictions", [None, "e0::x1 = e1::x1"])
def test_prediction_se_from_factors_is_the_quadratic_form_of_vcov(identical, method, covariance, restrictions):
    """On well-conditioned data every route of the factor-based prediction variances (OLS,
    shared regressors, Cholesky GLS, robust kinds, restricted fits) equals the definition
    sqrt(diag(x V_ii x')) with V = fit.vcov, to rounding."""
    rng = np.random.default_rng(3)
    T = 60
    Xs = [np.column_stack([np.ones(T), rng.normal(size=(T, 2))])]
    Xs += [Xs[0] if identical else np.column_stack([np.ones(T), rng.normal(size=(T, 2))]) for _ in range(2)]
    u = rng.multivariate_normal([0, 0, 0], [[1, 0.5, 0.3], [0.5, 1, 0.4], [0.3, 0.4, 1]], size=T)
    eqs = {f"e{i}": (Xs[i] @ rng.normal(size=3) + u[:, i], Xs[i]) for i in range(3)}
    new = {k: rng.normal(size=(4, 3)) for k in eqs}
    fit = blocksur.EquationSystem(eqs).fit(method, covariance=covariance, restrictions=restrictions)
    v = fit.vcov.to_numpy()
    expect = np.column_stack([
        np.sqrt(np.einsum("ij,jk,ik->i", new[k], v[3 * i:3 * i + 3, 3 * i:3 * i + 3], new[k]))
        for i, k in enumerate(eqs)
    ])
    np.testing.assert_allclose(fit.prediction_se(new).to_numpy(), expect, rtol=1e-12)
