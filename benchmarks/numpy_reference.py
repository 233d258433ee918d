"""Reference SUR estimators in plain numpy/scipy, using the same blockwise algorithm.

This module is the "same algorithm in numpy" baseline for the benchmarks.  It
never forms the NT x NT covariance; everything lives in the K x K / K x N / N x N
moment blocks of one stacked cross-product.

Notation (N equations, T observations, equation i has K_i regressors, K = sum K_i):

* thin QR per equation:  X_i = Q_i R_i
* one pass over the data: with Z = [Q_1 .. Q_N, y_1 .. y_N] (T x (K + N)),
  Z'Z = [[C, D], [D', E]] with C = Q'Q (K x K), D = Q'Y (K x N), E = Y'Y (N x N)
* OLS in the Q basis: gamma_i = D[rows_i, i], b_i = R_i^-1 gamma_i
* residual cross-products for coefficients g (in the Q basis):
      S_ij = E_ij - g_i' D[rows_i, j] - D[rows_j, i]' g_j + g_i' C_ij g_j
* Omega = S / T ("ml") or S_ij / sqrt((T - K_i)(T - K_j)) ("dof")
* GLS with sigma^{ij} = (Omega^-1)_ij:
      M_ij = sigma^{ij} C_ij,   c_i = sum_j sigma^{ij} D[rows_i, j],   M g = c (Cholesky)
      b_i = R_i^-1 g_i,   Cov(b)_ij = R_i^-1 (M^-1)_ij R_j^-T
* iterated FGLS alternates the Omega and GLS steps until the coefficients settle.

Public entry points: :func:`ols`, :func:`fgls`, :func:`ifgls`, :func:`full_vcov`
and :class:`Moments` (the one-pass precomputation they share).

BLAS/LAPACK work goes through scipy.linalg only (qr, dsyrk, Cholesky, triangular
routines); numpy is used for element-wise work, einsum (no BLAS) and reductions.
numpy and scipy wheels each bundle their own OpenBLAS, and alternating two
OpenBLAS thread pools inside one computation slows both down, so the reference
deliberately stays on one pool.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import linalg as sla

__all__ = ["Moments", "RefFit", "ols", "fgls", "ifgls", "full_vcov", "rel_err"]


def _fill_lower(G, bs=512):
    """Copy the upper triangle of square G into its lower triangle, in blocks."""
    P = G.shape[0]
    for j0 in range(0, P, bs):
        j1 = min(j0 + bs, P)
        blk = G[j0:j1, j0:j1]
        blk[:] = np.triu(blk) + np.triu(blk, 1).T
        if j1 < P:
            G[j1:, j0:j1] = G[j0:j1, j1:].T


def _inv_from_chol(L):
    """Inverse of L L' (L lower) by LAPACK potri, both triangles filled.

    Inverses go through potri/trtri rather than a triangular solve with an identity
    right-hand side: the bundled OpenBLAS threads its trtrs even for 4 x 4 systems,
    and on a busy 2-core machine each such call can stall for whole scheduler ticks.
    """
    A, info = sla.lapack.dpotri(L, lower=1)
    if info != 0:
        raise np.linalg.LinAlgError("dpotri failed")
    return np.tril(A) + np.tril(A, -1).T


class Moments:
    """QR factors and the one-pass cross-products C, D, E of a SUR system."""

    def __init__(self, ys, Xs):
        ys = [np.asarray(y, dtype=np.float64).ravel() for y in ys]
        Xs = [np.asarray(X, dtype=np.float64) for X in Xs]
        if len(ys) != len(Xs) or not ys:
            raise ValueError("need the same, positive number of y's and X's")
        T = ys[0].shape[0]
        for y, X in zip(ys, Xs):
            if y.shape[0] != T or X.ndim != 2 or X.shape[0] != T:
                raise ValueError("every equation needs T observations")
        ks = np.array([X.shape[1] for X in Xs], dtype=np.intp)
        N, K = len(Xs), int(ks.sum())
        starts = np.concatenate(([0], np.cumsum(ks)[:-1])).astype(np.intp)

        # Z = [Q_1 .. Q_N, y_1 .. y_N], Fortran order so each block is a
        # contiguous column range; Z.T @ Z is one syrk call (scipy BLAS).
        Z = np.empty((T, K + N), order="F")
        Rs = []
        for i, X in enumerate(Xs):
            Q, R = sla.qr(X, mode="economic", check_finite=False)
            Z[:, starts[i]:starts[i] + ks[i]] = Q
            Rs.append(R)
        for i, y in enumerate(ys):
            Z[:, K + i] = y
        G = sla.blas.dsyrk(1.0, Z, trans=1)  # Z'Z, upper triangle
        del Z
        _fill_lower(G)

        self.T, self.N, self.K = T, N, K
        self.ks, self.starts = ks, starts
        self.eq = np.repeat(np.arange(N), ks)  # equation index of each of the K rows
        self.slices = [slice(int(s), int(s + k)) for s, k in zip(starts, ks)]
        self.Rs = Rs
        self.C = G[:K, :K]
        self.D = G[:K, K:]
        self.E = G[K:, K:]

    # -- building blocks -------------------------------------------------

    def ols_gamma(self) -> np.ndarray:
        """OLS coefficients in the Q basis, stacked (K,): gamma_i = D[rows_i, i]."""
        return self.D[np.arange(self.K), self.eq].copy()

    def resid_cross(self, g: np.ndarray) -> np.ndarray:
        """S (N x N) for stacked Q-basis coefficients g, without any residual vectors."""
        st = self.starts
        # H[:, j] = C[:, rows_j] @ g_j  (block-sparse product, K^2 work)
        H = np.add.reduceat(self.C * g[None, :], st, axis=1)
        # U_ij = g_i' D[rows_i, j];  V_ij = g_i' H[rows_i, j] = g_i' C_ij g_j
        U = np.add.reduceat(g[:, None] * self.D, st, axis=0)
        V = np.add.reduceat(g[:, None] * H, st, axis=0)
        S = self.E - U - U.T + V
        return 0.5 * (S + S.T)

    def omega_from(self, g: np.ndarray, omega: str = "ml") -> np.ndarray:
        S = self.resid_cross(g)
        if omega == "ml":
            return S / self.T
        if omega == "dof":
            d = np.sqrt(self.T - self.ks.astype(np.float64))
            return S / np.outer(d, d)
        raise ValueError(f"omega must be 'ml' or 'dof', got {omega!r}")

    def gls(self, Omega: np.ndarray):
        """GLS step for a given Omega. Returns (g, cho_factor of M)."""
        N, eq = self.N, self.eq
        Lo = sla.cho_factor(Omega, lower=True, check_finite=False)
        Sinv = _inv_from_chol(Lo[0])
        # M_ij = sigma^{ij} C_ij (elementwise, expanded over blocks); one K x K array.
        M = Sinv[np.ix_(eq, eq)]
        M *= self.C
        # c_i = sum_j sigma^{ij} D[rows_i, j]
        c = np.einsum("rj,rj->r", Sinv[eq, :], self.D)
        cf = sla.cho_factor(M, lower=True, overwrite_a=True, check_finite=False)
        g = sla.cho_solve(cf, c, check_finite=False)
        return g, cf

    def to_beta(self, g: np.ndarray) -> list[np.ndarray]:
        return [sla.solve_triangular(R, g[sl], check_finite=False)
                for R, sl in zip(self.Rs, self.slices)]

    def rinv(self) -> list[np.ndarray]:
        out = []
        for R in self.Rs:
            Ri, info = sla.lapack.dtrtri(R, lower=0)
            if info != 0:
                raise np.linalg.LinAlgError("dtrtri failed")
            out.append(Ri)
        return out

    def se_from_chol(self, cf) -> list[np.ndarray]:
        """Standard errors from the diagonal blocks of M^-1 only.

        With M = L L', M^-1 = L^-T L^-1, so (M^-1)_ii = A_i' A_i with A_i = L^-1[:, rows_i]
        (zero above row start_i), and Cov(b_i) = R_i^-1 A_i' A_i R_i^-T.
        """
        L, lower = cf
        assert lower
        Linv, info = sla.lapack.dtrtri(L, lower=1)
        if info != 0:
            raise np.linalg.LinAlgError("dtrtri failed")
        out = []
        for Ri_inv, sl in zip(self.rinv(), self.slices):
            A = np.einsum("rl,kl->rk", Linv[sl.start:, sl], Ri_inv)  # L^-1[:, rows_i] R_i^-T
            out.append(np.sqrt(np.einsum("rk,rk->k", A, A)))
        return out

    def vcov_from_chol(self, cf) -> np.ndarray:
        """Full K x K Cov(b): blockdiag(R^-1) M^-1 blockdiag(R^-1)'."""
        L, _ = cf
        Minv, info = sla.lapack.dpotri(L, lower=1)
        if info != 0:
            raise np.linalg.LinAlgError("dpotri failed")
        Minv = np.tril(Minv) + np.tril(Minv, -1).T
        Rinv = self.rinv()
        for Ri, sl in zip(Rinv, self.slices):
            Minv[sl, :] = Ri @ Minv[sl, :]
        for Rj, sl in zip(Rinv, self.slices):
            Minv[:, sl] = Minv[:, sl] @ Rj.T
        return Minv


