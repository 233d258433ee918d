"""Conditioning is reported: IllConditionedWarning, with the condition estimate, when a regressor
block or Omega is ill-conditioned enough to cost digits, before results become unreliable; no
warning for well-conditioned data, whatever the units of the columns.

Outside references: numpy's SVD (2-norm condition number of the column-scaled regressors, of the
residual correlation matrix); numpy lstsq (LAPACK gelsd) for OLS coefficients; the perturbation
theory of least squares (common practice: about log10(cond) digits can be lost).
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import pytest

import blocksur
from blocksur import errors
from attack_support import scaled_cond
from reference import record

COND_RE = re.compile(r"condition number estimate ([0-9.]+e[+-]?[0-9]+)")


def _fit(eqs, method="ols", **kw):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit = blocksur.EquationSystem(eqs).fit(method, **kw)
    ill = [w for w in caught if issubclass(w.category, errors.IllConditionedWarning)]
    return fit, ill


def _near_collinear(delta, seed=3, t=80):
    """x2 = x1 + delta * noise (relative to the size of x1), plus an intercept and one more
    regressor; a second, well-conditioned equation beside it."""
    rng = np.random.default_rng(seed)
    x1 = rng.standard_normal(t)
    x2 = x1 + delta * rng.standard_normal(t)
    xa = np.column_stack([np.ones(t), x1, x2, rng.standard_normal(t)])
    xb = np.column_stack([np.ones(t), rng.standard_normal(t)])
    e = rng.standard_normal((t, 2)) @ np.array([[1.0, 0.0], [0.5, 0.8]])
    ya = xa @ np.array([1.0, 0.7, -0.4, 2.0]) + e[:, 0]
    yb = xb @ np.array([-1.0, 0.3]) + e[:, 1]
    return {"north": (ya, xa), "south": (yb, xb)}


@pytest.mark.parametrize("k", range(1, 16))
def test_regressor_block_warning_tracks_lost_digits(k):
    """x2 = x1 + 10^-k noise. The condition number grows like 10^k. Expected (common practice):
    a warning naming the equation and its condition estimate once cond > 1e8, none below; the
    estimate agrees with numpy's 2-norm condition number within a factor 10 K; while there is no
    warning the coefficients agree with an independent solver (numpy lstsq) to 100 eps cond
    relative (the digits the condition number says are at risk, plus two); CollinearityError only
    far beyond the warning."""
    eqs = _near_collinear(10.0**-k)
    cond = scaled_cond(eqs["north"][1])
    try:
        fit, ill = _fit(eqs)
    except errors.CollinearityError as err:
        assert err.equation == "north" and err.column in ("x2",)
        assert cond > 1e11, f"CollinearityError at cond {cond:.3g}: far before results are unreliable"
        return
    on_north = [w for w in ill if "'north'" in str(w.message)]
    assert not [w for w in ill if "'south'" in str(w.message)], "warning on the well-conditioned equation"
    if cond > 1e9:
        assert on_north, f"no IllConditionedWarning at scaled condition number {cond:.3g}"
    if cond < 1e7:
        assert not on_north, f"IllConditionedWarning at scaled condition number {cond:.3g}: {on_north[0].message}"
    if on_north:
        msg = str(on_north[0].message)
        m = COND_RE.search(msg)
        assert m, f"the warning does not give the condition estimate: {msg}"
        est = float(m.group(1))
        k_cols = eqs["north"][1].shape[1]
        assert cond / (10 * k_cols) <= est <= cond * 10 * k_cols, f"estimate {est:.3g} vs numpy {cond:.3g}"
        record("conditioning: warning estimate / numpy 2-norm condition (max ratio)", max(est / cond, cond / est))
    else:
        y, x = eqs["north"]
        ref = np.linalg.lstsq(x, y, rcond=None)[0]
        got = fit.coef.loc["north"].to_numpy()
        rel = np.max(np.abs(got - ref)) / np.max(np.abs(ref))
        # Both solvers are backward stable; they may differ by about eps * cond (more when the
        # residuals are large: the cond^2 tan(theta) term of least-squares perturbation theory).
        # Without a warning the loss must stay within what the condition number promises, with
        # two digits of slack: rel <= 100 eps cond (< 2.2e-6 below the 1e8 threshold).
        bound = 100 * np.finfo(float).eps * max(cond, 1.0)
        record("conditioning: unwarned coefficients vs numpy lstsq, in units of eps*cond", rel / bound * 100)
        assert rel <= bound, f"no warning but coefficients differ from lstsq by {rel:.3g} (cond {cond:.3g})"


@pytest.mark.parametrize("seed", range(12))
def test_no_warning_for_well_conditioned_data_in_any_units(seed):
    """Columns in wildly different units (1e-8 .. 1e8), a large-mean regressor (a calendar year)
    beside the intercept, integer dummies: well-conditioned once each column is scaled, so no
    warning (the estimate is of the column-scaled problem, as documented)."""
    rng = np.random.default_rng(100 + seed)
    t = 60
    eqs = {}
    for i in range(4):
        k = 2 + i
        cols = [np.ones(t), 1990.0 + np.arange(t) % 30]
        while len(cols) < k + 1:
            cols.append(rng.standard_normal(t) * 10.0 ** rng.uniform(-8, 8))
        cols.append((rng.random(t) < 0.3).astype(float))
        x = np.column_stack(cols)
        y = x @ (rng.uniform(-1, 1, x.shape[1]) / np.maximum(np.abs(x).mean(axis=0), 1e-300)) + rng.standard_normal(t)
        y = y * 10.0 ** rng.uniform(-3, 3)
        eqs[f"e{i}"] = (y, x)
        assert scaled_cond(x) < 1e5
    for method in ("ols", "fgls", "ifgls"):
        _, ill = _fit(eqs, method)
        assert not ill, f"{method}: unexpected warning: {ill[0].message}"


@pytest.mark.parametrize("k", [2, 3, 4, 5, 6, 8, 10, 14])
@pytest.mark.parametrize("shared", [True, False])
def test_nearly_singular_omega_warns_then_raises(k, shared):
    """Three equations whose errors nearly add up: e3 = e1 + e2 + 10^-k noise (budget-share-like
    adding up). The residual correlation then has condition number ~10^(2k). Expected: FGLS warns
    (IllConditionedWarning naming the Omega condition estimate) once that exceeds 1e8, is silent
    well below, and raises SingularOmegaError (naming the equations) only when it is numerically
    singular; OLS never inverts Omega and so never warns about it.
    shared=True gives every equation the same regressor matrix (the shared-regressor path);
    shared=False gives them the same columns in other orders and units, which spans the same
    space (so the residuals still nearly add up) but takes the general path."""
    rng = np.random.default_rng(40 + k)
    t = 120
    x0 = np.column_stack([np.ones(t), rng.standard_normal((t, 2))])
    if shared:
        xs = [x0, x0, x0]
    else:
        xs = [x0, x0[:, [2, 0, 1]] * [3.0, 1e-3, 10.0], x0[:, [1, 2, 0]] * [1e4, 1.0, 2.0]]
    e1, e2 = rng.standard_normal(t), rng.standard_normal(t)
    e3 = e1 + e2 + 10.0**-k * rng.standard_normal(t)
    ys = [x @ rng.uniform(0.5, 2, 3) + e for x, e in zip(xs, (e1, e2, e3))]
    eqs = {"food": (ys[0], xs[0]), "fuel": (ys[1], xs[1]), "other": (ys[2], xs[2])}
    _, ill_ols = _fit(eqs, "ols")
    assert not ill_ols, f"OLS warned: {ill_ols[0].message}"
    # the OLS residual correlation, by numpy: the reference for what FGLS must invert
    res = []
    for y, x in zip(ys, xs):
        q, _ = np.linalg.qr(x)
        res.append(y - q @ (q.T @ y))
    e = np.column_stack(res)
    c = np.corrcoef(e, rowvar=False)
    cond = np.linalg.cond(c)
    try:
        fit, ill = _fit(eqs, "fgls")
    except errors.SingularOmegaError as err:
        assert set(err.equations) == {"food", "fuel", "other"}, err.equations
        assert cond > 1e12, f"SingularOmegaError at Omega condition {cond:.3g}"
        return
    omega_warn = [w for w in ill if "cross-equation covariance" in str(w.message)]
    if cond > 1e9:
        assert omega_warn, f"no warning at Omega condition {cond:.3g}"
        m = COND_RE.search(str(omega_warn[0].message))
        assert m, str(omega_warn[0].message)
        est = float(m.group(1))
        assert cond / 30 <= est <= cond * 30, f"Omega estimate {est:.3g} vs numpy {cond:.3g}"
    if cond < 1e7:
        assert not omega_warn, f"warning at Omega condition {cond:.3g}: {omega_warn[0].message}"
    assert np.all(np.isfinite(fit.coef.to_numpy())) and np.all(np.isfinite(fit.se.to_numpy()))
