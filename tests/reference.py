"""Outside references for the blocksur tests (a helper module, not tests).

Everything here is built from general-purpose tools only:

* the dense textbook SUR estimator: the equations stacked one after the other
  (y = [y_1; ...; y_N], X = blockdiag(X_1, ..., X_N), Sigma = Omega kron I_T),
  estimated by statsmodels' general ``sm.GLS`` (source: statsmodels GLS on the
  dense textbook formula);
* statsmodels' ``sm.OLS`` equation by equation;
* numpy for the textbook algebra (sandwich covariance of stacked OLS,
  log-likelihood formula).

The dense reference is deliberately naive (it forms the NT x NT Sigma), so it
is only meant for small systems.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
import statsmodels.api as sm

# ---------------------------------------------------------------------------
# Measured agreement, printed at the end of the run by conftest.py.
# key -> largest measured discrepancy (in the metric named in the key).
AGREEMENT: dict[str, float] = {}


def record(key: str, value: float) -> float:
    """Keep the worst (largest) discrepancy seen under `key`."""
    value = float(value)
    AGREEMENT[key] = max(AGREEMENT.get(key, 0.0), value)
    return value


def record_min(key: str, value: float) -> float:
    """Keep the worst (smallest) value seen under `key` (used for digit counts)."""
    value = float(value)
    AGREEMENT[key] = min(AGREEMENT.get(key, np.inf), value)
    return value


# ---------------------------------------------------------------------------
# Random SUR data


def make_sur_data(
    seed: int,
    T: int = 60,
    ks: tuple[int, ...] = (3, 5, 2, 4),
    const: tuple[bool, ...] | None = None,
    names: tuple[str, ...] | None = None,
    corr: float = 0.7,
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Seeded SUR system with cross-correlated errors and unequal K_i.

    Returns {name: (y, X)} with y shape (T,), X shape (T, K_i), float64, C order.
    If const[i] is True the first column of X_i is a column of ones; if it is
    False the regressors have large positive means (so uncentred R^2 matters).
    Regressors of different equations share a common factor (so they are
    correlated but not identical), which makes FGLS differ visibly from OLS.
    Coefficients are drawn away from zero (|beta| in [0.5, 2]).
    """
    rng = np.random.default_rng(seed)
    n = len(ks)
    if const is None:
        const = tuple(True for _ in ks)
    if names is None:
        names = tuple("abcdefghijklmnopqrstuvwxyz"[:n])
    # Error covariance: equicorrelation `corr` plus a random perturbation, with
    # unequal scales; positive definite by construction.
    R = np.full((n, n), corr) + (1.0 - corr) * np.eye(n)
    A = 0.1 * rng.standard_normal((n, n))
    R = R + A @ A.T
    d = np.sqrt(np.diag(R))
    R = R / np.outer(d, d)
    sd = rng.uniform(0.5, 3.0, n)
    omega_true = R * np.outer(sd, sd)
    E = rng.standard_normal((T, n)) @ np.linalg.cholesky(omega_true).T

    common = rng.standard_normal((T, max(ks)))
    out = {}
    for i, (k, c, nm) in enumerate(zip(ks, const, names)):
        X = 0.6 * common[:, :k] + rng.standard_normal((T, k))
        X = X * rng.uniform(0.5, 5.0, k) + rng.uniform(-3, 3, k)
        if c:
            X[:, 0] = 1.0
        beta = rng.uniform(0.5, 2.0, k) * rng.choice([-1.0, 1.0], k)
        if not c:
            # No constant: regressors with large positive means and positive
            # coefficients, so mean(y) is far from zero and the uncentred and
            # centred R^2 differ clearly (the model stays correctly specified).
            X = X - X.min(axis=0) + 5.0
            beta = np.abs(beta)
        y = X @ beta + E[:, i]
        out[nm] = (np.ascontiguousarray(y), np.ascontiguousarray(X))
    return out


