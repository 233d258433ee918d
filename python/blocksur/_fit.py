"""The result of estimating a system: labelled coefficients, covariance and fit measures."""

from __future__ import annotations

from functools import cached_property
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

if TYPE_CHECKING:  # pragma: no cover
    from ._system import EquationSystem

__all__ = ["SystemFit"]


class SystemFit:
    """Estimates of a system of equations, with labels.

    Produced by :meth:`EquationSystem.fit`. Coefficient-shaped results are pandas objects indexed
    by a MultiIndex ``(equation, regressor)``; per-equation results are Series indexed by
    equation. Quantities that cost more than the fit itself (the covariance matrix) are computed
    on first access and kept.

    Estimates rest on the model's assumptions (linear equations, errors with mean zero given the
    regressors, homoskedastic across rows for the classical covariance). They describe
    associations, not causal effects; check the residuals before relying on them.

    Example
    -------
    >>> fit = system.fit("ifgls")          # doctest: +SKIP
    >>> fit.coef.loc["north"]              # doctest: +SKIP
    >>> fit.se, fit.omega, fit.r2          # doctest: +SKIP
    """

    def __init__(
        self,
        system: "EquationSystem",
        prepared: Any,
        estimate: Any,
        resid: np.ndarray,
        *,
        tol: float,
        max_iter: int,
    ) -> None:
        self._system = system
        self._prepared = prepared
        self._est = estimate
        self._resid = resid
        self.tol = tol
        self.max_iter = max_iter
        names = system.equation_names
        self._names = names
        self._coef_index = pd.MultiIndex.from_tuples(
            [(n, r) for n, regs in zip(names, system._regressors) for r in regs],
            names=["equation", "regressor"],
        )
        idx = system._index
        self._row_index = idx if idx is not None else pd.RangeIndex(system.n_obs)

    # -- basic description -------------------------------------------------------------------
    @property
    def method(self) -> str:
        """The estimator: ``"ols"``, ``"fgls"`` or ``"ifgls"``."""
        return self._est.method

    @property
    def omega_divisor(self) -> str:
        """How Omega was scaled from the residual cross-products: ``"ml"`` or ``"dof"``."""
        return self._est.divisor

    @property
    def n_iter(self) -> int:
        """Number of GLS steps taken (0 for OLS, 1 for two-step FGLS)."""
        return self._est.n_iter

    @property
    def converged(self) -> bool:
        """Whether the iterated fit met ``tol`` (always True for OLS and two-step FGLS)."""
        return self._est.converged

    @property
    def criterion_path(self) -> np.ndarray:
        """The convergence criterion after each GLS step of an iterated fit: the largest
        relative change of an equation's fitted values."""
        return np.asarray(self._est.criterion_path, dtype=float)

    @property
    def n_obs(self) -> int:
        """Observations per equation T."""
        return self._system.n_obs

    @property
    def n_eq(self) -> int:
        """Number of equations N."""
        return len(self._names)

    @property
    def n_coef(self) -> int:
        """Number of coefficients K in the whole system."""
        return len(self._coef_index)

    @property
    def equation_names(self) -> list[str]:
        """Equation names, in order."""
        return list(self._names)

    # -- coefficients --------------------------------------------------------------------------
    @cached_property
    def coef(self) -> pd.Series:
        """Coefficients, indexed by (equation, regressor)."""
        return pd.Series(self._est.coef, index=self._coef_index, name="coef")

    @cached_property
    def vcov(self) -> pd.DataFrame:
        """Classical covariance of all coefficients, cross-equation blocks included."""
        v = self._prepared.coef_covariance(self._est)
        return pd.DataFrame(v, index=self._coef_index, columns=self._coef_index)

    @cached_property
    def se(self) -> pd.Series:
        """Standard errors (square roots of the diagonal of :attr:`vcov`)."""
        return pd.Series(np.sqrt(np.diag(self.vcov.to_numpy())), index=self._coef_index, name="se")

    @cached_property
    def omega(self) -> pd.DataFrame:
        """The cross-equation error covariance used in the final estimation step (N x N)."""
        return pd.DataFrame(self._est.omega, index=self._names, columns=self._names)

    # -- residuals and fit measures ------------------------------------------------------------
    @cached_property
    def resid(self) -> pd.DataFrame:
        """Residuals y_i - X_i b_i (T x N), one column per equation."""
        return pd.DataFrame(self._resid, index=self._row_index, columns=self._names)

    @cached_property
    def fitted(self) -> pd.DataFrame:
        """Fitted values X_i b_i (T x N), one column per equation."""
        y = np.column_stack(self._system._ys)
        return pd.DataFrame(y - self._resid, index=self._row_index, columns=self._names)

    @cached_property
    def ssr(self) -> pd.Series:
        """Sum of squared residuals per equation."""
        return pd.Series((self._resid**2).sum(axis=0), index=self._names, name="ssr")

    def _k(self) -> np.ndarray:
        return np.diff(np.asarray(self._prepared.offsets))

    @cached_property
    def r2(self) -> pd.Series:
        """R-squared per equation: about the mean when the regressors span a constant,
        otherwise about zero (uncentred), as is common practice."""
        spans = np.asarray(self._prepared.spans_constant)
        tss = np.where(spans, self._prepared.tss_centred, self._prepared.tss_raw)
        return pd.Series(1.0 - self.ssr.to_numpy() / tss, index=self._names, name="r2")

    @cached_property
    def r2_adj(self) -> pd.Series:
        """Adjusted R-squared per equation: 1 - (1 - R2) (T - c) / (T - K_i), c = 1 with a
        constant, else 0."""
        t = self.n_obs
        c = np.asarray(self._prepared.spans_constant, dtype=float)
        adj = 1.0 - (1.0 - self.r2.to_numpy()) * (t - c) / (t - self._k())
        return pd.Series(adj, index=self._names, name="r2_adj")

    @cached_property
    def resid_se(self) -> pd.Series:
        """Residual standard error per equation: sqrt(SSR_i / (T - K_i))."""
        return pd.Series(
            np.sqrt(self.ssr.to_numpy() / (self.n_obs - self._k())), index=self._names, name="resid_se"
        )

    @cached_property
    def loglik(self) -> float:
        """Gaussian log-likelihood at Omega = S/T of the final residuals:
        -(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T). ``-inf`` if S/T is singular."""
        v = self._prepared.log_likelihood(self._est)
        return float("-inf") if v is None else float(v)

    def __repr__(self) -> str:
        state = ""
        if self.method == "ifgls":
            state = f", {self.n_iter} steps, " + ("converged" if self.converged else "NOT converged")
        return (
            f"<SystemFit {self.method} (omega divisor {self.omega_divisor}{state}): "
            f"N={self.n_eq} equations, T={self.n_obs}, K={self.n_coef} coefficients>"
        )
