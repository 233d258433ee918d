"""Standard errors come from the diagonal of the covariance without forming the K x K matrix
(classical unrestricted fits: the inverse of the Cholesky factor of the GLS matrix, by panels;
OLS and shared regressors: the diagonal blocks). Every path must agree with the square roots of
the full covariance's diagonal, whichever is read first.

Outside references: the full covariance (itself checked against statsmodels GLS and the
brute-force sandwich elsewhere), statsmodels GLS ``normalized_cov_params`` on the dense stacked
system, and the kernel's peak-RSS accounting (/proc/self/status) for the memory claim.
"""

from __future__ import annotations

import json
import os
import pickle
import subprocess
import sys

import numpy as np
import pytest

import blocksur
from reference import dense_gls, identical_regressor_data, make_sur_data, max_rel, record

RTOL_DIAG = 1e-13  # diagonal path vs the full covariance's diagonal (same numbers, other order)

RESTRICT = "a::x1 = b::x1; c::x0 = 0.5"


def _general():
    return make_sur_data(71, T=40, ks=(3, 4, 2, 3))


def _shared():
    return identical_regressor_data(72, T=40, k=3, n=3)


def _compare(fit_se_first, fit_vcov_first):
    se = fit_se_first.se.to_numpy()
    full = np.sqrt(np.maximum(np.diag(fit_se_first.vcov.to_numpy()), 0.0))
    # a coefficient fixed by a restriction has exactly zero variance on both paths
    zero = full == 0.0
    np.testing.assert_array_equal(se[zero], 0.0)
    err = float(np.max(np.abs(se - full)[~zero] / full[~zero]))
    # reading vcov first changes nothing: se never depends on the order of access
    fit_vcov_first.vcov
    np.testing.assert_array_equal(fit_vcov_first.se.to_numpy(), se)
    return err


@pytest.mark.parametrize("restricted", [False, True], ids=["free", "restricted"])
@pytest.mark.parametrize("covariance", ["classical", "hc0", "hc1"])
@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
@pytest.mark.parametrize("data", ["general", "shared"])
def test_se_is_the_root_of_the_full_covariance_diagonal(data, method, covariance, restricted):
    eqs = _general() if data == "general" else _shared()
    kw = dict(covariance=covariance, restrictions=RESTRICT if restricted else None, tol=1e-12)
    system = blocksur.EquationSystem(eqs)
    one = system.fit(method, **kw)
    two = system.fit(method, **kw)
    err = record(f"se diagonal path vs sqrt(diag(vcov)) (rel), {data}", _compare(one, two))
    assert err <= RTOL_DIAG
    if restricted:
        assert (one.se.to_numpy() == 0.0).sum() == 1  # c::x0 fixed
    else:
        assert np.all(one.se.to_numpy() > 0.0)


@pytest.mark.parametrize("divisor", ["ml", "dof"])
def test_se_of_a_blocked_system_vs_statsmodels(divisor):
    # K = 80 coefficients: beyond LAPACK's block size, so the blocked triangular inverse runs.
    eqs = make_sur_data(73, T=90, ks=(4,) * 20)
    fit = blocksur.EquationSystem(eqs).fit("fgls", omega=divisor)
    _, V_ref = dense_gls(eqs, fit.omega.to_numpy())
    se_ref = np.sqrt(np.diag(V_ref))
    err = record(f"se diagonal path, K=80, vs statsmodels GLS [{divisor}] (rel)",
                 max_rel(fit.se.to_numpy(), se_ref))
    assert err <= 1e-9
    full = np.sqrt(np.diag(fit.vcov.to_numpy()))
    err = record("se diagonal path, K=80, vs sqrt(diag(vcov)) (rel)", max_rel(fit.se.to_numpy(), full))
    assert err <= RTOL_DIAG


def test_restored_fits_keep_their_standard_errors():
    fit = blocksur.EquationSystem(_general()).fit("fgls", covariance="hc1")
    se = fit.se.to_numpy()
    again = blocksur.FittedSystem.from_dict(json.loads(json.dumps(fit.to_dict())))
    np.testing.assert_allclose(again.se.to_numpy(), se, rtol=1e-15, atol=0)
    unpickled = pickle.loads(pickle.dumps(fit))
    np.testing.assert_allclose(unpickled.se.to_numpy(), se, rtol=1e-15, atol=0)
    assert list(again.se.index) == list(fit.se.index)


def test_se_series_is_an_ordinary_series():
    import pandas as pd

    fit = blocksur.EquationSystem(_general()).fit("fgls")
    se = fit.se
    expected = pd.Series(np.sqrt(np.diag(fit.vcov.to_numpy())), index=fit.vcov.index, name="se")
    pd.testing.assert_series_equal(se, expected, rtol=RTOL_DIAG, atol=0)
    coef = fit.coef
    assert coef.name == "coef" and coef.dtype == np.float64 and coef.index.names == ["equation", "regressor"]
    # the Series own their values: editing a copy leaves the fit alone
    edited = coef.copy()
    edited.iloc[0] = 1e9
    assert fit.coef.iloc[0] != 1e9 and fit.coef is coef


PEAK_CHILD = r"""
import json, re, sys
import numpy as np
import blocksur

def hwm_kb():
    with open("/proc/self/status") as f:
        return int(re.search(r"^VmHWM:\s+(\d+)\s+kB", f.read(), re.M).group(1))

rng = np.random.default_rng(5)
n, t, k = 400, 450, 4
common = rng.standard_normal(t)
eqs = {}
for i in range(n):
    X = np.column_stack([np.ones(t), rng.standard_normal((t, k - 1))])
    eqs[f"e{i}"] = (X @ np.ones(k) + common + rng.standard_normal(t), X)
fit = blocksur.EquationSystem(eqs).fit("fgls")
fit.coef
with open("/proc/self/clear_refs", "w") as f:
    f.write("5")
base = hwm_kb()
se = fit.se.to_numpy()
print(json.dumps({"se_kb": hwm_kb() - base, "K": fit.n_coef, "positive": bool(np.all(se > 0))}))
"""


@pytest.mark.skipif(not os.path.exists("/proc/self/clear_refs"), reason="needs Linux /proc")
def test_se_needs_less_than_a_k_by_k_matrix():
    out = subprocess.run([sys.executable, "-c", PEAK_CHILD], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr
    res = json.loads(out.stdout.strip().splitlines()[-1])
    k_by_k_kb = 8 * res["K"] ** 2 / 1024
    ratio = record("se peak RSS increase / (8 K^2 bytes), K=1600", res["se_kb"] / k_by_k_kb)
    assert res["positive"]
    # L^-1 is formed a panel of 256 columns at a time (here 1600 x 256, 0.16 of a K x K
    # matrix); the full covariance path took three K x K matrices or more
    assert ratio <= 0.5
