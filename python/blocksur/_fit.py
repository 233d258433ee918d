"""The result of estimating a system: labelled coefficients, covariance and fit measures."""

from __future__ import annotations

import warnings
from functools import cached_property
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from . import _core
from ._restrictions import coefficient_text, parse_restrictions
from ._frame import expand_new
from ._tests import HypothesisTestResult
from .errors import (
    InvalidOptionError,
    NotConvergedWarning,
    NumericalError,
    ShapeMismatchError,
    VarianceRangeWarning,
)

if TYPE_CHECKING:  # pragma: no cover
    from ._system import EquationSystem

__all__ = ["FittedSystem"]

# Largest system whose standard errors the matrix-free path computes without being asked.
_CG_SE_LIMIT = 5000


def _stats() -> Any:
    """scipy.stats, imported on first use: importing it loads scipy's own OpenBLAS, a third
    thread pool, which only inference needs."""
    from scipy import stats

    return stats


def _build_coef_index(names: list[str], regressors: list[list[str]]) -> pd.MultiIndex:
    reg_level: dict[str, int] = {}
    eq_codes: list[int] = []
    reg_codes: list[int] = []
    for i, regs in enumerate(regressors):
        for r in regs:
            eq_codes.append(i)
            reg_codes.append(reg_level.setdefault(r, len(reg_level)))
    return pd.MultiIndex(
        levels=[pd.Index(list(names), dtype=object), pd.Index(list(reg_level), dtype=object)],
        codes=[np.asarray(eq_codes, dtype=np.intp), np.asarray(reg_codes, dtype=np.intp)],
        names=_INDEX_NAMES,
        verify_integrity=False,
    )


# (equation names, regressor names) -> MultiIndex: pandas indexes are immutable, so fits of
# systems with the same labels share one (building it costs ~70 us, more than a small fit).
_INDEX_CACHE: dict[tuple[tuple[str, ...], tuple[tuple[str, ...], ...]], pd.MultiIndex] = {}
_INDEX_CACHE_SIZE = 64
_INDEX_NAMES = ["equation", "regressor"]


def coef_index(names: list[str], regressors: list[list[str]]) -> pd.MultiIndex:
    """The (equation, regressor) MultiIndex, built from codes (from_tuples costs ~0.5 ms) and
    shared by all systems with the same labels."""
    key = (tuple(names), tuple(map(tuple, regressors)))
    idx = _INDEX_CACHE.get(key)
    # index names are the one thing pandas lets a user change in place (index.names = ...)
    if idx is None or idx.names != _INDEX_NAMES:
        idx = _build_coef_index(names, regressors)
        if len(_INDEX_CACHE) >= _INDEX_CACHE_SIZE:
            _INDEX_CACHE.pop(next(iter(_INDEX_CACHE), None), None)  # oldest first (threads may race)
        _INDEX_CACHE[key] = idx
    return idx


def _series_factory() -> Any:
    """A constructor of float Series over an existing index, for arrays no one else holds,
    that skips pandas' input inference (public constructor ~15 us per call, this ~4 us): the
    block manager directly. Checked once against the public constructor; the public one is
    used if this pandas lays Series out differently."""

    def public(values: np.ndarray, index: pd.Index, name: str) -> pd.Series:
        return pd.Series(values, index=index, name=name, copy=False)

    try:
        from pandas._libs.internals import BlockPlacement
        from pandas.core.generic import NDFrame
        from pandas.core.internals import SingleBlockManager
        from pandas.core.internals.blocks import new_block

        def fast(values: np.ndarray, index: pd.Index, name: str) -> pd.Series:
            block = new_block(values, placement=BlockPlacement(slice(0, len(values))), ndim=1)
            out = pd.Series.__new__(pd.Series)
            NDFrame.__init__(out, SingleBlockManager(block, index))
            object.__setattr__(out, "_name", name)
            return out

        probe_index = pd.MultiIndex.from_arrays([["a", "a"], ["x", "y"]], names=["e", "r"])
        probe = np.array([1.5, -2.0])
        got, want = fast(probe.copy(), probe_index, "p"), public(probe.copy(), probe_index, "p")
        pd.testing.assert_series_equal(got, want, check_exact=True)
        if got.index is probe_index and got.name == "p" and got.flags.allows_duplicate_labels:
            return fast
    except Exception:  # pragma: no cover - a pandas without these internals
        pass
    return public  # pragma: no cover


_float_series = _series_factory()


def check_level(level: Any) -> None:
    """Refuses a confidence level that is not a number strictly between 0 and 1."""
    ok = isinstance(level, (int, float, np.integer, np.floating)) and not isinstance(level, (bool, np.bool_))
    if not (ok and 0 < level < 1):
        raise InvalidOptionError(f"level must be a number between 0 and 1 (e.g. 0.95), got {level!r}")


def _same_data(a: Any, b: Any) -> bool:
    """Whether two systems are one, or hold the same equations, regressor names and data
    (an unpickled copy of the other, or the same arrays given twice)."""
    if a is b:
        return True
    arrays = ("_ys", "_xs")
    if not all(n in vars(s) for s in (a, b) for n in arrays):
        return False  # a system without its rows (streamed, restored): only the same object
    return (
        a._names == b._names
        and a._regressors == b._regressors
        and all(
            x.shape == y.shape and np.array_equal(x, y)
            for n in arrays
            for x, y in zip(getattr(a, n), getattr(b, n))
        )
    )


