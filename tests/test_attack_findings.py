"""Regression tests for what the attack tests found, one precise reproduction each (input,
expected). Each docstring says what was observed when the test was written.

Outside references: invariance of GLS to the units of each equation (theorem: rescaling y_i
rescales b_i and leaves the estimator otherwise unchanged); the definition of the restricted
estimator (R b = q holds exactly, up to rounding); the Gaussian log-likelihood
-(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T) (common practice); numpy for reference arithmetic.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import blocksur
from blocksur import errors
from attack_support import Spec, random_system


def _two_equations(seed=1, t=40):
    rng = np.random.default_rng(seed)
    x1 = np.column_stack([np.ones(t), rng.standard_normal(t)])
    x2 = np.column_stack([np.ones(t), rng.standard_normal(t), rng.standard_normal(t)])
    e = rng.multivariate_normal([0, 0], [[1, 0.5], [0.5, 1]], size=t)
    return x1 @ [1, 2] + e[:, 0], x1, x2 @ [0, 1, -1] + e[:, 1], x2


@pytest.mark.parametrize("s", [1e4, 1e6, 1e7, 1e8])
def test_fgls_does_not_depend_on_the_units_of_each_equation(s):
    """Observed: y1 in units 1e-7 and y2 in units 1e7 (so Omega's diagonal spans 1e28) raise
    SingularOmegaError "equation 'a' has (numerically) zero residual variance: it fits its data
    exactly" although neither equation fits exactly: the zero-variance test compares each
    equation's variance with the largest one instead of with its own data.
    Expected: the fit in the new units equals the fit in the old units, rescaled."""
    y1, x1, y2, x2 = _two_equations()
    base = blocksur.EquationSystem({"a": (y1, x1), "b": (y2, x2)}).fit("fgls").coef.to_numpy()
    fit = blocksur.EquationSystem({"a": (y1 / s, x1), "b": (y2 * s, x2)}).fit("fgls")
    got = fit.coef.to_numpy() * np.r_[s, s, 1 / s, 1 / s, 1 / s]
    np.testing.assert_allclose(got, base, rtol=1e-10, atol=0)


def test_huge_values_are_not_reported_as_an_exact_fit():
    """Observed: y of size 1e160 (Omega overflows to inf) gives SingularOmegaError "fits its data
    exactly". Expected: either the fit (GLS is unit-free) or an error that says what is wrong
    (values too large), not a false claim of an exact fit."""
    y1, x1, y2, x2 = _two_equations()
    try:
        fit = blocksur.EquationSystem({"a": (y1 * 1e160, x1), "b": (y2, x2)}).fit("fgls")
    except errors.BlocksurError as err:
        assert "fits its data exactly" not in str(err), str(err)
    else:
        assert np.all(np.isfinite(fit.coef.to_numpy()))


def test_iterated_fgls_without_an_ml_estimator_raises_singular_omega_error():
    """10 equations, T = 22, K = 32 regressors in all: N + rank([X_1..X_N]) > T, so some
    combination of the residuals can be driven to zero and the likelihood is unbounded (the ML
    estimator does not exist); the iteration drives Omega towards singular (condition ~6e13 after
    10 steps). Observed: NumericalError "linear algebra failure in Cholesky factorisation of the
    GLS normal matrix: not positive definite" after ~20 steps. Expected: the documented
    SingularOmegaError (as the same situation gives in most other draws), ideally saying why."""
    spec = Spec(seed=1, n_eq=10, ks=(1, 1, 1, 3, 5, 5, 3, 6, 5, 2), n_obs=22, col_exp=(0.0,) * 32,
                y_exp=(0.0,) * 10, intercept=(False,) * 10, mean_shift=2.0)
    system = random_system(spec)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", blocksur.BlocksurWarning)
        with pytest.raises(errors.SingularOmegaError):
            blocksur.EquationSystem(system.given).fit("ifgls", max_iter=60, tol=1e-9)


def _income_system():
    rng = np.random.default_rng(0)
    t = 50
    income = 1e6 * (1 + 0.1 * rng.standard_normal(t))  # a regressor in large units
    xa = np.column_stack([np.ones(t), income])
    xb = income[:, None]
    xc = np.column_stack([np.ones(t), rng.standard_normal(t)])
    return {"a": (xa @ [1, 1e-6] + rng.standard_normal(t), xa), "b": (xb @ [2e-6] + rng.standard_normal(t), xb),
            "c": (xc @ [1, 1] + rng.standard_normal(t), xc)}


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_restrictions_hold_when_their_rows_have_different_scales(method):
    """"a::x0 = 0; a::x0 + b::x0 = 0" (an intercept, and a coefficient of a regressor in units of
    1e6) means a::x0 = 0 and b::x0 = 0. Observed: OLS gives a::x0 = 1.3e-2 (FGLS -7.6e-3), so
    R b - q = 1.3e-2: the restriction is silently violated (the equivalent "a::x0 = 0; b::x0 = 0"
    gives 2.5e-16). With income in units of 1e8 the same restrictions raise RestrictionError "the
    restrictions are linearly dependent", which they are not.
    Expected: R b = q to rounding, and the same estimates as the equivalent restrictions."""
    eqs = _income_system()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", blocksur.BlocksurWarning)
        fit = blocksur.EquationSystem(eqs).fit(method, restrictions="a::x0 = 0; a::x0 + b::x0 = 0")
        same = blocksur.EquationSystem(eqs).fit(method, restrictions="a::x0 = 0; b::x0 = 0")
    b = fit.coef.to_numpy()
    gap = fit.restrictions.r @ b - fit.restrictions.q
    assert np.max(np.abs(gap)) <= 1e-12, f"R b - q = {gap}"
    np.testing.assert_allclose(b, same.coef.to_numpy(), rtol=1e-8, atol=1e-12)


def test_restrictions_in_very_different_units_are_not_called_dependent():
    """The same restrictions with the regressor in units of 1e8. Observed: a::x0 = 0.305 (the
    restriction a::x0 = 0 silently violated); with other draws of the same design,
    RestrictionError "the restrictions are linearly dependent", which they are not.
    Expected: a fit with a::x0 = 0 and b::x0 = 0."""
    rng = np.random.default_rng(0)
    t = 50
    income = 1e8 * (1 + 0.1 * rng.standard_normal(t))
    xa = np.column_stack([np.ones(t), income])
    xb = income[:, None]
    xc = np.column_stack([np.ones(t), rng.standard_normal(t)])
    eqs = {"a": (xa @ [1, 1e-8] + rng.standard_normal(t), xa), "b": (xb @ [2e-8] + rng.standard_normal(t), xb),
           "c": (xc @ [1, 1] + rng.standard_normal(t), xc)}
    fit = blocksur.EquationSystem(eqs).fit("ols", restrictions="a::x0 = 0; a::x0 + b::x0 = 0")
    assert abs(fit.coef["a", "x0"]) <= 1e-12 and abs(fit.coef["b", "x0"]) <= 1e-20


def test_coefficient_fixed_by_a_combination_of_restrictions_has_zero_not_nan_se():
    """Seven equations with the same two regressors (T = 3). Rows 1 and 2 of R differ only in
    the last coefficient, so together they fix it at 0. Observed: its variance is -1.0e-48, so
    fit.se is NaN (numpy "invalid value encountered in sqrt"). Expected: se >= 0 and finite
    for every coefficient (0 for the fixed one), no RuntimeWarning."""
    spec = Spec(seed=0, n_eq=7, ks=(2,) * 7, n_obs=3, col_exp=(0.0,) * 14, y_exp=(0.0,) * 7,
                intercept=(False,) * 7, identical="same")
    system = random_system(spec)
    r = np.zeros((2, 14))
    r[0, [0, 2, 3]] = 1.0
    r[1, [0, 2, 3, 13]] = 1.0
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        fit = blocksur.EquationSystem(system.given).fit("ols", restrictions=(r, np.zeros(2)))
        se = fit.se.to_numpy()
    assert np.all(np.isfinite(se)) and np.all(se >= 0), se
    assert se[13] <= 1e-12


def test_r2_of_a_constant_dependent_variable_is_not_infinite():
    """OLS of a constant y on an intercept (a series that did not move in the sample). Observed:
    r2 = -inf and r2_adj = -inf, with numpy "divide by zero encountered in divide" (the total sum
    of squares is exactly 0, the residual sum of squares ~1e-31). Expected: no numpy warning
    leaking and no infinite R-squared (R-squared is undefined: NaN, or a documented value)."""
    t = 5
    rng = np.random.default_rng(0)
    eqs = [(np.full(t, 3.0), np.ones((t, 1))), (rng.standard_normal(t), np.ones((t, 1)))]
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        fit = blocksur.EquationSystem(eqs).fit("ols")
        r2, r2_adj = fit.r2.to_numpy(), fit.r2_adj.to_numpy()
    assert not np.any(np.isinf(r2)) and not np.any(np.isinf(r2_adj)), (r2, r2_adj)


def test_loglik_of_an_exact_fit_is_plus_infinity():
    """An equation with y = 0 (OLS residuals exactly zero): S/T is singular, so ln det(S/T) = -inf
    and the log-likelihood -(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T) is +inf. Observed: -inf (and
    the docstring of FittedSystem.loglik says -inf). A nearly exact fit (y = 1 + 2 t exactly, residuals
    ~1e-16) gives +166: large and positive, as the formula says. Expected: +inf."""
    t = 5
    rng = np.random.default_rng(0)
    eqs = [(np.zeros(t), rng.standard_normal((t, 1))), (rng.standard_normal(t), np.ones((t, 1)))]
    fit = blocksur.EquationSystem(eqs).fit("ols")
    assert fit.loglik == np.inf, fit.loglik


def test_masked_arrays_are_not_silently_unmasked():
    """A numpy masked array marks missing values. Observed: the mask is dropped (np.asarray) and
    the hidden values are used as data, silently. Expected: an InputError (or the masked rows
    treated as missing)."""
    t = 30
    rng = np.random.default_rng(0)
    x = np.column_stack([np.ones(t), rng.standard_normal(t)])
    y = np.ma.masked_array(rng.standard_normal(t), mask=np.r_[True, np.zeros(t - 1, bool)])
    y.data[0] = 1e6  # the hidden value
    with pytest.raises(errors.InputError):
        blocksur.EquationSystem([(y, x), (rng.standard_normal(t), x[:, :1])]).fit("ols")


def test_restriction_across_coefficients_of_very_different_size_keeps_a_valid_covariance():
    """Four equations; the restriction ties coefficient 3 of equation 1 (its regressor in units
    of 1e-3 and y in units of 1e3: a coefficient of natural size 1e6) to the last coefficient of
    equation 3 (regressor in units of 1e3: natural size 1e-3): b[4] + b[11] = 0.
    Observed (OLS): the restricted variances of both are -9.1e-7 (negative), so fit.se is NaN
    with numpy "invalid value encountered in sqrt"; and b[4] + b[11] = 2.1e-10 while
    |b[4]| = 1.27e-3 (the restriction holds to only 7 digits). Expected: a covariance with
    non-negative diagonal (finite se) and R b = q to rounding."""
    spec = Spec(seed=0, n_eq=4, ks=(1, 5, 1, 5), n_obs=6,
                col_exp=(0.0, 0.0, 0.0, 0.0, -3.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 3.0),
                y_exp=(0.0, 3.0, 0.0, 0.0), intercept=(False,) * 4)
    system = random_system(spec)
    r = np.zeros((1, 12))
    r[0, [4, 11]] = 1.0
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        fit = blocksur.EquationSystem(system.given).fit("ols", restrictions=(r, np.zeros(1)))
        se = fit.se.to_numpy()
    assert np.all(np.diag(fit.vcov.to_numpy()) >= 0) and np.all(np.isfinite(se)), se
    b = fit.coef.to_numpy()
    # b[4] has natural size 1e6 (its regressor is in units of 1e-3), so it is known to about
    # 1e6 * eps * cond in absolute terms: R b = q holds to that, not to eps * |b[4]| (common
    # practice: constraint residuals are judged against the scale of the terms).
    assert abs(b[4] + b[11]) <= 1e-12 * 1e6, (b[4], b[11])
