"""Helpers for the attack tests (tests/test_attack_*.py); a helper module, not tests.

* ``random_system``: a seeded random system with hostile features switched on by the caller
  (column scales, near-collinear columns, identical regressors, integer / float32 input,
  Fortran-ordered and strided views), returned as given to blocksur and as float64 copies.
* ``check_fit``: the invariants every successful fit must satisfy, checked with numpy against the
  data: the normal equations of least squares (OLS) and of GLS (FGLS, iterated FGLS), residuals
  that are y - X b, finite outputs.
* ``justified``: whether a documented blocksur error is what the data call for (a collinearity
  error needs numerically rank-deficient regressors, a singular-Omega error needs residuals that
  are (nearly) linearly dependent).
* ``run_python``: runs a snippet in a fresh interpreter (crashes and hangs cannot kill pytest).

Outside references: the first-order conditions of least squares and of GLS (theorem), numpy's
SVD (LAPACK) for condition numbers and ranks, numpy ``lstsq`` for OLS residuals.
"""

from __future__ import annotations

import os
import subprocess
import sys
from dataclasses import dataclass, field

import numpy as np

import blocksur
from blocksur import errors

EPS = np.finfo(float).eps
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


# ---------------------------------------------------------------------------
# Random systems


@dataclass
class Spec:
    """What a random system looks like; every field has a hostile option."""

    seed: int
    n_eq: int
    ks: tuple[int, ...]
    n_obs: int
    col_exp: tuple[float, ...] = ()  # log10 scale of each regressor column (flattened over eqs)
    y_exp: tuple[float, ...] = ()  # log10 scale of each dependent variable
    intercept: tuple[bool, ...] = ()
    near_collinear: tuple[int, float] | None = None  # (equation, log10 of the perturbation)
    identical: str | None = None  # None, "same", "copy", "permuted"
    dtype: str = "float64"  # float64, float32, int64, int32
    layout: str = "C"  # C, F, strided, reversed
    exact_fit: int | None = None  # an equation whose y has no error
    mean_shift: float = 0.0  # log10 of an offset added to non-intercept columns (0: none)


@dataclass
class System:
    spec: Spec
    given: list  # what blocksur receives: (y, X) pairs, any dtype/layout
    ys: list = field(default_factory=list)  # float64 copies of what was given
    xs: list = field(default_factory=list)


def _layout(a: np.ndarray, layout: str, rng: np.random.Generator) -> np.ndarray:
    if layout == "C":
        return np.ascontiguousarray(a)
    if layout == "F":
        return np.asfortranarray(a)
    if layout == "strided":
        # every other row (and, for matrices, every other column) of a bigger buffer
        if a.ndim == 1:
            big = np.zeros(2 * a.shape[0], dtype=a.dtype)
            big[::2] = a
            return big[::2]
        big = np.zeros((2 * a.shape[0], 2 * a.shape[1]), dtype=a.dtype)
        big[::2, ::2] = a
        return big[::2, ::2]
    if layout == "reversed":
        # negative strides: a reversed view of the reversed data
        if a.ndim == 1:
            return np.ascontiguousarray(a[::-1])[::-1]
        return np.ascontiguousarray(a[::-1, ::-1])[::-1, ::-1]
    raise ValueError(layout)


