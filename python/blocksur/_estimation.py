"""One estimation on a prepared system, with the messages and warnings every front shares
(in-memory, streamed and Dask fits)."""

from __future__ import annotations

import warnings
from typing import Any

from ._progress import close as close_hook
from ._progress import progress_hook
from ._restrictions import parse_restrictions
from .errors import IllConditionedWarning, NotConvergedWarning, RestrictionError

__all__ = ["run_estimation", "warn_about", "COND_WARN"]

# Condition number above which a warning is issued: about half of the 16 digits may be lost.
COND_WARN = 1e8


def run_estimation(
    prepared: Any,
    names: list[str],
    regressors: list[list[str]],
    *,
    method: str,
    core_omega: str,
    tol: float,
    max_iter: int,
    restrictions: Any = None,
    progress: bool | None = False,
    ys: Any = None,
    xs: Any = None,
    cg_tol: float = 1e-10,
    cg_max_iter: int = 5000,
    stacklevel: int = 3,
) -> tuple[Any, Any]:
    """Parses the restrictions, runs the compiled estimation (progress bar for iterated fits),
    names the offending restriction in errors, and warns about a nearly singular Omega or a fit
    that did not converge. Returns (estimate, restriction set or None)."""
    rset = None
    if restrictions is not None:
        rset = parse_restrictions(restrictions, names, regressors)
    hook = progress_hook(progress, "iterated FGLS", int(max_iter)) if method == "ifgls" else None
    try:
        est = prepared.estimate(
            method,
            core_omega,
            tol,
            int(max_iter),
            None if rset is None else rset.r,
            None if rset is None else rset.q,
            ys,
            xs,
            cg_tol=float(cg_tol),
            cg_max_iter=int(cg_max_iter),
            progress=hook,
        )
    except RestrictionError as err:
        where = rset.describe(getattr(err, "index", None)) if rset is not None else ""
        if where:
            msg = str(err).split(" ", 2)[-1] if str(err).startswith("restriction ") else str(err)
            raise RestrictionError(f"{where} {msg}", index=err.index) from None
        raise
    finally:
        close_hook(hook)
    warn_about(est, max_iter, tol, stacklevel + 1, cg_tol=cg_tol, cg_max_iter=cg_max_iter)
    return est, rset


def warn_about(
    est: Any,
    max_iter: int,
    tol: float,
    stacklevel: int,
    *,
    cg_tol: float | None = None,
    cg_max_iter: int | None = None,
) -> None:
    """The warnings an estimate calls for: a nearly singular Omega, an iterated fit that did
    not converge, conjugate gradients that stopped short of their tolerance."""
    if est.omega_cond > COND_WARN:
        warnings.warn(
            f"the estimated cross-equation covariance is nearly singular (condition number "
            f"estimate {est.omega_cond:.1e} of the residual correlation): the residuals of some "
            "equations are almost linearly dependent, and the GLS weights amplify rounding; "
            "check for equations that nearly add up to another",
            IllConditionedWarning,
            stacklevel=stacklevel,
        )
    cg_short = (
        cg_tol is not None and len(est.cg_iterations) > 0 and est.cg_residual > cg_tol
    )
    if cg_short:
        warnings.warn(
            f"the conjugate-gradient solve of the last GLS step stopped after "
            f"{est.cg_iterations[-1]} iterations (cg_max_iter={cg_max_iter}) at relative "
            f"residual {est.cg_residual:.3g}, above cg_tol={cg_tol:g}: the coefficients are "
            "not the GLS solution to that tolerance (converged=False); raise cg_max_iter, "
            "or use solver='direct' if the memory allows",
            NotConvergedWarning,
            stacklevel=stacklevel,
        )
    elif not est.converged:
        path = est.criterion_path
        warnings.warn(
            f"iterated FGLS stopped after max_iter={max_iter} GLS steps without meeting "
            f"tol={tol:g} (last relative change {path[-1]:.3g}); the estimates are those of "
            "the last step: raise max_iter or loosen tol",
            NotConvergedWarning,
            stacklevel=stacklevel,
        )
