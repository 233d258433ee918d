"""Two-step FGLS in one pass over the data (no P x P Gram matrix), the route large systems
take: it must be the same estimator as the full preparation, serve everything a fit offers,
and leave the system able to run any other fit.

References: the dense statsmodels checks of test_reference_dense.py and test_grunfeld.py run
through both routes (the `route` fixture of conftest.py); here the two routes are compared
with each other (the same estimator, so they agree to rounding: common practice, a few
hundred eps on conditioned data) and the routing rules are pinned."""

import json
import os
import subprocess
import sys
import warnings

import numpy as np
import pytest

import blocksur
import blocksur._system as system_mod
from blocksur.errors import InvalidOptionError, SingularOmegaError
from reference import make_sur_data, max_rel, max_rel_cov, record

KS = (3, 5, 2, 4, 1, 3)


def normwise(a, b):
    """max |a - b| / max |b| (residuals pass near zero: no entrywise ratio)."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return float(np.max(np.abs(a - b)) / np.max(np.abs(b)))


def _eqs(seed=21, T=80):
    return make_sur_data(seed, T=T, ks=KS, const=(True, True, False, True, True, True))


def _fit_both(monkeypatch, eqs, **kw):
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 10**12)
    gram = blocksur.EquationSystem(eqs).fit("fgls", **kw)
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 0)
    one = blocksur.EquationSystem(eqs).fit("fgls", **kw)
    assert one._prepared.residuals_only and not gram._prepared.residuals_only
    return gram, one


@pytest.mark.parametrize("omega", ["ml", "dof"])
def test_one_pass_fit_offers_what_a_full_fit_offers(monkeypatch, omega):
    eqs = _eqs()
    gram, one = _fit_both(monkeypatch, eqs, omega=omega)
    assert (one.method, one.n_iter, one.converged, one.omega_divisor) == ("fgls", 1, True, omega)
    assert list(one.coef.index) == list(gram.coef.index)
    for name in ("coef", "se", "resid", "fitted", "ssr", "r2", "r2_adj", "resid_se"):
        a, b = getattr(one, name).to_numpy(), getattr(gram, name).to_numpy()
        assert normwise(a, b) <= 1e-12, name
    assert max_rel_cov(one.vcov.to_numpy(), gram.vcov.to_numpy()) <= 1e-12
    assert max_rel_cov(one.omega.to_numpy(), gram.omega.to_numpy()) <= 1e-13
    assert abs(one.loglik - gram.loglik) <= 1e-10 * abs(gram.loglik)
    assert abs(one.aic - gram.aic) <= 1e-10 * abs(gram.aic)
    # robust covariance (a pass over the data with the fit's Omega)
    h1 = blocksur.EquationSystem(eqs).fit("fgls", omega=omega, covariance="hc0")
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 10**12)
    h0 = blocksur.EquationSystem(eqs).fit("fgls", omega=omega, covariance="hc0")
    assert h1._prepared.residuals_only and not h0._prepared.residuals_only
    assert max_rel(h1.se.to_numpy(), h0.se.to_numpy()) <= 1e-12
    # tests: Wald, the Breusch-Pagan LM (OLS residual cross-products, kept) and the LR test
    # of a diagonal Omega (an iterated fit, which prepares the system in full)
    names = list(eqs)
    hyp = f"{names[0]}::x1 = 0"
    assert abs(one.wald(hyp).statistic - gram.wald(hyp).statistic) <= 1e-9 * abs(gram.wald(hyp).statistic)
    for test in ("omega_diagonal_lm", "omega_diagonal_lr"):
        a, b = getattr(one, test)().statistic, getattr(gram, test)().statistic
        assert abs(a - b) <= 1e-9 * b, test
    # prediction and the report
    new = {n: X[:5] for n, (_, X) in eqs.items()}
    assert max_rel(one.predict(new).to_numpy(), gram.predict(new).to_numpy()) <= 1e-12
    assert max_rel(one.prediction_se(new).to_numpy(), gram.prediction_se(new).to_numpy()) <= 1e-12
    assert one.report() == gram.report()  # every printed digit agrees
    # a restored copy answers the same
    back = blocksur.FittedSystem.from_dict(one.to_dict())
    assert max_rel(back.se.to_numpy(), one.se.to_numpy()) == 0


def test_the_system_runs_other_fits_after_a_one_pass_fit(monkeypatch):
    eqs = _eqs(seed=22)
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 0)
    s = blocksur.EquationSystem(eqs)
    one = s.fit("fgls")
    assert one._prepared.residuals_only
    assert s._full_prepared() is None  # nothing cached by the one-pass route
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        it = s.fit("ifgls", max_iter=3, tol=0)
    assert not it._prepared.residuals_only
    # with the full preparation cached, a later two-step fit uses it (only the GLS step left)
    again = s.fit("fgls")
    assert not again._prepared.residuals_only
    assert max_rel(again.coef.to_numpy(), one.coef.to_numpy()) <= 1e-12
    # the light preparation refuses GLS work with a typed error, not a wrong number
    with pytest.raises(InvalidOptionError, match="prepare the system again"):
        one._prepared.estimate("fgls", "ml", 1e-10, 10)


@pytest.mark.filterwarnings("ignore::blocksur.errors.NotConvergedWarning")
def test_routing_rules(monkeypatch):
    eqs = _eqs(seed=23)
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 0)
    route = lambda **kw: blocksur.EquationSystem(eqs).fit(**kw)._prepared.residuals_only  # noqa: E731
    assert route(method="fgls")
    assert route(method="fgls", omega="dof")
    assert not route(method="ols")
    assert not route(method="ifgls", max_iter=2, tol=0)
    assert not route(method="fgls", omega="ledoit-wolf")
    names = list(eqs)
    assert not route(method="fgls", restrictions=f"{names[0]}::x1 = {names[1]}::x1")
    # the size threshold: K = 18 here
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", sum(KS) + 1)
    assert not route(method="fgls")
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", sum(KS))
    assert route(method="fgls")


@pytest.mark.filterwarnings("ignore::blocksur.errors.NotConvergedWarning")
def test_the_default_threshold_routes_a_thousand_coefficients():
    # 250 equations x 4 regressors = 1000 coefficients: the one-pass route by default; the
    # same estimator as the full preparation (compared at rounding level)
    rng = np.random.default_rng(5)
    assert system_mod._DIRECT_FGLS_MIN_K == 1000
    T, N = 400, 250
    eqs = {}
    for i in range(N):
        X = np.column_stack([np.ones(T), rng.standard_normal((T, 3))])
        e = rng.standard_normal(T) * (1 + i % 3)
        eqs[f"r{i}"] = (X @ rng.standard_normal(4) + e, X)
    s = blocksur.EquationSystem(eqs)
    one = s.fit("fgls")
    assert one._prepared.residuals_only
    full = s.fit("ifgls", max_iter=1, tol=0)  # forces the full preparation; one GLS step
    assert max_rel(one.coef.to_numpy(), full.coef.to_numpy()) <= 1e-11
    assert max_rel(one.se.to_numpy(), full.se.to_numpy()) <= 1e-11


def test_one_pass_names_a_singular_omega(monkeypatch):
    # budget shares: three equations whose dependent variables add up to one with the same
    # regressors, so the OLS residuals add up to zero and Omega is singular
    rng = np.random.default_rng(8)
    T = 50
    X = np.column_stack([np.ones(T), rng.standard_normal((T, 2))])
    a = 0.3 + 0.05 * rng.standard_normal(T)
    b = 0.5 + 0.05 * rng.standard_normal(T)
    Z = np.column_stack([np.ones(T), rng.standard_normal(T)])
    eqs = {"food": (a, X), "rent": (b, X), "other": (1 - a - b, X), "extra": (rng.standard_normal(T), Z)}
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 0)
    with pytest.raises(SingularOmegaError) as one:
        blocksur.EquationSystem(eqs).fit("fgls")
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 10**12)
    with pytest.raises(SingularOmegaError) as gram:
        blocksur.EquationSystem(eqs).fit("fgls")
    # the same diagnosis (the message quotes a rounding-level eigenvalue: compare the rest)
    assert one.value.equations == gram.value.equations
    assert str(one.value).split("(")[0] == str(gram.value).split("(")[0]
    assert "Drop one of these equations" in str(one.value)
    assert set(one.value.equations) == {"food", "rent", "other"}


MEMORY_CHILD = r"""
import gc, json, re, sys
import numpy as np
from blocksur import _core