def random_system(spec: Spec) -> System:
    rng = np.random.default_rng(spec.seed)
    n, t = spec.n_eq, spec.n_obs
    ks = spec.ks
    col_exp = list(spec.col_exp) or [0.0] * sum(ks)
    y_exp = list(spec.y_exp) or [0.0] * n
    intercept = list(spec.intercept) or [True] * n
    integer = spec.dtype.startswith("int")

    def regressors(i: int, off: int) -> np.ndarray:
        k = ks[i]
        cols = []
        for j in range(k):
            if j == 0 and intercept[i]:
                cols.append(np.ones(t))
                continue
            kind = rng.integers(4)
            if integer:
                c = rng.integers(-40, 41, size=t).astype(float)
            elif kind == 0:
                c = rng.standard_normal(t)
            elif kind == 1:
                c = rng.uniform(0, 1, t)
            elif kind == 2:
                c = rng.standard_normal(t) + 0.5 * rng.standard_normal() * np.arange(t) / t
            else:
                c = rng.exponential(1.0, t)
            if spec.mean_shift and not integer:
                c = c + 10.0**spec.mean_shift
            if not integer:
                c = c * 10.0 ** col_exp[off + j]
            cols.append(c)
        x = np.column_stack(cols)
        return x

    xs = []
    off = 0
    if spec.identical:
        x0 = regressors(0, 0)
        for i in range(n):
            if spec.identical == "permuted" and i % 2 == 1 and x0.shape[1] > 1:
                perm = np.roll(np.arange(x0.shape[1]), 1)
                xs.append(x0[:, perm].copy())
            elif spec.identical == "same":
                xs.append(x0)
            else:
                xs.append(x0.copy())
    else:
        for i in range(n):
            xs.append(regressors(i, off))
            off += ks[i]
    if spec.near_collinear is not None and not integer:
        i, logp = spec.near_collinear
        i %= n
        x = xs[i]
        if x.shape[1] >= 2:
            src = x[:, :-1]
            w = rng.standard_normal(src.shape[1])
            comb = src @ w
            noise = rng.standard_normal(t)
            scale = np.linalg.norm(comb) / np.sqrt(t)
            x = x.copy()
            x[:, -1] = comb + 10.0**logp * scale * noise
            xs[i] = x
    # errors: correlated across equations, unequal scales
    a = rng.standard_normal((n, n))
    cov = a @ a.T + 0.5 * np.eye(n)
    e = rng.standard_normal((t, n)) @ np.linalg.cholesky(cov).T
    ys = []
    for i in range(n):
        b = rng.uniform(0.5, 2.0, xs[i].shape[1]) * rng.choice([-1.0, 1.0], xs[i].shape[1])
        signal = xs[i] @ (b / np.maximum(np.sqrt(np.mean(xs[i] ** 2, axis=0)), 1e-300))
        err = e[:, i] * (0.0 if spec.exact_fit is not None and spec.exact_fit % n == i else 1.0)
        y = signal + err
        if integer:
            y = np.round(y * 3)
        else:
            y = y * 10.0 ** y_exp[i]
        ys.append(y)
    if spec.dtype != "float64":
        ys = [y.astype(spec.dtype) for y in ys]
        xs = [x.astype(spec.dtype) for x in xs]
    given = []
    for y, x in zip(ys, xs):
        if spec.identical == "same":
            given.append((_layout(y, spec.layout, rng), x))  # one object shared by all equations
        else:
            given.append((_layout(y, spec.layout, rng), _layout(x, spec.layout, rng)))
    return System(
        spec,
        given,
        [np.asarray(y, dtype=np.float64) for y, _ in given],
        [np.asarray(x, dtype=np.float64) for _, x in given],
    )


# ---------------------------------------------------------------------------
# Conditioning and justification of errors


def scaled_cond(x: np.ndarray) -> float:
    """2-norm condition number of X with each column scaled to unit length (numpy SVD)."""
    norms = np.linalg.norm(x, axis=0)
    if np.any(norms == 0):
        return np.inf
    s = np.linalg.svd(x / norms, compute_uv=False)
    return float(s[0] / s[-1]) if s[-1] > 0 else np.inf


def joint_rank(xs) -> int:
    """Numerical rank of [X_1 .. X_N] with every column scaled to unit length (numpy SVD)."""
    a = np.hstack(xs)
    norms = np.linalg.norm(a, axis=0)
    return int(np.linalg.matrix_rank(a / np.where(norms > 0, norms, 1.0)))


def ols_resid(ys, xs) -> np.ndarray:
    """Equation-by-equation OLS residuals as the projection of y off the column space of X
    (numpy Householder QR of the column-scaled X, projected twice), T x N. Unlike a truncated
    SVD solve this keeps full accuracy for ill-conditioned X of full rank."""
    out = []
    for y, x in zip(ys, xs):
        norms = np.linalg.norm(x, axis=0)
        q, _ = np.linalg.qr(x / np.where(norms > 0, norms, 1.0))
        e = y - q @ (q.T @ y)
        e = e - q @ (q.T @ e)
        out.append(e)
    return np.column_stack(out)