def _rows_scaled(r: np.ndarray, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each row of (R, q) divided by its largest |entry| (rows of zeros left as they are): the
    same restrictions, whose rows' squares neither over- nor underflow near 1e+-200."""
    r, q = np.asarray(r, dtype=float), np.asarray(q, dtype=float)
    top = np.max(np.abs(r), axis=1) if r.size else np.ones(len(q))
    top = np.where(top > 0, top, 1.0)
    return r / top[:, None], q / top


def _check_nested(loose: Any, tight: Any) -> None:
    """Refuses two restriction sets (or None, unrestricted) unless the tighter one implies the
    looser one: every row of the looser R lies in the row space of the tighter R, with the
    matching combination of the tighter q. Rows are compared at unit norm, to a relative
    tolerance of 1e-9."""
    if loose is None or len(loose) == 0:
        return  # no restriction: implied by anything
    if tight is None or len(tight) == 0:
        bad = [0]
    else:
        rt = np.asarray(tight.r, dtype=float)
        qt = np.asarray(tight.q, dtype=float)
        bad = []
        for i, (row, q) in enumerate(zip(*_rows_scaled(loose.r, loose.q))):
            norm = float(np.linalg.norm(row))
            row, q = row / norm, q / norm
            a = np.linalg.lstsq(rt.T, row, rcond=None)[0]
            scale = max(1.0, float(np.linalg.norm(a) * np.linalg.norm(rt)))
            row_ok = np.linalg.norm(rt.T @ a - row) <= 1e-9 * scale
            # relative to the terms compared, plus the rounding of a (eps times the condition of
            # the tighter R) on large right-hand sides that the row does not use
            q_tol = 1e-9 * (abs(q) + float(np.abs(a) @ np.abs(qt))) + 1e-12 * scale * float(np.linalg.norm(qt))
            q_ok = abs(float(a @ qt) - q) <= q_tol
            if not (row_ok and q_ok):
                bad.append(i)
    tight_text = "; ".join(tight.texts) if tight is not None else "none"
    if bad:
        which = "; ".join(repr(loose.texts[i]) for i in bad[:3]) + (" ..." if len(bad) > 3 else "")
        raise InvalidOptionError(
            "the two fits are not nested: the LR test compares a fit with the fit under further "
            "restrictions, so every restriction of the less restricted fit must follow from those "
            f"of the more restricted one; {which} does not follow from theirs ({tight_text}). "
            "Compare each fit with the unrestricted fit, or with a fit under both sets of restrictions"
        )


class FittedSystem:
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
        restrictions: Any = None,
        covariance: str = "classical",
        inference: str = "z",
    ) -> None:
        self._system = system
        self._prepared = prepared
        self._est = estimate
        self._resid = resid
        self.tol = tol
        self.max_iter = max_iter
        self.restrictions = restrictions
        self.covariance = covariance
        self.inference = inference
        names = system._names  # read only here (equation_names hands users a copy)
        self._names = names
        self._coef_index = coef_index(names, system._regressors)

    @cached_property
    def _row_index(self) -> pd.Index:
        idx = self._system._index
        return idx if idx is not None else pd.RangeIndex(self._system.n_obs)

    # -- basic description -------------------------------------------------------------------
    @property
    def method(self) -> str:
        """The estimator: ``"ols"``, ``"fgls"`` or ``"ifgls"``."""
        return self._est.method

    @property
    def omega_divisor(self) -> str:
        """How Omega was estimated from the residual cross-products: ``"ml"``, ``"dof"`` or
        ``"ledoit-wolf"``."""
        d = self._est.divisor
        return "ledoit-wolf" if d.startswith("lw-") else d

    @property
    def shrink_target(self) -> str | None:
        """Target of the Ledoit-Wolf shrinkage (``"diagonal"`` or ``"identity"``), else None."""
        d = self._est.divisor
        return d[3:] if d.startswith("lw-") else None

    @property
    def shrinkage(self) -> float | None:
        """Ledoit-Wolf intensity of the Omega used in the final step (0 = sample covariance,
        1 = target), None without shrinkage."""
        return self._est.shrinkage

    @property
    def solver(self) -> str:
        """``"direct"`` (Cholesky of the K x K GLS matrix) or ``"cg"`` (matrix-free)."""
        return "cg" if getattr(self._prepared, "matrix_free", False) else "direct"

    @property
    def cg_iterations(self) -> list[int]:
        """Matrix-free solver: conjugate-gradient iterations of each GLS step (else empty)."""
        return list(self._est.cg_iterations)

    @property
    def cg_residual(self) -> float:
        """Matrix-free solver: relative residual ||h - M delta|| / ||h|| of the last GLS solve
        (NaN for the direct solver)."""
        return float(self._est.cg_residual)

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
        return _float_series(self._est.coef, self._coef_index, "coef")

    @cached_property
    def _vcov_array(self) -> np.ndarray:
        if self.covariance == "classical":
            return np.asarray(self._prepared.coef_covariance(self._est))
        return np.asarray(
            self._prepared.coef_covariance(self._est, self.covariance, self._system._ys, self._system._xs)
        )

    @cached_property
    def vcov(self) -> pd.DataFrame:
        """Covariance of all coefficients, cross-equation blocks included, of the kind chosen
        at fit time (:attr:`covariance`: classical, hc0 or hc1). Variances beyond double
        precision (regressors in extreme units) come out inf or 0 with a
        :class:`~blocksur.VarianceRangeWarning` naming them; :attr:`se` stays finite."""
        v = self._vcov_array
        self._warn_variance_range(v)
        return pd.DataFrame(v, index=self._coef_index, columns=self._coef_index)

    def _variances_out_of_range(self, v: np.ndarray) -> np.ndarray:
        """Which coefficients' variances (the diagonal of ``v``) overflowed to inf or
        underflowed to 0 although their standard errors (computed apart, scaled) are positive
        and finite."""
        diag = np.diagonal(v)
        bad = ~np.isfinite(diag)
        if np.any(diag == 0):
            se = self.se.to_numpy()
            bad |= (diag == 0) & (se > 0) & np.isfinite(se)
        return bad

    def _warn_variance_range(self, v: np.ndarray) -> None:
        """Warns, naming them, when coefficients' variances are out of range."""
        bad = self._variances_out_of_range(v)
        if not np.any(bad):
            return
        labels = [coefficient_text(e, r) for e, r in self._coef_index[np.flatnonzero(bad)]]
        shown = ", ".join(labels[:3]) + (f" and {len(labels) - 3} more" if len(labels) > 3 else "")
        warnings.warn(
            f"the variances of {shown} are beyond double precision (inf or 0 in vcov): their "
            "regressors are in extreme units (near 1e+-160 or beyond); rescale those columns "
            "(express them in larger or smaller units). se, and tests of single coefficients, "
            "come from scaled quantities and stay finite",
            VarianceRangeWarning,
            stacklevel=4,  # this method, the vcov getter, cached_property's __get__, the caller
        )

    @cached_property
    def se(self) -> pd.Series:
        """Standard errors (square roots of the diagonal of :attr:`vcov`). With the matrix-free
        solver they come from conjugate-gradient solves, one per coefficient, when the system
        has at most 5,000 coefficients; beyond that use :meth:`se_of` for chosen equations."""
        if self.solver == "cg":
            if self.n_coef > _CG_SE_LIMIT:
                raise InvalidOptionError(
                    f"standard errors of all {self.n_coef} coefficients would take {self.n_coef} "
                    "conjugate-gradient solves on the matrix-free path; call se_of([...]) for the "
                    "equations you need, or refit with solver='direct' if memory allows"
                )
            return self.se_of(self._names)
        return _float_series(self._standard_errors(), self._coef_index, "se")

    def _standard_errors(self) -> np.ndarray:
        """Square roots of the covariance's diagonal: from the compiled core without forming the
        K x K matrix (see ``Prepared.coef_standard_errors``); a restored fit uses its stored one.
        A variance that rounding leaves a hair below zero (a coefficient a restriction fixes)
        counts as zero."""
        if not isinstance(self._prepared, _core.Prepared):
            return np.sqrt(np.maximum(np.diag(self._vcov_array), 0.0))
        if self.covariance == "classical":
            return self._prepared.coef_standard_errors(self._est)
        return self._prepared.coef_standard_errors(
            self._est, self.covariance, self._system._ys, self._system._xs
        )

    def se_of(self, equations: Any) -> pd.Series:
        """Exact standard errors of the coefficients of some equations (names). On the
        matrix-free path each coefficient costs one conjugate-gradient solve; on the direct
        path this is a slice of :attr:`se`."""
        eqs = [equations] if isinstance(equations, str) else list(equations)
        unknown = [e for e in eqs if e not in self._names]
        if unknown:
            raise InvalidOptionError(f"unknown equations {unknown}; the equations are {self._names}")
        if self.solver != "cg":
            return self.se.loc[eqs]
        pos = [self._names.index(e) for e in eqs]
        parts = self._prepared.cg_standard_errors(self._est, pos)
        idx = pd.MultiIndex.from_tuples(
            [(e, r) for e, p in zip(eqs, pos) for r in self._system._regressors[p]],
            names=["equation", "regressor"],
        )
        return pd.Series(np.concatenate(parts), index=idx, name="se")

    @cached_property
    def omega(self) -> pd.DataFrame:
        """The cross-equation error covariance used in the final estimation step (N x N)."""
        return pd.DataFrame(self._est.omega, index=self._names, columns=self._names)

    # -- residuals and fit measures ------------------------------------------------------------
    @cached_property
    def resid(self) -> pd.DataFrame:
        """Residuals y_i - X_i b_i (T x N), one column per equation."""
        return pd.DataFrame(self._residuals(), index=self._row_index, columns=self._names)

    def _residuals(self) -> np.ndarray:
        """The T x N residual array, computed from the data on first use."""
        if self._resid is None:
            self._resid = _core.residuals(self._system._ys, self._system._xs, self._est.coef)
        return self._resid

    @cached_property
    def fitted(self) -> pd.DataFrame:
        """Fitted values X_i b_i (T x N), one column per equation."""
        y = np.column_stack(self._system._ys)
        return pd.DataFrame(y - self._residuals(), index=self._row_index, columns=self._names)

    @cached_property
    def ssr(self) -> pd.Series:
        """Sum of squared residuals per equation."""
        return pd.Series(np.diag(self._est.resid_crossprod).copy(), index=self._names, name="ssr")

    def _k(self) -> np.ndarray:
        return np.diff(np.asarray(self._prepared.offsets))

    @cached_property
    def r2(self) -> pd.Series:
        """R-squared per equation: about the mean when the regressors span a constant,
        otherwise about zero (uncentred), as is common practice."""
        spans = np.asarray(self._prepared.spans_constant)
        tss = np.where(spans, self._prepared.tss_centred, self._prepared.tss_raw)
        tss = np.asarray(tss, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            r2 = np.where(tss > 0, 1.0 - self.ssr.to_numpy() / np.where(tss > 0, tss, 1.0), np.nan)
        return pd.Series(r2, index=self._names, name="r2")

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
        -(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T); ``+inf`` if S/T is singular (an exact fit
        makes the Gaussian likelihood unbounded)."""
        v = self._prepared.log_likelihood(self._est)
        return float("nan") if v is None else float(v)

    # -- inference on coefficients -------------------------------------------------------------
    @property
    def n_restrictions(self) -> int:
        """Number of restrictions imposed at fit time."""
        return int(self._est.n_restrictions)

    @cached_property
    def df_resid(self) -> pd.Series:
        """Residual degrees of freedom per equation, T - K_i (used by ``inference="t"``)."""
        return pd.Series(self.n_obs - self._k(), index=self._names, name="df_resid")

    def _coef_df(self) -> np.ndarray:
        return np.repeat(self.df_resid.to_numpy(), self._k()).astype(float)

    @cached_property
    def stat(self) -> pd.Series:
        """coef / se: a z statistic (``inference="z"``) or t statistic (``"t"``). Zero-variance
        coefficients (fixed by a restriction) get NaN."""
        se = self.se.to_numpy()
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(se > 0, self.coef.to_numpy() / se, np.nan)
        return pd.Series(z, index=self._coef_index, name="stat")

    @cached_property
    def pval(self) -> pd.Series:
        """Two-sided p-values of coef = 0."""
        z = np.abs(self.stat.to_numpy())
        if self.inference == "t":
            p = 2 * _stats().t.sf(z, self._coef_df())
        else:
            p = 2 * _stats().norm.sf(z)
        return pd.Series(p, index=self._coef_index, name="pval")

    def _crit(self, level: float) -> np.ndarray | float:
        check_level(level)
        a = 0.5 + level / 2
        return _stats().t.ppf(a, self._coef_df()) if self.inference == "t" else _stats().norm.ppf(a)

    def interval(self, level: float = 0.95) -> pd.DataFrame:
        """Confidence intervals at ``level``: a DataFrame with columns ``lower`` and ``upper``."""
        c = self._crit(level)
        b, se = self.coef.to_numpy(), self.se.to_numpy()
        return pd.DataFrame({"lower": b - c * se, "upper": b + c * se}, index=self._coef_index)

    def coef_table(self, level: float = 0.95) -> pd.DataFrame:
        """One row per coefficient: estimate, se, stat, pval, lower, upper."""
        ci = self.interval(level)
        return pd.DataFrame(
            {
                "estimate": self.coef,
                "se": self.se,
                "stat": self.stat,
                "pval": self.pval,
                "lower": ci["lower"],
                "upper": ci["upper"],
            }
        )

    # -- hypothesis tests ----------------------------------------------------------------------
    def wald(self, restrictions: Any, *, form: str = "chi2") -> HypothesisTestResult:
        """Wald test of linear restrictions R b = q with this fit's covariance.

        ``restrictions`` as in :meth:`EquationSystem.fit`. ``form="chi2"``: W = (Rb - q)'
        (R V R')^-1 (Rb - q) ~ chi2(m); ``form="F"``: W / m ~ F(m, N T - K + r), r the number of
        restrictions imposed at fit time.
        """
        if form not in ("chi2", "F"):
            raise InvalidOptionError(f"form must be 'chi2' or 'F', got {form!r}")
        rset = parse_restrictions(restrictions, self._names, self._system._regressors)
        # the statistic does not depend on the rows' scale (a row times 1e+-200 had made
        # R V R' over- or underflow: "singular")
        r, q = _rows_scaled(rset.r, rset.q)
        m = len(q)
        if np.linalg.matrix_rank(r) < m:
            raise InvalidOptionError("the restrictions to test are linearly dependent: drop the redundant ones")
        if self.restrictions is not None:
            both = np.vstack([self.restrictions.r, r])
            if np.linalg.matrix_rank(both) < np.linalg.matrix_rank(self.restrictions.r) + m:
                raise InvalidOptionError(
                    "a restriction to test is implied by (or combines with) the restrictions "
                    "imposed at fit time, so R V R' is singular: test it on the unrestricted fit"
                )
        gap = r @ self.coef.to_numpy() - q
        vcov = self._vcov_array  # (the checks below say what is out of range, unwarned)
        used = np.flatnonzero(np.any(r != 0, axis=0))
        sub = vcov[np.ix_(used, used)]
        if not np.all(np.isfinite(sub)) or np.any(self._variances_out_of_range(vcov)[used]):
            raise InvalidOptionError(
                "the covariance of the coefficients these restrictions involve is beyond double "
                "precision (their variances over- or underflow: regressors in units near 1e+-200 "
                "or beyond); rescale those regressors, or read a single coefficient's test from "
                "stat / pval, which come from its standard error"
            )
        ru = r[:, used]  # the coefficients the restrictions involve (others may be inf apart)
        rvr = ru @ sub @ ru.T
        rvr = (rvr + rvr.T) / 2
        # the singularity test and the solve on the correlation form of R V R': restrictions on
        # coefficients in very different units (dollars and shares) scale its rows apart, and
        # an eigenvalue test on R V R' itself had called such joint tests singular
        d = np.sqrt(np.diag(rvr))
        ok = bool(np.all(np.isfinite(d)) and np.all(d > 0))
        if ok:
            corr = rvr / np.outer(d, d)
            ev = np.linalg.eigvalsh(corr)
            ok = bool(ev[0] > 1e-12 * max(ev[-1], 0.0))
        if not ok:
            raise InvalidOptionError(
                "R V R' is singular: the restrictions concern coefficients whose covariance is "
                "(numerically) degenerate"
            )
        gs = gap / d
        w = float(gs @ np.linalg.solve(corr, gs))
        h0 = "; ".join(rset.texts)
        if form == "chi2":
            return HypothesisTestResult("Wald", h0, w, "chi2", m, None, float(_stats().chi2.sf(w, m)))
        dfd = self.n_eq * self.n_obs - self.n_coef + self.n_restrictions
        f = w / m
        return HypothesisTestResult("Wald", h0, f, "F", m, dfd, float(_stats().f.sf(f, m, dfd)))

    def lr_against(self, other: "FittedSystem") -> HypothesisTestResult:
        """Likelihood-ratio test between this fit and a nested one (both iterated ML fits:
        ``method="ifgls"``, ``omega="ml"``, on the same system). LR = 2 (ll_big - ll_small)
        ~ chi2(difference in free coefficients).

        Nested means that every restriction of the less restricted fit follows from those of
        the more restricted one (an unrestricted fit is nested in any restricted fit); fits
        that are not nested are refused. A restricted fit whose log-likelihood exceeds the
        other's by more than rounding (an iterated fit that stopped short of its maximum) is
        refused too, rather than reported as a statistic of zero."""
        if not isinstance(other, FittedSystem):
            raise TypeError(
                "lr_against expects another FittedSystem of the same EquationSystem (an iterated ML "
                f"fit with or without restrictions), not {type(other).__name__}"
            )
        for f in (self, other):
            if f.method != "ifgls" or f.omega_divisor != "ml":
                raise InvalidOptionError(
                    "the LR test compares maximum-likelihood fits: fit both with method='ifgls', omega='ml'"
                )
        if not _same_data(other._system, self._system):
            raise InvalidOptionError(
                "the two fits must come from the same EquationSystem (or one with the same "
                "equations, regressor names and data, such as an unpickled copy)"
            )
        free_self = self.n_coef - self.n_restrictions
        free_other = other.n_coef - other.n_restrictions
        if free_self == free_other:
            raise InvalidOptionError("the fits have the same number of free coefficients: not nested")
        big, small = (self, other) if free_self > free_other else (other, self)
        _check_nested(big.restrictions, small.restrictions)
        for which, f in (("this fit", self), ("the other fit", other)):
            if not f.converged:
                warnings.warn(
                    f"{which} did not converge (converged=False): its log-likelihood may be "
                    "short of the maximum the LR test assumes; refit it with a larger max_iter "
                    "(or cg_max_iter on the matrix-free path)",
                    NotConvergedWarning,
                    stacklevel=2,
                )
        lr = 2.0 * (big.loglik - small.loglik)
        if lr < 0.0:
            scale = max(abs(big.loglik), abs(small.loglik), 1.0)
            if lr < -1e-8 * scale:
                unconverged = [w for w, f in (("this fit", self), ("the other fit", other)) if not f.converged]
                cause = (
                    f" ({' and '.join(unconverged)} did not converge: refit with a larger max_iter)"
                    if unconverged
                    else " (an iterated fit stopped short of the maximum: refit both with a smaller tol)"
                )
                raise NumericalError(
                    f"the more restricted fit has the higher log-likelihood ({small.loglik!r} against "
                    f"{big.loglik!r} for the less restricted one), which cannot happen at the maximum "
                    f"of the likelihood: the LR statistic {lr:.6g} is meaningless{cause}"
                )
            lr = 0.0  # rounding of two equal maxima
        df = abs(free_self - free_other)
        h0 = "; ".join(small.restrictions.texts) if small.restrictions is not None else "the smaller model"
        return HypothesisTestResult("LR", h0, lr, "chi2", df, None, float(_stats().chi2.sf(lr, df)))

    def omega_diagonal_lm(self) -> HypothesisTestResult:
        """Breusch-Pagan LM test that Omega is diagonal (no cross-equation correlation):
        T * sum_{i<j} r_ij^2 ~ chi2(N(N-1)/2), r the correlations of the OLS residuals
        (Breusch & Pagan 1980). A rejection says a system estimator can gain over OLS."""
        n = self.n_eq
        if n < 2:
            raise InvalidOptionError("the diagonality test needs at least two equations")
        s0 = np.asarray(self._prepared.ols_crossprod())
        d = np.sqrt(np.diag(s0))
        r = s0 / np.outer(d, d)
        iu = np.triu_indices(n, 1)
        lm = float(self.n_obs * np.sum(r[iu] ** 2))
        df = n * (n - 1) // 2
        return HypothesisTestResult(
            "Breusch-Pagan LM", "Omega is diagonal", lm, "chi2", df, None, float(_stats().chi2.sf(lm, df))
        )

    def omega_diagonal_lr(self) -> HypothesisTestResult:
        """Likelihood-ratio test that Omega is diagonal: T (sum_i ln s_ii - ln det Omega_ML)
        ~ chi2(N(N-1)/2), s_ii = SSR_i / T of OLS, Omega_ML from the iterated ML fit of the
        unrestricted system (refitted here when this fit is not one)."""
        n, t = self.n_eq, self.n_obs
        if n < 2:
            raise InvalidOptionError("the diagonality test needs at least two equations")
        if self.method == "ifgls" and self.omega_divisor == "ml" and self.n_restrictions == 0 and self.converged:
            s_ml = np.asarray(self._est.resid_crossprod)
        else:
            # a preparation that came with a two-step fit from the data has no Gram matrix
            prep = self._system._prepare() if self._prepared.residuals_only else self._prepared
            est = prep.estimate("ifgls", "ml", 1e-12, 10_000)
            s_ml = np.asarray(est.resid_crossprod)
        s0 = np.asarray(self._prepared.ols_crossprod())
        sign, logdet = np.linalg.slogdet(s_ml / t)
        lr = float(t * (np.sum(np.log(np.diag(s0) / t)) - logdet))
        df = n * (n - 1) // 2
        return HypothesisTestResult(
            "LR", "Omega is diagonal", lr, "chi2", df, None, float(_stats().chi2.sf(lr, df))
        )

    def grs_test(self) -> HypothesisTestResult:
        """Finite-sample F test that all intercepts are zero, for systems whose equations share
        the same regressors: a constant and L factors (Gibbons, Ross & Shanken 1989):
        ((T - N - L) / N) a' S^-1 a / (1 + m' W^-1 m) ~ F(N, T - N - L) under normal errors, with
        a the intercepts, S the ML residual covariance, m and W the factors' mean and ML
        covariance."""
        xs = self._system._xs
        if not self._prepared.shared_regressors and self.n_eq > 1:
            raise InvalidOptionError(
                "the intercept F test needs the same regressors in every equation"
            )
        x = xs[0]
        const = [j for j in range(x.shape[1]) if np.all(x[:, j] == x[0, j]) and x[0, j] != 0]
        if len(const) != 1:
            raise InvalidOptionError("the intercept F test needs exactly one constant column")
        c = const[0]
        n, t = self.n_eq, self.n_obs
        factors = np.delete(x, c, axis=1)
        lf = factors.shape[1]
        if t - n - lf <= 0:
            raise InvalidOptionError(f"the test needs T > N + L ({t} <= {n} + {lf})")
        s0 = np.asarray(self._prepared.ols_crossprod()) / t
        b = self._est.coef if self.method == "ols" else self._prepared.estimate("ols", "ml", 0.0, 1).coef
        b = np.asarray(b).reshape(n, -1)
        alpha = b[:, c] * x[0, c]
        mu = factors.mean(axis=0)
        fc = factors - mu
        w = fc.T @ fc / t
        quad = float(alpha @ np.linalg.solve(s0, alpha))
        denom = 1.0 + (float(mu @ np.linalg.solve(w, mu)) if lf else 0.0)
        f = (t - n - lf) / n * quad / denom
        dfd = t - n - lf
        return HypothesisTestResult(
            "GRS F", "all intercepts are zero", f, "F", n, dfd, float(_stats().f.sf(f, n, dfd))
        )

    # -- system-wide fit measures --------------------------------------------------------------
    @cached_property
    def resid_corr(self) -> pd.DataFrame:
        """Correlation matrix of the residuals across equations."""
        s = np.asarray(self._est.resid_crossprod)
        d = np.sqrt(np.diag(s))
        return pd.DataFrame(s / np.outer(d, d), index=self._names, columns=self._names)

    @cached_property
    def mcelroy_r2(self) -> float:
        """McElroy's (1977) R-squared of the whole system: 1 - e'(Omega^-1 (x) I)e / y'(Omega^-1 (x) D)y,
        D the centring matrix, Omega = :attr:`omega`."""
        oinv = np.linalg.inv(self._est.omega)
        y = np.column_stack(self._system._ys)
        yc = y - y.mean(axis=0)
        num = np.sum(oinv * np.asarray(self._est.resid_crossprod))
        den = np.sum(oinv * (yc.T @ yc))
        return float(1.0 - num / den)

    @property
    def n_params(self) -> int:
        """Free parameters counted by AIC and BIC: coefficients less restrictions, plus the
        N(N+1)/2 distinct elements of Omega."""
        n = self.n_eq
        return self.n_coef - self.n_restrictions + n * (n + 1) // 2

    @property
    def aic(self) -> float:
        """Akaike information criterion: -2 loglik + 2 n_params."""
        return -2.0 * self.loglik + 2.0 * self.n_params

    @property
    def bic(self) -> float:
        """Schwarz (Bayesian) information criterion: -2 loglik + ln(T) n_params."""
        return -2.0 * self.loglik + np.log(self.n_obs) * self.n_params

    # -- prediction ----------------------------------------------------------------------------
    def _new_x(self, new: Any) -> list[np.ndarray]:
        from ._system import _label, _not_real, _refuse_columns

        names = self._names
        if isinstance(new, dict):
            missing = [n for n in names if n not in new]
            if missing:
                raise ShapeMismatchError(f"new regressors are missing for equations {missing}")
            items = [new[n] for n in names]
        else:
            items = list(new)
            if len(items) != len(names):
                raise ShapeMismatchError(f"expected new regressors for {len(names)} equations, got {len(items)}")
        out = []
        rows = None
        for name, regs, x in zip(names, self._system._regressors, items):
            if isinstance(x, pd.DataFrame):
                if isinstance(x.columns, pd.MultiIndex):  # named as the constructor names them
                    x = x.set_axis([_label(c) for c in x.columns], axis=1)
                missing = [r for r in regs if r not in x.columns]
                if missing:
                    raise ShapeMismatchError(
                        f"equation '{name}': new data lack regressors {missing}", equation=name
                    )
                x = x[regs]
            # the constructor's refusals: numpy would read categories as numbers, drop the
            # imaginary part of complex values (a warning only) and parse strings
            _refuse_columns(name, "new regressor matrix", x)
            if isinstance(x, (pd.DataFrame, pd.Series)):
                a = x.to_numpy(dtype=float, na_value=np.nan)  # missing values: refused below
            else:
                a = np.asarray(x)
                err = _not_real(name, "the new regressor matrix", a.dtype)
                if err is not None:
                    raise err
                a = np.asarray(a, dtype=float)
            if a.ndim == 1:
                a = a[None, :] if len(regs) > 1 or rows == 1 else a[:, None]
            if a.ndim != 2 or a.shape[1] != len(regs):
                raise ShapeMismatchError(
                    f"equation '{name}': new regressors have shape {a.shape}; expected (m, {len(regs)})",
                    equation=name,
                )
            if rows is None:
                rows = a.shape[0]
            elif a.shape[0] != rows:
                raise ShapeMismatchError(
                    f"equation '{name}': {a.shape[0]} new rows, but the first equation has {rows}",
                    equation=name,
                )
            if not np.all(np.isfinite(a)):
                bad = int(np.argwhere(~np.isfinite(a))[0, 0])
                raise ShapeMismatchError(
                    f"equation '{name}': new regressors have NaN or inf at row {bad}", equation=name
                )
            out.append(a)
        return out

    def _new_index(self, new: Any) -> pd.Index | None:
        vals = new.values() if isinstance(new, dict) else new
        for x in vals:
            if isinstance(x, pd.DataFrame):
                return x.index
        return None

    def predict(self, new: Any) -> pd.DataFrame:
        """Predicted means X_new,i b_i for new regressor values: ``new`` maps each equation to
        an (m, K_i) array or DataFrame (or is a list in equation order). Returns m x N."""
        new = expand_new(self._system, new)  # one table for a table-built system
        xs = self._new_x(new)
        offs = np.asarray(self._prepared.offsets)
        b = self.coef.to_numpy()
        cols = [x @ b[offs[i] : offs[i + 1]] for i, x in enumerate(xs)]
        return pd.DataFrame(np.column_stack(cols), index=self._new_index(new), columns=self._names)

    def prediction_se(self, new: Any) -> pd.DataFrame:
        """Standard errors of the predicted means, sqrt(diag(X_new V_ii X_new')), with V this
        fit's covariance. (For a new observation add the error variance omega_ii.) A live fit
        computes them from its factors, accurate along nearly collinear directions of X too; a
        fit restored from a file or dict, which keeps only V, from V."""
        new = expand_new(self._system, new)  # one table for a table-built system
        xs = self._new_x(new)
        if isinstance(self._prepared, _core.Prepared) and self.solver != "cg":
            # from the factors (x R_i^-1 against the covariance of the orthonormal coordinates):
            # x V_ii x' from V itself cancels along nearly collinear directions of X_i
            xs = [np.ascontiguousarray(x, dtype=np.float64) for x in xs]
            if self.covariance == "classical":
                var = self._prepared.prediction_variances(self._est, xs)
            else:
                var = self._prepared.prediction_variances(
                    self._est, xs, self.covariance, self._system._ys, self._system._xs
                )
            cols = [np.sqrt(np.maximum(v, 0.0)) for v in var]
        else:
            offs = np.asarray(self._prepared.offsets)
            v = self.vcov.to_numpy()
            cols = []
            for i, x in enumerate(xs):
                vi = v[offs[i] : offs[i + 1], offs[i] : offs[i + 1]]
                cols.append(np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", x, vi, x), 0.0)))
        return pd.DataFrame(np.column_stack(cols), index=self._new_index(new), columns=self._names)

    # -- tables, saving, reports and plots (see _tidy.py, _report.py, _plots.py) ---------------
    @property
    def rows_used(self) -> pd.Index:
        """Index labels of the rows in the common sample (those of residuals and fitted values)."""
        return self._row_index

    @property
    def rows_dropped(self) -> pd.Index:
        """Index labels of the table rows dropped for a missing value (systems built by
        :meth:`EquationSystem.from_table`; empty otherwise)."""
        info = getattr(self._system, "_sample", None)
        return info.rows_dropped if info is not None else self._row_index[:0]

    def long_table(self, level: float = 0.95) -> pd.DataFrame:
        """All coefficients in one long DataFrame: ``equation, regressor, estimate, se, stat,
        pval, lower, upper`` (interval at ``level``).

        Example
        -------
        >>> fit.long_table().query("pval < 0.01")      # doctest: +SKIP
        """
        from ._tidy import long_table

        return long_table(self, level)

    def wide_table(self, quantity: str = "estimate", level: float = 0.95) -> pd.DataFrame:
        """One quantity (``estimate``, ``se``, ``stat``, ``pval``, ``lower``, ``upper``) with
        regressors down and equations across; NaN where an equation lacks a regressor.

        Example
        -------
        >>> fit.wide_table("se")                       # doctest: +SKIP
        """
        from ._tidy import wide_table

        return wide_table(self, quantity, level)

    def equation_stats(self) -> pd.DataFrame:
        """Per-equation statistics: ``n_regressors, df_resid, r2, r2_adj, resid_se, ssr``.

        Example
        -------
        >>> fit.equation_stats()["r2"]                 # doctest: +SKIP
        """
        from ._tidy import equation_stats

        return equation_stats(self)

    def forecast_table(self, new: Any, level: float = 0.95, interval: str = "mean") -> pd.DataFrame:
        """Predictions for new rows in long form, indexed by (row label, equation), with
        ``predicted, se, lower, upper``; ``interval="observation"`` widens the bounds by the
        error variance to cover a new observation rather than its mean.

        Example
        -------
        >>> fit.forecast_table(next_week, interval="observation")   # doctest: +SKIP
        """
        from ._tidy import forecast_table

        return forecast_table(self, new, level, interval)

    def to_dict(self, keep_data: bool = False) -> dict[str, Any]:
        """The fit as a dict of plain JSON types, for pipelines; rebuild it with
        :meth:`from_dict`. ``keep_data=True`` also stores the regressors.

        Example
        -------
        >>> import json
        >>> text = json.dumps(fit.to_dict())           # doctest: +SKIP
        >>> same = FittedSystem.from_dict(json.loads(text))  # doctest: +SKIP
        """
        from ._tidy import fit_to_dict

        return fit_to_dict(self, keep_data)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "FittedSystem":
        """Rebuilds a fit saved by :meth:`to_dict`: identical coefficients, covariance, Omega,
        residuals and fit measures. Methods that go back to the data raise
        :class:`~blocksur.errors.DataNotKeptError` unless the dict kept the regressors.

        Example
        -------
        >>> FittedSystem.from_dict(saved).coef         # doctest: +SKIP
        """
        from ._tidy import fit_from_dict

        return fit_from_dict(cls, data)

    def __getstate__(self) -> dict[str, Any]:
        from ._tidy import pickle_state

        return pickle_state(self)

    def __setstate__(self, state: dict[str, Any]) -> None:
        from ._tidy import restore_pickle

        restore_pickle(self, state)

    def report(self, level: float = 0.95, max_equations: int | None = 12, width: int = 100) -> str:
        """A plain-text report for terminals and logs: a title (``"blocksur · 3 equations ×
        365 rows · iterated FGLS"``), a header (method, sample, iterations, Omega divisor,
        covariance), one block per equation (the first ``max_equations``, a whole number >= 1,
        or None for all), the residual correlations and the system-wide statistics, at most
        ``width`` columns (a whole number from 80 to 1000).

        Example
        -------
        >>> print(fit.report())                        # doctest: +SKIP
        """
        from ._report import text_report

        return text_report(self, level=level, max_equations=max_equations, width=width)

    def report_html(self, level: float = 0.95, max_equations: int | None = 12) -> str:
        """The report as an HTML fragment (what Jupyter shows for a fit); ``max_equations`` as
        in :meth:`report`.

        Example
        -------
        >>> from IPython.display import HTML; HTML(fit.report_html())   # doctest: +SKIP
        """
        from ._report import html_report

        return html_report(self, level=level, max_equations=max_equations)

    def __str__(self) -> str:
        return self.report()

    def _repr_html_(self) -> str:
        return self.report_html()

    def to_markdown(self, level: float = 0.95, digits: int = 4, caption: str | None = None) -> str:
        """The coefficient table as a Markdown (pipe) table, with ``digits`` significant digits
        (a whole number from 1 to 15), after a line with ``caption``: by default the report's
        title (``"blocksur · 3 equations × 365 rows · iterated FGLS"``), ``""`` for none.

        Example
        -------
        >>> print(fit.to_markdown(digits=3))           # doctest: +SKIP
        """
        from ._report import markdown_table

        return markdown_table(self, level=level, digits=digits, caption=caption)

    def to_latex(self, level: float = 0.95, digits: int = 4, caption: str | None = None,
                 label: str | None = None) -> str:
        """The coefficient table as a LaTeX ``table`` with a ``tabular`` (booktabs rules), with
        ``digits`` significant digits (a whole number from 1 to 15), captioned ``caption``: by
        default the report's title (``"blocksur · 3 equations × 365 rows · iterated FGLS"``),
        ``""`` for no caption.

        Example
        -------
        >>> open("coef.tex", "w").write(fit.to_latex(caption="Load equations"))   # doctest: +SKIP
        """
        from ._report import latex_table

        return latex_table(self, level=level, digits=digits, caption=caption, label=label)

    def plot_resid_corr(self, ax: Any = None, annotate: bool | None = None, equations: Any = None) -> Any:
        """Heatmap of the residual correlation matrix (matplotlib), of all equations or of
        those listed in ``equations``; returns the Figure.

        Example
        -------
        >>> fit.plot_resid_corr()                      # doctest: +SKIP
        """
        from ._plots import plot_resid_corr

        return plot_resid_corr(self, ax=ax, annotate=annotate, equations=equations)

    def plot_coef(self, by: str = "regressor", *, regressors: Any = None, equations: Any = None,
                  level: float = 0.95, compare: Any = None, ncols: int = 3, rename: Any = None,
                  label: str | None = None) -> Any:
        """Coefficients with intervals: one panel per regressor across equations
        (``by="regressor"``) or per equation (``by="equation"``); ``compare={"OLS": other_fit}``
        draws other fits beside this one; ``rename(equation, regressor)`` groups regressors
        named after their equation into one panel. Returns the Figure.

        Example
        -------
        >>> fit.plot_coef(regressors=["hdd_harbour"], compare={"OLS": ols})   # doctest: +SKIP
        """
        from ._plots import plot_coef

        return plot_coef(self, by=by, regressors=regressors, equations=equations, level=level,
                         compare=compare, ncols=ncols, rename=rename, label=label)

    def plot_convergence(self, ax: Any = None) -> Any:
        """The convergence criterion after each GLS step (log scale) against ``tol``; returns
        the Figure.

        Example
        -------
        >>> fit.plot_convergence()                     # doctest: +SKIP
        """
        from ._plots import plot_convergence

        return plot_convergence(self, ax=ax)

    def __repr__(self) -> str:
        state = ""
        if self.method == "ifgls":
            state = f", {self.n_iter} steps, " + ("converged" if self.converged else "NOT converged")
        return (
            f"<FittedSystem {self.method} (omega divisor {self.omega_divisor}{state}): "
            f"N={self.n_eq} equations, T={self.n_obs}, K={self.n_coef} coefficients>"
        )