def status_kb(key):
    with open("/proc/self/status") as f:
        return int(re.search(r"^" + key + r":\s+(\d+)\s+kB", f.read(), re.M).group(1))

rng = np.random.default_rng(8)
n, t, k = 300, 400, 10
common = rng.standard_normal(t)
ys, xs = [], []
for i in range(n):
    X = np.column_stack([np.ones(t), rng.standard_normal((t, k - 1))])
    ys.append(X @ np.ones(k) + common + rng.standard_normal(t))
    xs.append(X)
names = [f"e{i}" for i in range(n)]
regs = [[f"x{j}" for j in range(k)] for _ in range(n)]
gc.collect()
with open("/proc/self/clear_refs", "w") as f:
    f.write("5")
base, rss0 = status_kb("VmHWM"), status_kb("VmRSS")
prepared, est = _core.fgls_from_data(ys, xs, names, regs, "ml")
peak = status_kb("VmHWM") - base
one_pass = bool(prepared.residuals_only)
se = prepared.coef_standard_errors(est, "classical")
del prepared, est
gc.collect()
kept = status_kb("VmRSS") - rss0
print(json.dumps({"peak_kb": peak, "kept_kb": kept, "K": n * k, "T": t, "N": n,
                  "one_pass": one_pass, "se_ok": bool(np.all(se > 0))}))