def justified(err: BaseException, system: System, method: str) -> str | None:
    """None when the error is what the data call for; otherwise why it is not."""
    names = [f"eq{i}" for i in range(len(system.ys))]
    if isinstance(err, errors.CollinearityError):
        if err.equation not in names:
            return f"CollinearityError names unknown equation {err.equation!r}"
        i = names.index(err.equation)
        cond = scaled_cond(system.xs[i])
        # The library's rank rule: |R_jj| <= 10 max(T, K) eps for unit columns, so cond >= ~1e12
        # at T <= 400. Below 1e10 the regressors are clearly of full rank.
        if cond < 1e10:
            return f"CollinearityError on {err.equation} whose scaled condition number is {cond:.3g}"
        regs = [f"x{j}" for j in range(system.xs[i].shape[1])]
        if err.column not in regs:
            return f"CollinearityError names unknown column {err.column!r}"
        return None
    if isinstance(err, errors.SingularOmegaError):
        if method == "ols":
            return "SingularOmegaError from OLS, which never inverts Omega"
        n, t = len(system.ys), system.ys[0].shape[0]
        if n > t:
            return None
        e = ols_resid(system.ys, system.xs)
        ynorm = np.array([np.linalg.norm(y) for y in system.ys])
        enorm = np.linalg.norm(e, axis=0)
        # an equation that fits exactly, relative to its own dependent variable
        if np.any(enorm <= 1e-11 * np.maximum(ynorm, 1e-300)):
            return None
        c = (e / enorm).T @ (e / enorm)
        lam = np.linalg.eigvalsh(c)
        if lam[0] <= 1e-9 * lam[-1]:
            return None
        if method == "ifgls" and n + joint_rank(system.xs) > t:
            # Some combination sum_i c_i e_i of the residuals can then be made zero (N unknowns
            # c against T - rank([X_1..X_N]) conditions), so the Gaussian likelihood is unbounded,
            # the ML estimator does not exist and the iteration drives Omega to singular.
            return None
        return (
            f"SingularOmegaError on a system whose OLS residual correlation has eigenvalue ratio "
            f"{lam[0] / lam[-1]:.3g} and relative residual norms {np.min(enorm / ynorm):.3g}: {err}"
        )
    return f"{type(err).__name__} is not expected here: {err}"


# ---------------------------------------------------------------------------
# Invariants of a successful fit


def _block_norms(ys, xs, coef_blocks):
    """||y_i|| + sum_l |b_il| ||X_il||: the size of the quantities whose rounding the
    residuals carry (backward-stable least squares)."""
    return np.array(
        [np.linalg.norm(y) + np.sum(np.abs(b) * np.linalg.norm(x, axis=0)) for y, x, b in zip(ys, xs, coef_blocks)]
    )


