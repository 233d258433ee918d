"""Numerical accuracy on the NIST StRD Longley problem.

Source: NIST StRD (Statistical Reference Datasets), linear regression,
"Longley", certified values (higher difficulty; the design is badly
conditioned, cond(X) ~ 5e9).

The 16 data rows and the certified coefficients, standard errors, residual
standard deviation and R^2 below were typed from memory; they are
cross-checked against statsmodels' shipped copy of the data
(statsmodels.datasets.longley) exactly, and against statsmodels' own test
copy of the NIST certified values (statsmodels' regression test results,
if that file is installed), so a typo cannot go unnoticed.

Accuracy is counted as NIST's LRE (log relative error, correct significant
digits, capped at 15). Rule (per quantity, minimum LRE over its elements):
blocksur >= max(7, statsmodels OLS - MARGIN) with MARGIN = 0: at least as many digits as
statsmodels OLS, its default (pinv) fit on the same data. (The residual is computed from the
data in doubled precision and projected, so the residual variance is correct to the last
place; coefficients and standard errors then beat statsmodels by 0.4 to 1.7 digits.)
"""

import numpy as np
import pytest
import statsmodels.api as sm

import blocksur
from reference import lre, record, record_min

MARGIN = 0.0  # digits blocksur may trail statsmodels OLS by
FLOOR = 7.0  # digits blocksur must reach in any case

# NIST StRD Longley data (from memory): y = TOTEMP, x1 = GNP deflator,
# x2 = GNP, x3 = unemployed, x4 = armed forces, x5 = population, x6 = year.
_LONGLEY = """
60323 83.0 234289 2356 1590 107608 1947
61122 88.5 259426 2325 1456 108632 1948
60171 88.2 258054 3682 1616 109773 1949
61187 89.5 284599 3351 1650 110929 1950
63221 96.2 328975 2099 3099 112075 1951
63639 98.1 346999 1932 3594 113270 1952
64989 99.0 365385 1870 3547 115094 1953
63761 100.0 363112 3578 3350 116219 1954
66019 101.2 397469 2904 3048 117388 1955
67857 104.6 419180 2822 2857 118734 1956
68169 108.4 442769 2936 2798 120445 1957
66513 110.8 444546 4681 2637 121950 1958
68655 112.6 482704 3813 2552 123366 1959
69564 114.2 502601 3931 2514 125368 1960
69331 115.7 518173 4806 2572 127852 1961
70551 116.9 554894 4007 2827 130081 1962
"""
DATA = np.array([[float(v) for v in line.split()] for line in _LONGLEY.strip().splitlines()])

# NIST StRD Longley, certified values (from memory), order B0 (constant), B1..B6.
CERT_COEF = np.array([
    -3482258.63459582,
    15.0618722713733,
    -0.358191792925910e-01,
    -2.02022980381683,
    -1.03322686717359,
    -0.511041056535807e-01,
    1829.15146461355,
])
CERT_SE = np.array([
    890420.383607373,
    84.9149257747669,
    0.334910077722432e-01,
    0.488399681651699,
    0.214274163161675,
    0.226073200069370,
    455.478499142212,
])
CERT_RESID_SD = 304.854073561965
CERT_R2 = 0.995479004577296
CERT_SSR = 836424.055505915

NAMES = ["const", "gnp_deflator", "gnp", "unemployed", "armed_forces", "population", "year"]