"""


@pytest.mark.skipif(not os.path.exists("/proc/self/clear_refs"), reason="needs Linux /proc")
def test_one_pass_memory_is_the_basis_plus_half_a_k_by_k_matrix():
    # The kernel's peak-RSS accounting (/proc/self/status) against the sizes of what the route
    # holds at once: W (T x P), the GLS matrix in packed storage (K(K+1)/2 values), a few N x N
    # and T x N temporaries, and 24 MB for whatever else a first fit in a process touches (17 MB
    # measured: the BLAS's own work buffers, the Gram kernel's panels, big buffers rounded up
    # to whole 2 MB pages). With the square K x K array (the route before packed storage) the
    # peak was 95-99 MB, beyond the bound.
    out = subprocess.run([sys.executable, "-c", MEMORY_CHILD], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr
    res = json.loads(out.stdout.strip().splitlines()[-1])
    assert res["one_pass"] and res["se_ok"]
    K, T, N = res["K"], res["T"], res["N"]
    mb = 1024.0
    w_kb = 8 * T * (K + N) / 1024
    packed_kb = 8 * K * (K + 1) / 2 / 1024
    square_kb = 8 * K * K / 1024
    small_kb = 8 * (6 * N * N + 2 * T * N) / 1024
    bound = w_kb + packed_kb + small_kb + 24 * mb
    record("one-pass FGLS peak RSS / (W + packed GLS matrix + temporaries + 24 MB), K=3000",
           res["peak_kb"] / bound)
    assert res["peak_kb"] <= bound
    assert w_kb + square_kb > bound
    # once the results are gone, at most the allocator's 32 MB of reusable buffers (and a
    # little of the C allocator's) stay resident
    record("RSS kept after the one-pass results are deleted (MB)", res["kept_kb"] / mb)
    assert res["kept_kb"] <= 40 * mb


def test_the_auto_solver_counts_what_the_one_pass_route_needs(monkeypatch):
    # Routing rule (ours): a two-step fit on the one-pass route needs W and the packed GLS
    # matrix, then the factor and a K x K covariance: less than the (K + N)^2 cross-products
    # plus three K x K matrices of the full preparation; a memory limit between the two keeps
    # such a fit direct (and exact) where an iterated fit goes matrix-free.
    monkeypatch.setattr(system_mod, "_DIRECT_FGLS_MIN_K", 0)
    eqs = make_sur_data(31, T=100, ks=(12,) * 6)
    system = blocksur.EquationSystem(eqs)
    K, T, N = 72, 100, 6
    one, full = system._one_pass_memory(), system.direct_memory()
    packed = K * (K + 1) // 2
    assert one == 8 * max(T * (K + N) + packed, 2 * packed + K * K)
    assert system._one_pass_memory("hc0") == 8 * max(T * (K + N) + packed, packed + 3 * K * K)
    assert full == 8 * ((K + N) ** 2 + 3 * K * K)
    limit = (one + full) / 2
    fit = system.fit("fgls", memory_limit=limit)
    assert fit.solver == "direct" and fit._prepared.residuals_only
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert system.fit("ifgls", memory_limit=limit).solver == "cg"
    assert system.fit("fgls", memory_limit=one - 1).solver == "cg"
    # restrictions take the full preparation, so its need counts: over the limit, the fit is
    # matrix-free, which refuses restrictions and says to raise the limit
    with pytest.raises(InvalidOptionError, match="memory limit"):
        system.fit("fgls", memory_limit=limit, restrictions="a::x1 = b::x1")
    assert system.fit("fgls", memory_limit=full + 1, restrictions="a::x1 = b::x1").solver == "direct"
