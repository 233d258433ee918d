"""Type stubs of the compiled core (src/python.rs). The bindings only convert arrays and map
errors; the statistics live in the Rust core.

Example
-------
>>> import numpy as np
>>> from blocksur import _core
>>> X = np.column_stack([np.ones(30), np.arange(30.0)])
>>> prepared = _core.prepare([X @ [1.0, 2.0] + np.sin(np.arange(30.0))], [X], ["a"], [["c", "x"]])
>>> prepared.estimate("ols", "ml", 1e-10, 100).n_iter
0
"""

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

__version__: str

_F64_1D = npt.NDArray[np.float64]
_F64_2D = npt.NDArray[np.float64]

def prepare(
    ys: Sequence[_F64_1D],
    xs: Sequence[_F64_2D],
    names: Sequence[str],
    regressors: Sequence[Sequence[str]],
    matrix_free: bool = False,
    progress: object | None = None,
) -> Prepared:
    """Validates the system and runs the data pass (QR per equation, and one Gram matrix
    unless ``matrix_free``), with the interpreter lock released (the calling thread polls for
    Ctrl-C and calls ``progress`` with the checkpoints passed). Raises the blocksur error
    classes (ShapeMismatchError, NonFiniteError, TooFewObservationsError, CollinearityError,
    ...), and MemoryError when the process cannot get the memory the pass needs."""

def fgls_from_data(
    ys: Sequence[_F64_1D],
    xs: Sequence[_F64_2D],
    names: Sequence[str],
    regressors: Sequence[Sequence[str]],
    divisor: str,
    progress: object | None = None,
) -> tuple[Prepared, Estimate]:
    """Two-step FGLS (divisor "ml" or "dof") in one pass over the data, without the
    (K + N)^2 cross-products, with the interpreter lock released. The Prepared returned keeps
    only the OLS residual cross-products (``residuals_only``): it serves this fit's
    covariances, OLS and ``ols_crossprod``; GLS fits need ``prepare``."""

def residuals(ys: Sequence[_F64_1D], xs: Sequence[_F64_2D], coef: _F64_1D) -> _F64_2D:
    """Residuals y_i - X_i b_i as a T x N array, for stacked coefficients ``coef``."""

_Factors = tuple[int, list[_F64_2D], list[float]]

def pass1_chunk(
    ys: Sequence[_F64_1D],
    xs: Sequence[_F64_2D],
    names: Sequence[str],
    regressors: Sequence[Sequence[str]],
    row_offset: int = 0,
) -> _Factors:
    """Pass 1 of a chunked fit on one chunk of rows: (n_rows, [R of [X_i | y_i] per equation],
    [largest |y_i| per equation])."""

def pass1_merge(a: _Factors, b: _Factors) -> _Factors:
    """Merges two pass-1 summaries."""

def pass1_check(names: Sequence[str], factors: _Factors) -> None:
    """Raises InputError naming the equation when its largest |y| in a (merged) pass-1 summary
    is out of the range the in-memory fit accepts, as finishing would: before pass 2."""

def pass2_chunk(
    ys: Sequence[_F64_1D],
    xs: Sequence[_F64_2D],
    factors: _Factors,
    row_offset: int = 0,
) -> dict[str, object]:
    """Pass 2 of a chunked fit on one chunk, given the merged pass-1 summary: a dict of sums
    (``n_rows``, ``gram``, ``colsum``, ``y_mean``, ``y_m2``, ``y_raw``, ``y_max``: the largest
    |y_i|, merged by max)."""

def pass2_merge(a: dict[str, object], b: dict[str, object]) -> dict[str, object]:
    """Merges two pass-2 summaries."""

def row_chunk(
    ys: Sequence[_F64_1D],
    xs: Sequence[_F64_2D],
    names: Sequence[str],
    regressors: Sequence[Sequence[str]],
    row_offset: int = 0,
) -> dict[str, object]:
    """One-pass summary of a chunk: ``r`` (a square root of Z'Z for Z = [X_1 y_1 .. X_N y_N],
    at most P rows), ``colsum`` (of Z), ``n_rows``, ``y_mean``, ``y_m2``, ``y_raw``, ``y_max``."""

def row_merge(a: dict[str, object], b: dict[str, object]) -> dict[str, object]:
    """Merges two one-pass summaries (QR of the stacked square roots)."""

def row_finish(
    summary: dict[str, object], widths: Sequence[int], names: Sequence[str]
) -> tuple[_Factors, dict[str, object]]:
    """The pass-1 factors and pass-2 statistics of the rows a one-pass summary covers, for
    equations ``names`` of ``widths[i]`` = K_i + 1 columns. Raises InputError naming the
    equation when its largest |y| is out of the range the in-memory fit accepts."""

def prepare_from_summaries(
    names: Sequence[str],
    regressors: Sequence[Sequence[str]],
    factors: _Factors,
    stats: dict[str, object],
) -> Prepared:
    """The prepared system from merged pass-1 and pass-2 summaries of all rows (refusing a y
    out of range, as :func:`row_finish` does)."""

def fit_many(
    ys: Sequence[_F64_1D],
    xs: Sequence[_F64_2D],
    bounds: Sequence[int],
    method: str,
    divisor: str,
    tol: float,
    max_iter: int,
    threads: int,
) -> dict[str, object]:
    """Fits many independent systems of the same layout on ``threads`` threads (one array per
    equation with every system's rows stacked; system g is rows ``bounds[g]:bounds[g+1]``): a dict of
    arrays (``coef``, ``se``: G x K; ``omega``: G x N x N; ``n_iter``, ``converged``,
    ``loglik``: G) and ``errors`` (None or (error class name, message) per system)."""