@dataclass
class RefFit:
    coef: list  # per-equation coefficient arrays
    omega: np.ndarray  # Omega used in the final GLS step (or the OLS residual Omega for OLS)
    se: list | None = None
    n_iter: int = 0
    converged: bool = True
    extra: dict = field(default_factory=dict)

    @property
    def coef_flat(self) -> np.ndarray:
        return np.concatenate(self.coef)

    @property
    def se_flat(self) -> np.ndarray:
        return np.concatenate(self.se)


def _moments(ys, Xs, moments):
    return moments if moments is not None else Moments(ys, Xs)


def ols(ys=None, Xs=None, *, omega="ml", moments=None) -> RefFit:
    m = _moments(ys, Xs, moments)
    g = m.ols_gamma()
    return RefFit(coef=m.to_beta(g), omega=m.omega_from(g, omega))


def fgls(ys=None, Xs=None, *, omega="ml", se=True, moments=None) -> RefFit:
    """Two-step FGLS: OLS -> Omega -> one GLS step (with standard errors if se)."""
    m = _moments(ys, Xs, moments)
    Om = m.omega_from(m.ols_gamma(), omega)
    g, cf = m.gls(Om)
    fit = RefFit(coef=m.to_beta(g), omega=Om, n_iter=1)
    if se:
        fit.se = m.se_from_chol(cf)
    fit.extra["cf"] = cf
    fit.extra["moments"] = m
    return fit