def _y_X():
    # Data from statsmodels' shipped Longley dataset (checked equal to the
    # embedded NIST rows in test_embedded_data_matches_statsmodels).
    d = sm.datasets.longley.load_pandas().data
    y = d["TOTEMP"].to_numpy(dtype=float)
    X = np.column_stack([np.ones(16), d[["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]].to_numpy(dtype=float)])
    return y, X


def _statsmodels_lre():
    y, X = _y_X()
    r = sm.OLS(y, X).fit()
    return {
        "coef": float(lre(r.params, CERT_COEF).min()),
        "se": float(lre(r.bse, CERT_SE).min()),
        "resid_sd": float(lre(np.sqrt(r.scale), CERT_RESID_SD)),
        "r2": float(lre(r.rsquared, CERT_R2)),
    }


SM_LRE = _statsmodels_lre()


def _require(label, got_lre, key):
    need = max(FLOOR, SM_LRE[key] - MARGIN)
    record_min(f"NIST Longley LRE digits: {label} (statsmodels OLS: {SM_LRE[key]:.2f})", got_lre)
    assert got_lre >= need, f"{label}: LRE {got_lre:.2f} < required {need:.2f} (statsmodels {SM_LRE[key]:.2f})"


# ---------------------------------------------------------------------------
# The reference data and values themselves


def test_embedded_data_matches_statsmodels():
    # NIST StRD rows typed from memory == statsmodels' shipped Longley data.
    d = sm.datasets.longley.load_pandas().data
    shipped = d[["TOTEMP", "GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]].to_numpy(dtype=float)
    np.testing.assert_array_equal(DATA, shipped)


def test_certified_values_cross_check():
    # The certified values typed here vs statsmodels' own copy of the NIST
    # certified values (its regression test results), when installed.
    try:
        from statsmodels.regression.tests.results.results_regression import Longley
    except ImportError:  # pragma: no cover - depends on the statsmodels build
        Longley = None
    if Longley is not None:
        ref = Longley()
        # statsmodels orders them B1..B6, B0.
        np.testing.assert_array_equal(np.roll(np.array(ref.params), 1), CERT_COEF)
        np.testing.assert_array_equal(np.roll(np.array(ref.bse), 1), CERT_SE)
        np.testing.assert_allclose(np.sqrt(ref.scale), CERT_RESID_SD, rtol=1e-14, atol=0)
        assert ref.rsquared == CERT_R2 and ref.ssr == CERT_SSR
    # Independently: statsmodels OLS reproduces them to >= 10 digits, and the
    # certified residual SD is sqrt(SSR / (16 - 7)) (definition).
    assert SM_LRE["coef"] >= 10 and SM_LRE["se"] >= 10
    np.testing.assert_allclose(np.sqrt(CERT_SSR / 9), CERT_RESID_SD, rtol=1e-14, atol=0)


# ---------------------------------------------------------------------------
# One-equation system


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_one_equation_certified(method):
    y, X = _y_X()
    fit = blocksur.EquationSystem({"totemp": (y, X)}, regressor_names={"totemp": NAMES}).fit(method, omega="dof")
    assert list(fit.coef.index) == [("totemp", n) for n in NAMES]
    # With one equation every method is OLS (Omega is a scalar).
    _require(f"1 eq {method} coef", float(lre(fit.coef.to_numpy(), CERT_COEF).min()), "coef")
    # omega="dof": Omega = SSR/(T-K), so se are the classical OLS se.
    _require(f"1 eq {method} se", float(lre(fit.se.to_numpy(), CERT_SE).min()), "se")
    _require(f"1 eq {method} resid SD", float(lre(fit.resid_se["totemp"], CERT_RESID_SD)), "resid_sd")
    _require(f"1 eq {method} R^2", float(lre(fit.r2["totemp"], CERT_R2)), "r2")
    # Omega with the dof divisor is the certified residual variance.
    got = float(lre(np.sqrt(fit.omega.loc["totemp", "totemp"]), CERT_RESID_SD))
    _require(f"1 eq {method} sqrt(omega)", got, "resid_sd")


def test_one_equation_loglik_matches_statsmodels():
    # For N = 1 the SUR Gaussian log-likelihood at Omega = SSR/T is the OLS
    # log-likelihood; statsmodels OLS reports it as llf.
    y, X = _y_X()
    fit = blocksur.EquationSystem({"totemp": (y, X)}).fit("ols")
    r = sm.OLS(y, X).fit()
    rel = abs(fit.loglik - r.llf) / abs(r.llf)
    record("NIST Longley: 1-eq loglik vs statsmodels llf (rel)", rel)
    assert rel <= 1e-10


# ---------------------------------------------------------------------------
# Two equations with identical regressors: FGLS = OLS (Zellner 1962; Kruskal's
# theorem), so equation 1 must still hit the certified values.


def _two_eq_system():
    y, X = _y_X()
    d = sm.datasets.longley.load_pandas().data
    # Second equation: real GNP (100 * GNP / GNP deflator) on the same
    # regressors -- not in their span, residuals only weakly correlated with
    # equation 1's, so Omega is well conditioned.
    y2 = 100.0 * d["GNP"].to_numpy(float) / d["GNPDEFL"].to_numpy(float)
    names = {"totemp": NAMES, "real_gnp": NAMES}
    return {"totemp": (y, X), "real_gnp": (y2, X.copy())}, names


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_two_equation_identical_regressors_certified(method):
    eqs, names = _two_eq_system()
    fit = blocksur.EquationSystem(eqs, regressor_names=names).fit(method, omega="dof")
    _require(f"2 eq {method} eq1 coef", float(lre(fit.coef["totemp"].to_numpy(), CERT_COEF).min()), "coef")
    # vcov block (1,1) = omega_11 (X'X)^-1 and omega_11 = SSR_1/(T-K) = certified variance.
    _require(f"2 eq {method} eq1 se", float(lre(fit.se["totemp"].to_numpy(), CERT_SE).min()), "se")
    _require(f"2 eq {method} eq1 resid SD", float(lre(fit.resid_se["totemp"], CERT_RESID_SD)), "resid_sd")
    _require(f"2 eq {method} eq1 R^2", float(lre(fit.r2["totemp"], CERT_R2)), "r2")

    # Equation 2 has no certified values: statsmodels OLS on the same data,
    # itself good to ~11 digits here, so 1e-7 is a loose bound.
    y2, X = eqs["real_gnp"]
    r2 = sm.OLS(y2, X).fit()
    rel_b = float(np.max(np.abs(fit.coef["real_gnp"].to_numpy() - r2.params) / np.abs(r2.params)))
    rel_se = float(np.max(np.abs(fit.se["real_gnp"].to_numpy() - r2.bse) / r2.bse))
    record(f"NIST Longley 2 eq {method}: eq2 coef vs statsmodels OLS (rel)", rel_b)
    record(f"NIST Longley 2 eq {method}: eq2 se vs statsmodels OLS (rel)", rel_se)
    assert rel_b <= 1e-7
    assert rel_se <= 1e-7