def check_fit(fit, system: System, method: str, *, rtol_ne: float = 1e-12) -> dict:
    """Asserts the invariants; returns the measured worst values (for the record)."""
    ys, xs = system.ys, system.xs
    n = len(ys)
    ks = [x.shape[1] for x in xs]
    coef = fit.coef.to_numpy()
    assert coef.shape == (sum(ks),)
    assert np.all(np.isfinite(coef)), f"non-finite coefficients {coef}"
    blocks = np.split(coef, np.cumsum(ks)[:-1])
    resid = fit.resid.to_numpy()
    assert resid.shape == (ys[0].shape[0], n)
    assert np.all(np.isfinite(resid)), "non-finite residuals"
    omega = fit.omega.to_numpy()
    assert np.all(np.isfinite(omega)), f"non-finite Omega {omega}"
    assert np.array_equal(omega, omega.T), "Omega is not symmetric"
    se = fit.se.to_numpy()
    assert np.all(np.isfinite(se)) and np.all(se >= 0), f"bad standard errors {se}"
    vcov = fit.vcov.to_numpy()
    assert np.all(np.isfinite(vcov)), "non-finite vcov"
    assert np.allclose(vcov, vcov.T, rtol=0, atol=0), "vcov is not symmetric"
    fitted = fit.fitted.to_numpy()
    assert np.all(np.isfinite(fitted))
    sizes = _block_norms(ys, xs, blocks)
    # Residuals are y - X b from the data (numpy products as the outside reference).
    for i in range(n):
        e_ref = ys[i] - xs[i] @ blocks[i]
        dev = np.max(np.abs(resid[:, i] - e_ref))
        assert dev <= 1e-12 * sizes[i], f"eq{i}: residuals differ from y - X b by {dev:.3g} (size {sizes[i]:.3g})"
    out = {}
    if method == "ols" or n == 1:
        # First-order conditions of least squares (theorem): X_i' e_i = 0.
        worst = 0.0
        for i in range(n):
            g = xs[i].T @ resid[:, i]
            den = np.linalg.norm(xs[i], axis=0) * (np.linalg.norm(resid[:, i]) + sizes[i])
            worst = max(worst, float(np.max(np.abs(g) / den)))
        assert worst <= rtol_ne, f"OLS normal equations violated: {worst:.3g} (rtol {rtol_ne:g})"
        out["ne"] = worst
    if method != "ols":
        # First-order conditions of GLS with the final Omega (theorem):
        # sum_j sigma^{ij} X_i' e_j = 0, sigma = Omega^-1.
        d = 1.0 / np.sqrt(np.diag(omega))
        corr = omega * np.outer(d, d)
        cond_omega = float(np.linalg.cond(corr))
        sigma = np.linalg.inv(omega)
        worst = 0.0
        for i in range(n):
            g = np.zeros(ks[i])
            den = np.zeros(ks[i])
            xn = np.linalg.norm(xs[i], axis=0)
            for j in range(n):
                g += sigma[i, j] * (xs[i].T @ resid[:, j])
                den += abs(sigma[i, j]) * xn * (np.linalg.norm(resid[:, j]) + sizes[j])
            worst = max(worst, float(np.max(np.abs(g) / den)))
        tol = rtol_ne * max(1.0, cond_omega)
        assert worst <= tol, f"GLS normal equations violated: {worst:.3g} (tol {tol:.3g}, cond Omega {cond_omega:.3g})"
        out["gls_ne"] = worst
        out["cond_omega"] = cond_omega
    if method == "ols":
        assert fit.n_iter == 0
    elif method == "fgls":
        assert fit.n_iter == 1 and fit.converged
    else:
        path = fit.criterion_path
        assert len(path) == fit.n_iter >= 1
        if fit.converged:
            assert path[-1] <= fit.tol
    r2 = fit.r2.to_numpy()
    # NaN where R-squared is undefined (a dependent variable without variation about its mean)
    assert np.all((r2 <= 1 + 1e-12) | np.isnan(r2)), f"R-squared above one {r2}"
    return out


# ---------------------------------------------------------------------------
# Subprocesses


def run_python(
    code: str, *, timeout: float = 120, env: dict | None = None, argv: list | None = None, **kw
) -> subprocess.CompletedProcess:
    """Runs `code` in a fresh interpreter (tests/ importable, extra `argv`); returns the completed
    process."""
    full_env = dict(os.environ)
    full_env.pop("PYTHONFAULTHANDLER", None)
    full_env["PYTHONPATH"] = os.pathsep.join([os.path.join(ROOT, "tests"), full_env.get("PYTHONPATH", "")])
    full_env["RUST_BACKTRACE"] = "0"
    if env:
        full_env.update(env)
    return subprocess.run(
        [sys.executable, "-c", code, *(argv or [])], capture_output=True, text=True, timeout=timeout, env=full_env, cwd=ROOT, **kw
    )


def fit_quietly(given, **kw):
    """EquationSystem(given).fit(**kw), returning (fit, warnings)."""
    import warnings

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit = blocksur.EquationSystem(given).fit(**kw)
        # touch the lazily computed results inside the same warning context
        fit.se, fit.vcov, fit.resid, fit.fitted, fit.r2, fit.loglik  # noqa: B018
    return fit, [w for w in caught]
