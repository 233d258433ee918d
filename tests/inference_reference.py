"""Outside references for the inference tests (a helper module, not tests).

Built from general-purpose tools only (numpy, scipy, statsmodels' general OLS/GLS):

* restricted least squares / GLS by substitution: the restrictions R b = q are solved for
  m "pivot" coefficients, b_P = R_P^-1 (q - R_F b_F), so that the stacked (block-diagonal)
  design becomes y - X_P R_P^-1 q = (X_F - X_P R_P^-1 R_F) b_F + error, which statsmodels'
  plain ``sm.GLS`` / ``sm.OLS`` then estimates without any constraint machinery (textbook
  substitution method, from memory);
* the closed form of restricted GLS (Greene, Econometric Analysis, from memory):
  b_r = b - A^-1 R'(R A^-1 R')^-1 (R b - q), A = X'(Omega^-1 kron I)X;
* brute-force sandwich covariances over the rows t = 1..T (White 1980 in its system form,
  from memory), written with explicit loops and the N x K row design X_t;
* the concentrated Gaussian log-likelihood of a system (textbook, from memory).

Everything is deliberately dense and naive, for small systems only.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
import statsmodels.api as sm

import reference as ref


# ---------------------------------------------------------------------------
# Data


def design(eqs):
    """(y_stack, X_block, T, ks, offsets) stacking equation by equation."""
    y, Xb, T, ks = ref.stack(eqs)
    offsets = np.concatenate([[0], np.cumsum(ks)]).astype(int)
    return y, Xb, T, ks, offsets


def coef_positions(eqs, regressor_names=None):
    """{(equation, regressor): position in fit.coef} with the default x0, x1, ... names."""
    return {key: i for i, key in enumerate(ref.expected_index(eqs, regressor_names))}


# ---------------------------------------------------------------------------
# Restricted least squares by substitution


def substitution(R, q, pivots=None):
    """Solve R b = q for m pivot coefficients.

    Returns (J, c, free) with b = J theta + c for theta = b[free] (the free coefficients).
    ``pivots`` (column indices) default to those chosen by QR with column pivoting of R.
    """
    R = np.atleast_2d(np.asarray(R, float))
    q = np.atleast_1d(np.asarray(q, float))
    m, k = R.shape
    if pivots is None:
        _, _, perm = scipy.linalg.qr(R, pivoting=True)
        pivots = sorted(perm[:m])
    pivots = list(pivots)
    free = [j for j in range(k) if j not in pivots]
    RP, RF = R[:, pivots], R[:, free]
    RPinv = np.linalg.inv(RP)
    J = np.zeros((k, k - m))
    J[free, :] = np.eye(k - m)
    J[pivots, :] = -RPinv @ RF
    c = np.zeros(k)
    c[pivots] = RPinv @ q
    return J, c, free


def dense_restricted_gls(eqs, omega, R, q, pivots=None):
    """Restricted GLS with a given Omega by substitution, estimated by statsmodels ``sm.GLS``
    on the reparameterised dense design (sigma = Omega kron I_T).

    Returns (b, V, res, J, c): b the full restricted coefficient vector, V = J (Z'Sigma^-1 Z)^-1
    J' its classical covariance (statsmodels' ``normalized_cov_params``: no scale), res the
    statsmodels results on the free coefficients.
    """
    y, Xb, T, _, _ = design(eqs)
    J, c, _ = substitution(R, q, pivots)
    ystar = y - Xb @ c
    Z = Xb @ J
    sigma = np.kron(np.asarray(omega, float), np.eye(T))
    res = sm.GLS(ystar, Z, sigma=sigma).fit()
    b = J @ np.asarray(res.params) + c
    V = J @ np.asarray(res.normalized_cov_params) @ J.T
    return b, V, res, J, c


def dense_restricted_ols(eqs, R, q, pivots=None):
    """Restricted system OLS (minimum of sum_i SSR_i subject to R b = q) by substitution,
    estimated by statsmodels ``sm.OLS`` on the reparameterised stacked design.

    Returns (b, res, J, c)."""
    y, Xb, _, _, _ = design(eqs)
    J, c, _ = substitution(R, q, pivots)
    res = sm.OLS(y - Xb @ c, Xb @ J).fit()
    return J @ np.asarray(res.params) + c, res, J, c


def restricted_closed_form(b, A, R, q):
    """Greene (Econometric Analysis, from memory): restricted GLS/LS from the unrestricted b
    and A = X'(Omega^-1 kron I)X (X'X for least squares):
    b_r = b - A^-1 R'(R A^-1 R')^-1 (R b - q);  Cov(b_r) = A^-1 - A^-1 R'(R A^-1 R')^-1 R A^-1.
    Returns (b_r, cov_r, P) with P = I - A^-1 R'(R A^-1 R')^-1 R (b_r - ... = P b + ...)."""
    R = np.atleast_2d(R)
    Ainv = np.linalg.inv(A)
    H = np.linalg.inv(R @ Ainv @ R.T)
    br = b - Ainv @ R.T @ H @ (R @ b - q)
    cov = Ainv - Ainv @ R.T @ H @ R @ Ainv
    P = np.eye(len(b)) - Ainv @ R.T @ H @ R
    return br, cov, P


def gls_normal_matrix(eqs, omega):
    """A = X'(Omega^-1 kron I_T)X and h = X'(Omega^-1 kron I_T)y, dense."""
    y, Xb, T, _, _ = design(eqs)
    W = np.kron(np.linalg.inv(np.asarray(omega, float)), np.eye(T))
    return Xb.T @ W @ Xb, Xb.T @ W @ y


# ---------------------------------------------------------------------------
# Brute-force sandwich


def row_design(eqs, t):
    """X_t: the N x K block-diagonal design of row t (row i holds x_it in equation i's block)."""
    Xs = [np.asarray(X, float) for _, X in eqs.values()]
    ks = [X.shape[1] for X in Xs]
    out = np.zeros((len(Xs), sum(ks)))
    pos = 0
    for i, X in enumerate(Xs):
        out[i, pos : pos + ks[i]] = X[t]
        pos += ks[i]
    return out


def sandwich_by_rows(eqs, E, omega=None):
    """System HC0 sandwich by an explicit loop over rows (White 1980, system form, from memory).

    GLS (omega given): bread A = X'(Omega^-1 kron I)X = sum_t X_t' Omega^-1 X_t,
    meat B = sum_t X_t' Omega^-1 e_t e_t' Omega^-1 X_t.  OLS (omega None): Omega^-1 -> I, so
    A = blockdiag(X_i'X_i).  Returns (A, B); the covariance is A^-1 B A^-1.
    """
    E = np.asarray(E, float)
    T, n = E.shape
    Oi = np.eye(n) if omega is None else np.linalg.inv(np.asarray(omega, float))
    k = row_design(eqs, 0).shape[1]
    A = np.zeros((k, k))
    B = np.zeros((k, k))
    for t in range(T):
        Xt = row_design(eqs, t)
        A += Xt.T @ Oi @ Xt
        s = Xt.T @ Oi @ E[t]
        B += np.outer(s, s)
    return A, B


# ---------------------------------------------------------------------------
# Likelihood


def concentrated_loglik(eqs, b):
    """-(NT/2)(1 + ln 2 pi) - (T/2) ln det(E'E/T) at coefficients b (textbook, from memory)."""
    return ref.gaussian_loglik(ref.resid_matrix(eqs, np.asarray(b, float)))