class Prepared:
    """The system after the data pass; estimations from it never touch the data again."""

    def estimate(
        self,
        method: str,
        divisor: str,
        tol: float,
        max_iter: int,
        r: _F64_2D | None = None,
        q: _F64_1D | None = None,
        ys: Sequence[_F64_1D] | None = None,
        xs: Sequence[_F64_2D] | None = None,
        cg_tol: float = 1e-10,
        cg_max_iter: int = 5000,
        progress: object | None = None,
    ) -> Estimate:
        """One estimation: method "ols", "fgls" or "ifgls"; divisor "ml", "dof",
        "lw-diagonal" or "lw-identity" (Ledoit-Wolf shrinkage, which on the direct path needs
        the data ``ys``, ``xs``); imposes R b = q when ``r`` and ``q`` are given."""

    def cg_standard_errors(
        self, est: Estimate, equations: Sequence[int], cg_tol: float = 1e-10, cg_max_iter: int = 5000
    ) -> list[_F64_1D]:
        """Matrix-free path: standard errors of the coefficients of the given equations (by
        position), one array per equation, from conjugate-gradient solves."""

    @property
    def matrix_free(self) -> bool:
        """Whether this object was prepared for the matrix-free (conjugate-gradient) path."""

    def coef_covariance(
        self,
        est: Estimate,
        kind: str = "classical",
        ys: Sequence[_F64_1D] | None = None,
        xs: Sequence[_F64_2D] | None = None,
    ) -> _F64_2D:
        """Covariance of the stacked coefficients (K x K): "classical", "hc0" or "hc1" (the
        robust kinds need the data as given to :func:`prepare`)."""

    def coef_standard_errors(
        self,
        est: Estimate,
        kind: str = "classical",
        ys: Sequence[_F64_1D] | None = None,
        xs: Sequence[_F64_2D] | None = None,
    ) -> _F64_1D:
        """Standard errors of the stacked coefficients (K): square roots of the diagonal of
        :meth:`coef_covariance`, computed without the K x K matrix where the kind allows it
        (classical unrestricted fits: one triangular inverse of the Cholesky factor)."""

    def prediction_variances(
        self,
        est: Estimate,
        new: Sequence[_F64_2D],
        kind: str = "classical",
        ys: Sequence[_F64_1D] | None = None,
        xs: Sequence[_F64_2D] | None = None,
    ) -> list[_F64_1D]:
        """Variances of the predicted means for new regressor rows (``new[i]``: m x K_i), one
        array of m values per equation, from the factors rather than the covariance matrix."""
        ...
    def ols_crossprod(self) -> _F64_2D:
        """Residual cross-products of unrestricted equation-by-equation OLS (N x N)."""

    def log_likelihood(self, est: Estimate) -> float | None:
        """Gaussian log-likelihood at Omega = S/T of the estimate's residuals; None if S is
        singular."""

    @property
    def n_obs(self) -> int: ...
    @property
    def offsets(self) -> list[int]:
        """Start of each equation's coefficients in the stacked vector, plus the total K."""
    @property
    def residuals_only(self) -> bool:
        """Only the OLS residual cross-products are kept (the Prepared of a two-step fit from
        ``fgls_from_data``): GLS fits need a full preparation."""
    @property
    def shared_regressors(self) -> bool:
        """Whether every equation has the same regressors (the fast path: GLS = OLS)."""
    @property
    def spans_constant(self) -> list[bool]: ...
    @property
    def tss_centred(self) -> list[float]: ...
    @property
    def tss_raw(self) -> list[float]: ...
    @property
    def conditions(self) -> list[float]:
        """Condition-number estimate of each equation's regressor matrix (column-scaled)."""

class Estimate:
    """One estimation's raw results (stacked, equation by equation)."""

    @property
    def coef(self) -> _F64_1D: ...
    @property
    def omega(self) -> _F64_2D: ...
    @property
    def resid_crossprod(self) -> _F64_2D: ...
    @property
    def n_iter(self) -> int: ...
    @property
    def converged(self) -> bool: ...
    @property
    def criterion_path(self) -> list[float]: ...
    @property
    def shrinkage(self) -> float | None:
        """Ledoit-Wolf intensity of the final Omega (None without shrinkage)."""
    @property
    def cg_iterations(self) -> list[int]:
        """Conjugate-gradient iterations of each GLS step (empty on the direct path)."""
    @property
    def cg_residual(self) -> float:
        """Relative residual of the last conjugate-gradient solve (NaN on the direct path)."""
    @property
    def omega_cond(self) -> float:
        """Condition-number estimate of the Omega used in the last GLS step."""
    @property
    def n_restrictions(self) -> int: ...
    @property
    def method(self) -> str: ...
    @property
    def divisor(self) -> str: ...


def set_threads(n: int) -> None:
    """Sets the number of threads blocksur's parallel steps may use (1 to 1024); the pool is
    rebuilt at the next parallel step. Raises InvalidOptionError outside that range."""

def get_threads() -> int:
    """The thread limit in force: set by :func:`set_threads`, else ``RAYON_NUM_THREADS`` as
    read at first use, else the cores this process may use."""

def build_info() -> dict[str, object]:
    """How this extension computes: ``backend`` ("faer" or "lapack"), ``isa`` (the instruction
    set the backend's kernels chose on this CPU, e.g. "avx512", "avx2+fma", "neon"),
    ``kernels_isa`` (that of blocksur's own vector kernels), ``threads`` (the limit in force)
    and ``version`` (the crate's)."""
