"""blocksur on real data: statsmodels' shipped Grunfeld investment data
(statsmodels.datasets.grunfeld), invest_t = b0 + b1 value_t + b2 capital_t
per firm, 1935-1954 (T = 20). Reference: statsmodels GLS on the dense
textbook system (tests/reference.py)."""

import numpy as np
import pytest
import statsmodels.api as sm

import blocksur
from reference import (
    dense_fgls,
    dense_gls,
    dense_ifgls,
    max_rel_coef,
    max_rel_cov,
    ols_by_equation,
    record,
)

TWO_FIRMS = ["General Electric", "Westinghouse"]
FIVE_FIRMS = ["General Motors", "Chrysler", "General Electric", "Westinghouse", "US Steel"]
REGRESSORS = ["const", "value", "capital"]
RTOL = 1e-9


def _system(firms):
    g = sm.datasets.grunfeld.load_pandas().data
    eqs = {}
    years = None
    for f in firms:
        d = g[g["firm"] == f].sort_values("year")
        if years is None:
            years = d["year"].to_numpy()
        # the equations must share the same periods
        np.testing.assert_array_equal(d["year"].to_numpy(), years)
        X = np.column_stack([np.ones(len(d)), d["value"].to_numpy(float), d["capital"].to_numpy(float)])
        eqs[f] = (d["invest"].to_numpy(float), X)
    assert len(years) == 20
    return eqs, {f: REGRESSORS for f in firms}


SYSTEMS = {"2 firms": TWO_FIRMS, "5 firms": FIVE_FIRMS}


@pytest.mark.parametrize("divisor", ["ml", "dof"])
@pytest.mark.parametrize("label", list(SYSTEMS))
def test_grunfeld_fgls(label, divisor, route):
    eqs, names = _system(SYSTEMS[label])
    fit = blocksur.EquationSystem(eqs, regressor_names=names).fit("fgls", omega=divisor)
    assert fit._prepared.residuals_only == (route == "one-pass")
    assert list(fit.coef.index) == [(f, r) for f in SYSTEMS[label] for r in REGRESSORS]
    # End to end: statsmodels OLS residuals -> Omega -> statsmodels GLS on the
    # dense textbook system.
    b_ref, V_ref, omega_ref = dense_fgls(eqs, divisor)
    d = record(f"Grunfeld {label}: fgls omega [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel, CS-scaled)", max_rel_cov(fit.omega.to_numpy(), omega_ref))
    assert d <= 1e-10
    d = record(f"Grunfeld {label}: fgls coef [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel)",
               max_rel_coef(fit.coef.to_numpy(), b_ref, np.sqrt(np.diag(V_ref))))
    assert d <= RTOL
    d = record(f"Grunfeld {label}: fgls vcov [{divisor}{'' if route == 'gram' else ', one-pass'}] (rel, CS-scaled)", max_rel_cov(fit.vcov.to_numpy(), V_ref))
    assert d <= RTOL
    np.testing.assert_allclose(fit.se.to_numpy(), np.sqrt(np.diag(V_ref)), rtol=RTOL, atol=0)


@pytest.mark.parametrize("divisor", ["ml", "dof"])
@pytest.mark.parametrize("label", list(SYSTEMS))
def test_grunfeld_ifgls(label, divisor):
    eqs, names = _system(SYSTEMS[label])
    fit = blocksur.EquationSystem(eqs, regressor_names=names).fit("ifgls", omega=divisor, tol=1e-12)
    assert fit.converged is True
    # Final GLS step vs statsmodels dense GLS with the reported Omega.
    b_ref, V_ref = dense_gls(eqs, fit.omega.to_numpy())
    d = record(f"Grunfeld {label}: ifgls coef [{divisor}] (rel)",
               max_rel_coef(fit.coef.to_numpy(), b_ref, np.sqrt(np.diag(V_ref))))
    assert d <= RTOL
    d = record(f"Grunfeld {label}: ifgls vcov [{divisor}] (rel, CS-scaled)", max_rel_cov(fit.vcov.to_numpy(), V_ref))
    assert d <= RTOL
    # Independent fixed point from dense statsmodels GLS iterated to full
    # convergence (iteration gap only, hence 1e-7).
    b_it, V_it, omega_it, _ = dense_ifgls(eqs, divisor)
    d = record(f"Grunfeld {label}: ifgls coef vs independent iteration [{divisor}] (rel)",
               max_rel_coef(fit.coef.to_numpy(), b_it, np.sqrt(np.diag(V_it))))
    assert d <= 1e-7
    d = record(f"Grunfeld {label}: ifgls vcov vs independent iteration [{divisor}] (rel, CS-scaled)",
               max_rel_cov(fit.vcov.to_numpy(), V_it))
    assert d <= 1e-7


@pytest.mark.parametrize("label", list(SYSTEMS))
def test_grunfeld_ols(label):
    eqs, names = _system(SYSTEMS[label])
    fit = blocksur.EquationSystem(eqs, regressor_names=names).fit("ols", omega="dof")
    worst_b = worst_se = 0.0
    for f, r in ols_by_equation(eqs).items():
        worst_b = max(worst_b, max_rel_coef(fit.coef[f].to_numpy(), r.params, r.bse))
        worst_se = max(worst_se, float(np.max(np.abs(fit.se[f].to_numpy() - r.bse) / r.bse)))
        np.testing.assert_allclose(fit.r2[f], r.rsquared, rtol=1e-10, atol=0)
    record(f"Grunfeld {label}: ols coef vs statsmodels OLS (rel)", worst_b)
    record(f"Grunfeld {label}: ols se vs statsmodels OLS (rel)", worst_se)
    assert worst_b <= 1e-10 and worst_se <= 1e-10


def test_grunfeld_fgls_moves_away_from_ols():
    # Guard: the Grunfeld firms' errors are correlated, so FGLS really differs
    # from OLS here (otherwise the checks above would prove little).
    eqs, names = _system(FIVE_FIRMS)
    b_ref, V_ref, _ = dense_fgls(eqs, "ml")
    b_ols = np.concatenate([r.params for r in ols_by_equation(eqs).values()])
    assert max_rel_coef(b_ref, b_ols, np.sqrt(np.diag(V_ref))) > 1e-2