def identical_regressor_data(seed: int, T: int = 50, k: int = 4, n: int = 3, corr: float = 0.7):
    """N equations sharing one X (first column a constant), correlated errors."""
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((T, k)) * rng.uniform(0.5, 5.0, k) + rng.uniform(-3, 3, k)
    X[:, 0] = 1.0
    R = np.full((n, n), corr) + (1.0 - corr) * np.eye(n)
    sd = rng.uniform(0.5, 3.0, n)
    E = rng.standard_normal((T, n)) @ np.linalg.cholesky(R * np.outer(sd, sd)).T
    out = {}
    for i in range(n):
        beta = rng.uniform(0.5, 2.0, k) * rng.choice([-1.0, 1.0], k)
        out["abcdefghijklmnopqrstuvwxyz"[i]] = (X @ beta + E[:, i], X.copy())
    return out


# ---------------------------------------------------------------------------
# Dense textbook SUR


def stack(eqs):
    """(y_stack (NT,), X_block (NT, sum K_i), T, [K_i]) stacking equation by equation."""
    ys = [np.asarray(y, dtype=float) for y, _ in eqs.values()]
    Xs = [np.asarray(X, dtype=float) for _, X in eqs.values()]
    T = ys[0].shape[0]
    return np.concatenate(ys), scipy.linalg.block_diag(*Xs), T, [X.shape[1] for X in Xs]


def dense_gls(eqs, omega):
    """Dense SUR GLS with a given Omega (statsmodels GLS on the textbook formula).

    Returns (params, cov) with cov = (X' (Omega^-1 kron I_T) X)^-1.
    statsmodels' GLS ``normalized_cov_params`` is pinv(wexog' wexog) with the
    whitened design, i.e. exactly (X' Sigma^-1 X)^-1 with no scale factor;
    ``cov_params()`` multiplies it by the whitened residual variance ``scale``.
    test_reference_dense.py::test_reference_covariance_attribute verifies this.
    """
    omega = np.asarray(omega, dtype=float)
    y, Xb, T, _ = stack(eqs)
    sigma = np.kron(omega, np.eye(T))
    res = sm.GLS(y, Xb, sigma=sigma).fit()
    return np.asarray(res.params), np.asarray(res.normalized_cov_params)


def ols_by_equation(eqs):
    """statsmodels OLS results, one per equation, in equation order."""
    return {nm: sm.OLS(np.asarray(y, float), np.asarray(X, float)).fit() for nm, (y, X) in eqs.items()}


def omega_from_resid(E, ks, divisor):
    """Omega from a T x N residual matrix, with the API's two divisors.

    "ml":  S / T;   "dof":  S_ij / sqrt((T - K_i)(T - K_j)),  S = E'E.
    """
    E = np.asarray(E, dtype=float)
    T = E.shape[0]
    S = E.T @ E
    if divisor == "ml":
        return S / T
    if divisor == "dof":
        dof = np.sqrt(T - np.asarray(ks, dtype=float))
        return S / np.outer(dof, dof)
    raise ValueError(divisor)


def resid_matrix(eqs, params):
    """T x N residuals y_i - X_i b_i for stacked params."""
    cols, pos = [], 0
    for y, X in eqs.values():
        X = np.asarray(X, float)
        k = X.shape[1]
        cols.append(np.asarray(y, float) - X @ params[pos : pos + k])
        pos += k
    return np.column_stack(cols)


def dense_ols_cov(eqs, omega):
    """Sandwich covariance of stacked OLS (textbook):
    (X'X)^-1 X' (Omega kron I_T) X (X'X)^-1, X block diagonal.
    Block (i, j) is omega_ij (X_i'X_i)^-1 X_i'X_j (X_j'X_j)^-1."""
    _, Xb, T, _ = stack(eqs)
    A = np.linalg.inv(Xb.T @ Xb)
    return A @ Xb.T @ np.kron(np.asarray(omega, float), np.eye(T)) @ Xb @ A


