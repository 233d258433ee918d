"""Many equations: Ledoit-Wolf Omega and the matrix-free conjugate-gradient solver
(``EquationSystem.fit(omega="ledoit-wolf", shrink_target=..., solver=...)``).

Outside references:
* scikit-learn's ``sklearn.covariance.ledoit_wolf(resid, assume_centered=True)`` on the OLS
  residual matrix that two-step FGLS estimates Omega from (scaled-identity target);
* the diagonal-target intensity written out in numpy in this file:
  lambda = sum_{i!=j} pi_ij / (T sum_{i!=j} s_ij^2) clipped to [0, 1], with
  pi_ij = mean_t (e_ti e_tj - s_ij)^2 and s = E'E/T; Omega = (1 - lambda) s + lambda diag(s);
* the direct (Cholesky) solver for the CG path, which must agree to the CG tolerance;
* the kernel's peak resident memory (VmHWM, in a subprocess) for the claim that the CG path never
  forms a K x K matrix.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

import blocksur
from blocksur.errors import InvalidOptionError
from blocksur.scenarios import random_system
from reference import record
from scale_support import rel

sklearn_cov = pytest.importorskip("sklearn.covariance")


def _system(n_eq=25, n_obs=30, seed=41):
    data = random_system(n_eq, n_obs, k=([3, 2, 4, 3, 2] * n_eq)[:n_eq], rho=0.4, seed=seed)
    return blocksur.EquationSystem(data.equations)


def _lw_diagonal(e: np.ndarray) -> tuple[np.ndarray, float]:
    """The diagonal-target Ledoit-Wolf estimate of the residuals e (T x N), in numpy."""
    t, n = e.shape
    s = e.T @ e / t
    pi = ((e[:, :, None] * e[:, None, :] - s) ** 2).mean(axis=0)
    off = ~np.eye(n, dtype=bool)
    lam = float(np.clip(pi[off].sum() / (t * np.sum(s[off] ** 2)), 0.0, 1.0))
    return (1 - lam) * s + lam * np.diag(np.diag(s)), lam


@pytest.mark.parametrize("solver", ["direct", "cg"])
def test_identity_target_matches_sklearn(solver):
    system = _system()
    fit = system.fit("fgls", omega="ledoit-wolf", shrink_target="identity", solver=solver, cg_tol=1e-12)
    e = system.fit("ols").resid.to_numpy()  # the residuals two-step FGLS estimates Omega from
    omega, lam = sklearn_cov.ledoit_wolf(e, assume_centered=True)  # reference: scikit-learn
    d = record(f"Ledoit-Wolf identity ({solver}) vs sklearn: omega (rel)", rel(fit.omega.to_numpy(), omega))
    assert d <= 1e-12
    assert fit.shrinkage == pytest.approx(lam, rel=1e-12, abs=0)
    assert 0 < fit.shrinkage < 1
    assert fit.omega_divisor == "ledoit-wolf" and fit.shrink_target == "identity"


@pytest.mark.parametrize("solver", ["direct", "cg"])
def test_diagonal_target_matches_numpy_formula(solver):
    system = _system(seed=42)
    fit = system.fit("fgls", omega="ledoit-wolf", shrink_target="diagonal", solver=solver, cg_tol=1e-12)
    omega, lam = _lw_diagonal(system.fit("ols").resid.to_numpy())  # reference: the formula above
    d = record(f"Ledoit-Wolf diagonal ({solver}) vs numpy formula: omega (rel)", rel(fit.omega.to_numpy(), omega))
    assert d <= 1e-12
    assert fit.shrinkage == pytest.approx(lam, rel=1e-12, abs=0)
    np.testing.assert_allclose(np.diag(fit.omega), np.diag(omega), rtol=1e-12, atol=0)  # variances kept


def test_iterated_shrinkage_uses_the_previous_residuals():
    system = _system(seed=43)
    fit = system.fit("ifgls", omega="ledoit-wolf", shrink_target="diagonal", tol=1e-13, max_iter=5000)
    assert fit.converged
    # at the fixed point the Omega used equals the formula on the final residuals (to tol)
    omega, lam = _lw_diagonal(fit.resid.to_numpy())
    assert rel(fit.omega.to_numpy(), omega) <= 1e-9
    assert fit.shrinkage == pytest.approx(lam, rel=1e-9, abs=0)


def test_shrinkage_gives_a_usable_fgls_when_n_exceeds_t():
    system = _system(n_eq=40, n_obs=30, seed=44)
    with pytest.raises(blocksur.SingularOmegaError):
        system.fit("fgls")  # S/T has rank < N
    fit = system.fit("fgls", omega="ledoit-wolf")
    assert np.isfinite(fit.coef).all() and np.isfinite(fit.se).all() and (fit.se > 0).all()
    assert np.linalg.eigvalsh(fit.omega.to_numpy())[0] > 0


@pytest.mark.parametrize("method,omega", [("fgls", "ml"), ("ifgls", "ml"), ("fgls", "ledoit-wolf"), ("ifgls", "ledoit-wolf")])
def test_cg_agrees_with_direct_to_the_cg_tolerance(method, omega):
    system = _system(n_eq=12, n_obs=60, seed=45)
    cg_tol = 1e-11
    direct = system.fit(method, omega=omega, solver="direct", tol=1e-12)
    cg = system.fit(method, omega=omega, solver="cg", cg_tol=cg_tol, tol=1e-12)
    assert cg.solver == "cg" and direct.solver == "direct"
    assert len(cg.cg_iterations) == cg.n_iter and cg.cg_iterations[0] > 0  # later steps start warm
    assert cg.cg_residual <= cg_tol
    assert np.isnan(direct.cg_residual) and direct.cg_iterations == []
    # reference: the direct (Cholesky) solve, to a small multiple of the CG tolerance
    bound = 100 * cg_tol
    d = record(f"CG vs direct ({method}, {omega}): coef (rel)", rel(cg.coef, direct.coef))
    assert d <= bound
    d = record(f"CG vs direct ({method}, {omega}): se (rel)", rel(cg.se, direct.se))
    assert d <= bound
    np.testing.assert_allclose(cg.se_of(["eq3", "eq7"]), direct.se_of(["eq3", "eq7"]), rtol=bound, atol=0)
    np.testing.assert_allclose(cg.omega, direct.omega, rtol=bound, atol=1e-15)


def test_auto_solver_follows_the_memory_limit():
    system = _system(n_eq=6, n_obs=50, seed=46)
    need = system.direct_memory()
    assert system.fit("fgls", memory_limit=need + 1).solver == "direct"
    assert system.fit("fgls", memory_limit=need - 1).solver == "cg"
    with pytest.raises(InvalidOptionError, match="direct solver"):
        system.fit("fgls", solver="cg", covariance="hc0")
    with pytest.raises(InvalidOptionError, match="solver"):
        system.fit("fgls", solver="qr")


_PROBE = textwrap.dedent(
    """
    import gc, json, sys, time
    import numpy as np
    import blocksur

    def status(key):
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) * 1024

    n, t, k = 2000, 300, 4
    rng = np.random.default_rng(7)
    common = rng.standard_normal((t, 3))
    eqs = []
    for i in range(n):
        X = np.column_stack([np.ones(t), rng.standard_normal((t, k - 1))])
        eqs.append((X @ rng.normal(size=k) + common @ rng.normal(0, 0.5, 3) + rng.standard_normal(t), X))
    system = blocksur.EquationSystem(eqs)
    gc.collect()
    base = status("VmRSS")
    with open("/proc/self/clear_refs", "w") as fh:  # resets VmHWM to the current RSS
        fh.write("5")
    fit = system.fit("fgls", omega="ledoit-wolf", solver="auto", memory_limit=1e9)
    coef = fit.coef.to_numpy()
    print(json.dumps({"growth": status("VmHWM") - base, "solver": fit.solver, "k": fit.n_coef,
                      "direct": system.direct_memory(), "finite": bool(np.isfinite(coef).all()),
                      "cg_residual": fit.cg_residual}))
    """
)


@pytest.mark.skipif(not os.access("/proc/self/clear_refs", os.W_OK), reason="needs Linux /proc/self/clear_refs")
def test_cg_path_never_forms_a_k_by_k_matrix():
    # N=2000, T=300, K_i=4: K = 8000, one K x K matrix is 512 MB; the direct path needs ~2.3 GB
    out = subprocess.run([sys.executable, "-c", _PROBE], capture_output=True, text=True, timeout=300, check=True)
    res = json.loads(out.stdout.strip().splitlines()[-1])
    kk = 8 * res["k"] ** 2
    assert res["k"] == 8000 and res["solver"] == "cg" and res["finite"]
    assert res["direct"] > 1e9  # why auto chose CG under memory_limit=1e9
    assert res["cg_residual"] <= 1e-10
    # reference: the kernel's peak RSS (VmHWM) of the fit over the process with the data loaded
    record("CG path peak RSS growth / one K x K matrix (N=2000, T=300, K_i=4)", res["growth"] / kk)
    assert res["growth"] < 0.5 * kk, f"peak grew by {res['growth'] / 1e6:.0f} MB; K x K is {kk / 1e6:.0f} MB"


def test_conjugate_gradients_stopped_short_is_not_a_converged_fit():
    """cg_max_iter reached above cg_tol: converged=False and a NotConvergedWarning (the fit had
    reported converged=True, silently, with coefficients a third of a standard error off). The
    same solve run to its tolerance agrees with the direct solver (CG on a positive definite
    system converges to its solution; common practice)."""
    import warnings

    from blocksur.errors import NotConvergedWarning

    rng = np.random.default_rng(1)
    T = 200
    e = rng.multivariate_normal([0, 0, 0], [[1, 0.8, 0.8], [0.8, 1, 0.8], [0.8, 0.8, 1]], size=T)
    eqs = {}
    for i, k in enumerate([3, 4, 5]):
        Xi = np.column_stack([np.ones(T), rng.normal(size=(T, k - 1))])
        eqs[f"e{i}"] = (Xi @ np.ones(k) + e[:, i], Xi)
    system = blocksur.EquationSystem(eqs)
    direct = system.fit("fgls")
    with pytest.warns(NotConvergedWarning, match="cg_max_iter=1"):
        short = system.fit("fgls", solver="cg", cg_max_iter=1)
    assert not short.converged
    assert short.cg_residual > 1e-10
    with warnings.catch_warnings():
        warnings.simplefilter("error", NotConvergedWarning)
        full = system.fit("fgls", solver="cg")
    assert full.converged
    np.testing.assert_allclose(full.coef.to_numpy(), direct.coef.to_numpy(), rtol=0,
                               atol=1e-8 * float(direct.se.min()))