def ifgls(ys=None, Xs=None, *, omega="ml", tol=1e-10, max_iter=1000, se=False,
          moments=None) -> RefFit:
    """Iterated FGLS.

    Iteration 1 is the two-step FGLS estimate; each further iteration recomputes
    Omega from the current coefficients and redoes the GLS step.  Stops when
    max|b_new - b_old| <= tol * (1 + max|b_new|), or after max_iter GLS steps
    (n_iter counts GLS steps).
    """
    m = _moments(ys, Xs, moments)
    Om = m.omega_from(m.ols_gamma(), omega)
    g, cf = m.gls(Om)
    b = np.concatenate(m.to_beta(g))
    n_iter, converged = 1, False
    while n_iter < max_iter:
        Om = m.omega_from(g, omega)
        g, cf = m.gls(Om)
        b_new = np.concatenate(m.to_beta(g))
        n_iter += 1
        delta = np.max(np.abs(b_new - b))
        b = b_new
        if delta <= tol * (1.0 + np.max(np.abs(b))):
            converged = True
            break
    fit = RefFit(coef=m.to_beta(g), omega=Om, n_iter=n_iter, converged=converged)
    if se:
        fit.se = m.se_from_chol(cf)
    fit.extra["cf"] = cf
    fit.extra["moments"] = m
    return fit


def full_vcov(fit: RefFit) -> np.ndarray:
    """Full K x K covariance of a (i)fgls RefFit."""
    return fit.extra["moments"].vcov_from_chol(fit.extra["cf"])


def rel_err(a, b) -> float:
    """Normwise relative difference max|a - b| / max|b| (b is the reference)."""
    a = np.asarray(a, dtype=np.float64).ravel()
    b = np.asarray(b, dtype=np.float64).ravel()
    if a.shape != b.shape:
        return float("inf")
    den = np.max(np.abs(b)) if b.size else 0.0
    num = np.max(np.abs(a - b)) if a.size else 0.0
    return float(num / den) if den > 0 else float(num)


# --------------------------------------------------------------------------
# Comparison against blocksur (used by bench_core before any timing)
# --------------------------------------------------------------------------

def _series_by_equation(s, names, ks):
    """Flatten a (equation, regressor) Series into the equations' order."""
    import pandas as pd  # noqa: F401  (blocksur returns pandas objects)

    lvl0 = s.index.get_level_values(0)
    expected = np.repeat(np.asarray(names, dtype=object), ks)
    if len(lvl0) == len(expected) and np.array_equal(np.asarray(lvl0, dtype=object), expected):
        return s.to_numpy(dtype=np.float64)
    return np.concatenate([s.loc[n].to_numpy(dtype=np.float64) for n in names])


def _equation_order_index(s, names):
    """s.index reordered so that equations come in the order of names."""
    lvl0 = np.asarray(s.index.get_level_values(0), dtype=object)
    pos = {n: p for p, n in enumerate(names)}
    order = sorted(range(len(lvl0)), key=lambda r: (pos[lvl0[r]], r))
    return s.index[order]


def check_against(fit, ref: RefFit, names, ks, *, what=("coef",), rtol=1e-8,
                  Om_df=None) -> dict:
    """Relative errors of a blocksur fit against a RefFit, for the requested parts.

    Returns {part: rel_err}; the caller decides pass/fail against rtol.
    """
    out = {}
    if "coef" in what:
        out["coef"] = rel_err(_series_by_equation(fit.coef, names, ks), ref.coef_flat)
    if "se" in what:
        out["se"] = rel_err(_series_by_equation(fit.se, names, ks), ref.se_flat)
    if "omega" in what:
        om = fit.omega
        om = om.loc[list(names), list(names)].to_numpy() if hasattr(om, "loc") else np.asarray(om)
        out["omega"] = rel_err(om, ref.omega)
    if "vcov" in what:
        V = fit.vcov
        idx = _equation_order_index(fit.coef, names)
        if hasattr(V, "reindex"):
            V = V.reindex(index=idx, columns=idx)
        out["vcov"] = rel_err(np.asarray(V, dtype=np.float64), full_vcov(ref))
    return out