def dense_fgls(eqs, divisor):
    """Two-step FGLS: Omega from statsmodels-OLS residuals, then dense GLS."""
    ols = ols_by_equation(eqs)
    E = np.column_stack([r.resid for r in ols.values()])
    ks = [np.asarray(X).shape[1] for _, X in eqs.values()]
    omega = omega_from_resid(E, ks, divisor)
    b, V = dense_gls(eqs, omega)
    return b, V, omega


def dense_ifgls(eqs, divisor, tol=1e-13, max_iter=20000):
    """Iterated FGLS by repeated dense statsmodels GLS, run to full convergence.

    Returns (params, cov, omega_used_in_last_step, n_steps)."""
    ols = ols_by_equation(eqs)
    ks = [np.asarray(X).shape[1] for _, X in eqs.values()]
    E = np.column_stack([r.resid for r in ols.values()])
    b_old = np.concatenate([r.params for r in ols.values()])
    for it in range(1, max_iter + 1):
        omega = omega_from_resid(E, ks, divisor)
        b, V = dense_gls(eqs, omega)
        E = resid_matrix(eqs, b)
        if np.max(np.abs(b - b_old) / np.maximum(np.abs(b), 1.0)) < tol:
            return b, V, omega, it
        b_old = b
    raise RuntimeError("dense reference IFGLS did not converge")


def gaussian_loglik(E):
    """-(N T / 2)(1 + ln 2 pi) - (T / 2) ln det(E'E / T): the concentrated
    Gaussian log-likelihood of a SUR system (textbook; for N = 1 it is the OLS
    log-likelihood statsmodels reports as ``llf``)."""
    E = np.asarray(E, float)
    T, n = E.shape
    sign, logdet = np.linalg.slogdet(E.T @ E / T)
    assert sign > 0
    return -0.5 * n * T * (1.0 + np.log(2.0 * np.pi)) - 0.5 * T * logdet


def expected_index(eqs, regressor_names=None):
    """[(equation, regressor), ...] in equation order then regressor order."""
    out = []
    for nm, (_, X) in eqs.items():
        k = np.asarray(X).shape[1]
        names = regressor_names[nm] if regressor_names else [f"x{j}" for j in range(k)]
        out.extend((nm, r) for r in names)
    return out


# ---------------------------------------------------------------------------
# Comparisons that report their measured agreement


def max_rel_coef(got, exp, se):
    """Largest |got - exp| / max(|exp|, se): relative error, with the standard
    error as the floor of the scale so a coefficient near zero is judged on
    the scale of its own sampling noise."""
    got, exp, se = (np.asarray(a, float) for a in (got, exp, se))
    return float(np.max(np.abs(got - exp) / np.maximum(np.abs(exp), se)))


def max_rel_cov(got, exp):
    """Largest |V_got - V_exp|_ij / sqrt(V_exp_ii V_exp_jj).

    On the diagonal this is the plain relative error; off the diagonal it is
    relative to the Cauchy-Schwarz bound of the element (so near-zero
    cross-covariances do not blow up a relative measure)."""
    got, exp = np.asarray(got, float), np.asarray(exp, float)
    d = np.sqrt(np.diag(exp))
    return float(np.max(np.abs(got - exp) / np.outer(d, d)))


def max_rel(got, exp, floor=0.0):
    got, exp = np.asarray(got, float), np.asarray(exp, float)
    scale = np.maximum(np.abs(exp), floor)
    return float(np.max(np.abs(got - exp) / scale))


def lre(got, certified, digits=15.0):
    """Log relative error as NIST StRD uses it: -log10(|q - c| / |c|),
    capped at the number of certified digits (15)."""
    got, certified = np.asarray(got, float), np.asarray(certified, float)
    r = np.abs(got - certified) / np.abs(certified)
    with np.errstate(divide="ignore"):
        v = -np.log10(r)
    return np.minimum(v, digits)
