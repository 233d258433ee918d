//! Thin pyo3 bindings: convert arrays, release the interpreter lock around the core, and map
//! each core error to its own Python exception class (defined in python/blocksur/errors.py).

use numpy::{IntoPyArray, PyArray1, PyArray2, PyReadonlyArray1, PyReadonlyArray2};
use pyo3::exceptions::PyValueError;
use pyo3::prelude::*;
use pyo3::types::PyDict;

use crate::data::{Equation, SystemData};
use crate::error::SurError;
use crate::estimate::{
    fgls_from_data as fgls_one_pass, CovKind, Divisor, Estimate, Estimation, FitOptions, Method,
    Restrictions,
};
use crate::prepare::Prepared;
use crate::stream::{
    prepare_from_summaries as from_summaries, CrossStats, Pass2Basis, RowFactors, RowSummary,
};

/// Raises the blocksur exception class for a core error, with its details as attributes.
fn raise(py: Python<'_>, err: SurError) -> PyErr {
    let build = || -> PyResult<PyErr> {
        let module = py.import("blocksur.errors")?;
        let cls = module.getattr(err.kind())?;
        let kw = PyDict::new(py);
        match &err {
            SurError::ShapeMismatch { equation, .. } | SurError::Scale { equation, .. } => {
                kw.set_item("equation", equation)?
            }
            SurError::NonFinite {
                equation,
                row,
                column,
                ..
            } => {
                kw.set_item("equation", equation)?;
                kw.set_item("row", row)?;
                kw.set_item("column", column)?;
            }
            SurError::TooFewObservations {
                equation,
                n_obs,
                n_regressors,
            } => {
                kw.set_item("equation", equation)?;
                kw.set_item("n_obs", n_obs)?;
                kw.set_item("n_regressors", n_regressors)?;
            }
            SurError::Collinear {
                equation, column, ..
            } => {
                kw.set_item("equation", equation)?;
                kw.set_item("column", column)?;
            }
            SurError::SingularOmega { equations, .. } => kw.set_item("equations", equations)?,
            SurError::InvalidRestriction { index, .. } => kw.set_item("index", index)?,
            _ => {}
        }
        let obj = cls.call((err.to_string(),), Some(&kw))?;
        Ok(PyErr::from_value(obj))
    };
    build().unwrap_or_else(|e| e)
}

/// Ctrl-C and progress for released-GIL work. Python runs signal handlers on its main thread
/// only, so the thread that called into the core does the asking: while the work runs on
/// blocksur's pool the caller polls (`runtime::run_polled`), briefly taking the interpreter lock
/// to run the signal handlers; a KeyboardInterrupt (or other error) they raise is kept and the
/// work is told to stop at its next checkpoint. With a `callback`, each poll also calls it with
/// the number of checkpoints the work has passed (a progress hook: one per equation and row
/// block of the data pass, per GLS step of a fit); an exception it raises stops the work and
/// is re-raised. Small work runs on the calling thread, which then polls at its checkpoints.
struct Interrupt {
    error: std::sync::Mutex<Option<PyErr>>,
    callback: Option<Py<PyAny>>,
    /// Without a callback Python is asked at most once per `QUIET`, the first time `QUIET`
    /// after the start (taking the interpreter lock back costs more than a small system's
    /// whole data pass): `last` is the time of the last check, in ns since `start`.
    start: std::time::Instant,
    last: std::sync::atomic::AtomicU64,
}

/// Least time between two signal checks of work without a progress callback.
const QUIET: std::time::Duration = std::time::Duration::from_millis(5);

impl Default for Interrupt {
    fn default() -> Self {
        Interrupt {
            error: Default::default(),
            callback: None,
            start: std::time::Instant::now(),
            last: Default::default(),
        }
    }
}

impl Interrupt {
    fn with_callback(callback: Option<Py<PyAny>>) -> Self {
        Interrupt {
            callback,
            ..Default::default()
        }
    }

    /// Whether to stop, after `checks` checkpoints of the work.
    fn poll(&self, checks: usize) -> bool {
        if self.error.lock().map(|e| e.is_some()).unwrap_or(true) {
            return true;
        }
        if self.callback.is_none() {
            use std::sync::atomic::Ordering::Relaxed;
            let now = self.start.elapsed().as_nanos() as u64;
            if now < self.last.load(Relaxed) + QUIET.as_nanos() as u64 {
                return false;
            }
            self.last.store(now, Relaxed);
        }
        Python::attach(|py| {
            let mut outcome = py.check_signals();
            if let (Ok(()), Some(cb)) = (&outcome, &self.callback) {
                outcome = cb.call1(py, (checks,)).map(|_| ());
            }
            match outcome {
                Ok(()) => false,
                Err(e) => {
                    *self.error.lock().unwrap_or_else(|p| p.into_inner()) = Some(e);
                    true
                }
            }
        })
    }

    fn raise(&self, py: Python<'_>, err: SurError) -> PyErr {
        if err == SurError::Interrupted {
            if let Some(e) = self.error.lock().unwrap_or_else(|p| p.into_inner()).take() {
                return e;
            }
            return pyo3::exceptions::PyKeyboardInterrupt::new_err("interrupted");
        }
        raise(py, err)
    }
}

/// Releases the interpreter lock and runs `work` of about `flops` operations, the calling thread
/// polling `stop` meanwhile (see `Interrupt`); `work` gets the stop request to ask at its
/// checkpoints.
fn run_interruptible<T: Send>(
    py: Python<'_>,
    flops: f64,
    stop: &Interrupt,
    work: impl FnOnce(&(dyn Fn() -> bool + Sync)) -> T + Send,
) -> T {
    py.detach(|| crate::runtime::run_polled(flops, &|checks| stop.poll(checks), work))
}

/// Refuses work that needs more address space than this process can get: where a cap on it
/// (RLIMIT_AS, `ulimit -v`) is in force, an allocation the core cannot make ends the process
/// (Rust aborts on a failed allocation), so the memory a step needs at its peak, `bytes`, plus
/// a margin for the backend's own buffers and threads, is reserved first (never touched, given
/// back at once). A reservation that fails raises MemoryError instead.
///
/// The margin covers the backend's packing buffers as well: the matrix-product kernels faer
/// uses on x86-64 reserve twice the last-level cache per thread, once (300 MB of L3 reported on
/// this VM: 600 MB of address space a thread, never touched in full), counted for the pool's
/// threads and the caller.
/// Steps below SMALL_STEP bytes are not checked (the reservation, an mmap and munmap of a
/// few GB, cost more than a small fit: 10-20 us).
fn room_for(bytes: f64) -> PyResult<()> {
    if !bytes.is_finite() || bytes < SMALL_STEP {
        return Ok(());
    }
    let threads = crate::runtime::get_threads() + 1;
    let margin = (BUFFERS + 2 * crate::kernels::last_level_cache_bytes()).saturating_mul(threads);
    let want = (bytes as usize).saturating_add(margin);
    let mut probe: Vec<u8> = Vec::new();
    probe.try_reserve_exact(want).map_err(|_| {
        pyo3::exceptions::PyMemoryError::new_err(format!(
            "this step needs about {:.0} MB of memory (plus {} MB of address space for its threads' \
             buffers), more than this process may allocate (a cap on its address space, ulimit -v, \
             or the machine's memory)",
            bytes / 1e6,
            margin >> 20
        ))
    })
}

/// Memory of a step below which `room_for` does not check.
const SMALL_STEP: f64 = 16e6;

/// Address space a thread's other buffers may take (stack, workspaces), in `room_for`.
const BUFFERS: usize = 32 << 20;

/// Bytes of the data pass's largest buffers: W (T x P) and its Gram matrix (P x P), or W
/// alone (matrix-free).
fn pass_bytes(
    ys: &[PyReadonlyArray1<'_, f64>],
    xs: &[PyReadonlyArray2<'_, f64>],
    gram: bool,
) -> f64 {
    let t = ys.first().map_or(0, |y| y.as_array().len()) as f64;
    let p = (xs.iter().map(|x| x.as_array().ncols()).sum::<usize>() + ys.len()) as f64;
    8.0 * (t * p + if gram { p * p } else { 0.0 })
}

/// Operations of a data pass over T rows and P columns with K regressors in all (T P^2 for
/// the cross-products, T K^2 for the QRs), for `run_interruptible`.
fn pass_flops(ys: &[PyReadonlyArray1<'_, f64>], xs: &[PyReadonlyArray2<'_, f64>]) -> f64 {
    let t = ys.first().map_or(0, |y| y.as_array().len()) as f64;
    let k: usize = xs.iter().map(|x| x.as_array().ncols()).sum();
    let p = (k + ys.len()) as f64;
    t * p * p + (k as f64).powi(3)
}

fn equations<'a>(
    ys: &'a [PyReadonlyArray1<'_, f64>],
    xs: &'a [PyReadonlyArray2<'_, f64>],
    names: &[String],
    regressors: &[Vec<String>],
) -> PyResult<SystemData<'a>> {
    if ys.len() != xs.len() || ys.len() != names.len() || ys.len() != regressors.len() {
        return Err(PyValueError::new_err(
            "ys, xs, names and regressors must have the same length",
        ));
    }
    let eqs = ys
        .iter()
        .zip(xs)
        .zip(names.iter().zip(regressors))
        .map(|((y, x), (name, regs))| {
            Equation::named(name.clone(), y.as_array(), x.as_array(), regs.clone())
        })
        .collect();
    Ok(SystemData::new(eqs))
}

/// The system after the data pass (orthonormal factors and cross-products); refits are cheap.
#[pyclass(name = "Prepared", module = "blocksur._core", frozen)]
struct PyPrepared {
    inner: Prepared,
}

/// One estimation's raw results.
#[pyclass(name = "Estimate", module = "blocksur._core", frozen)]
struct PyEstimate {
    inner: Estimate,
}

/// Validates the system and runs the data pass, with the interpreter lock released.
/// `matrix_free=True` keeps the T x P basis instead of the P x P cross-products (for systems
/// whose K x K matrices would not fit in memory).
#[pyfunction]
#[pyo3(signature = (ys, xs, names, regressors, matrix_free=false, progress=None))]
fn prepare(
    py: Python<'_>,
    ys: Vec<PyReadonlyArray1<'_, f64>>,
    xs: Vec<PyReadonlyArray2<'_, f64>>,
    names: Vec<String>,
    regressors: Vec<Vec<String>>,
    matrix_free: bool,
    progress: Option<Py<PyAny>>,
) -> PyResult<PyPrepared> {
    let data = equations(&ys, &xs, &names, &regressors)?;
    room_for(pass_bytes(&ys, &xs, !matrix_free))?;
    let stop = Interrupt::with_callback(progress);
    let out = run_interruptible(py, pass_flops(&ys, &xs), &stop, |cancel| {
        if matrix_free {
            Prepared::new_matrix_free(&data, cancel)
        } else {
            Prepared::new_with(&data, cancel)
        }
    });
    out.map(|inner| PyPrepared { inner })
        .map_err(|e| stop.raise(py, e))
}

/// Two-step FGLS straight from the data (no P x P Gram matrix kept), with the interpreter
/// lock released: the estimate and a preparation that serves that fit's covariances, OLS and
/// the OLS residual cross-products only (`Prepared::fgls_from_data`).
#[pyfunction]
#[pyo3(signature = (ys, xs, names, regressors, divisor, progress=None))]
fn fgls_from_data(
    py: Python<'_>,
    ys: Vec<PyReadonlyArray1<'_, f64>>,
    xs: Vec<PyReadonlyArray2<'_, f64>>,
    names: Vec<String>,
    regressors: Vec<Vec<String>>,
    divisor: &str,
    progress: Option<Py<PyAny>>,
) -> PyResult<(PyPrepared, PyEstimate)> {
    let divisor = Divisor::parse(divisor).map_err(|e| raise(py, e))?;
    let data = equations(&ys, &xs, &names, &regressors)?;
    // W, the K x K products and the T x N residuals
    let k = xs.iter().map(|x| x.as_array().ncols()).sum::<usize>() as f64;
    let t = ys.first().map_or(0, |y| y.as_array().len()) as f64;
    room_for(pass_bytes(&ys, &xs, false) + 8.0 * (k * k + t * ys.len() as f64))?;
    let stop = Interrupt::with_callback(progress);
    let out = run_interruptible(py, pass_flops(&ys, &xs), &stop, |cancel| {
        fgls_one_pass(&data, divisor, cancel)
    });
    out.map(|(p, e)| (PyPrepared { inner: p }, PyEstimate { inner: e }))
        .map_err(|e| stop.raise(py, e))
}

/// Residuals y_i - X_i b_i (T x N) from the data.
#[pyfunction]
fn residuals<'py>(
    py: Python<'py>,
    ys: Vec<PyReadonlyArray1<'py, f64>>,
    xs: Vec<PyReadonlyArray2<'py, f64>>,
    coef: PyReadonlyArray1<'py, f64>,
) -> PyResult<Bound<'py, PyArray2<f64>>> {
    let n = ys.len();
    let names: Vec<String> = (0..n).map(|i| format!("eq{i}")).collect();
    let regs: Vec<Vec<String>> = xs
        .iter()
        .map(|x| (0..x.as_array().ncols()).map(|j| format!("x{j}")).collect())
        .collect();
    let data = equations(&ys, &xs, &names, &regs)?;
    data.validate_chunk(0, false).map_err(|e| raise(py, e))?;
    let k: usize = xs.iter().map(|x| x.as_array().ncols()).sum();
    let c = coef.as_array();
    if c.len() != k || n == 0 {
        return Err(PyValueError::new_err(format!(
            "expected {k} coefficients, got {}",
            c.len()
        )));
    }
    let c = c.to_vec();
    Ok(py.detach(|| data.residuals(&c)).into_pyarray(py))
}

impl PyPrepared {
    /// Runs `work` for a covariance kind ("classical", "hc0", "hc1") and the system's data when
    /// given (robust kinds need it), with the interpreter lock released.
    fn of_kind<'py, T: Send>(
        &self,
        py: Python<'py>,
        kind: &str,
        ys: Option<Vec<PyReadonlyArray1<'py, f64>>>,
        xs: Option<Vec<PyReadonlyArray2<'py, f64>>>,
        work: impl FnOnce(CovKind, Option<&SystemData>) -> Result<T, SurError> + Send,
    ) -> PyResult<T> {
        let kind = CovKind::parse(kind).map_err(|e| raise(py, e))?;
        let (ys, xs) = (ys.unwrap_or_default(), xs.unwrap_or_default());
        let data = if ys.is_empty() {
            None
        } else {
            Some(equations(
                &ys,
                &xs,
                &self.inner.names,
                &self.inner.regressors,
            )?)
        };
        py.detach(|| work(kind, data.as_ref()))
            .map_err(|e| raise(py, e))
    }
}

#[pymethods]
impl PyPrepared {
    /// Runs one estimation ("ols", "fgls", "ifgls"; omega "ml", "dof", "lw-diagonal" or
    /// "lw-identity"), imposing R b = q when `r` and `q` are given. Shrinkage on the direct path
    /// needs the data (`ys`, `xs`).
    #[pyo3(signature = (method, divisor, tol, max_iter, r=None, q=None, ys=None, xs=None, cg_tol=1e-10, cg_max_iter=5000, progress=None))]
    #[allow(clippy::too_many_arguments)]
    fn estimate<'py>(
        &self,
        py: Python<'py>,
        method: &str,
        divisor: &str,
        tol: f64,
        max_iter: usize,
        r: Option<PyReadonlyArray2<'py, f64>>,
        q: Option<PyReadonlyArray1<'py, f64>>,
        ys: Option<Vec<PyReadonlyArray1<'py, f64>>>,
        xs: Option<Vec<PyReadonlyArray2<'py, f64>>>,
        cg_tol: f64,
        cg_max_iter: usize,
        progress: Option<Py<PyAny>>,
    ) -> PyResult<PyEstimate> {
        let opts = FitOptions {
            method: Method::parse(method).map_err(|e| raise(py, e))?,
            divisor: Divisor::parse(divisor).map_err(|e| raise(py, e))?,
            tol,
            max_iter,
            cg_tol,
            cg_max_iter,
        };
        let restrictions = match (r, q) {
            (Some(r), Some(q)) => Some(Restrictions {
                r: r.as_array().to_owned(),
                q: q.as_array().to_owned(),
            }),
            (None, None) => None,
            _ => return Err(PyValueError::new_err("give both r and q, or neither")),
        };
        let (ys, xs) = (ys.unwrap_or_default(), xs.unwrap_or_default());
        let data = if ys.is_empty() {
            None
        } else {
            Some(equations(
                &ys,
                &xs,
                &self.inner.names,
                &self.inner.regressors,
            )?)
        };
        let (k, n) = (self.inner.n_coef() as f64, self.inner.n_eq() as f64);
        // the GLS matrix and its factor, and a restricted fit's K x K products
        room_for(8.0 * 3.0 * k * k)?;
        let stop = Interrupt::with_callback(progress);
        let steps = if opts.method == Method::IteratedFgls {
            10.0
        } else {
            1.0
        };
        let flops = steps * (k.powi(3) + n.powi(3))
            + if matches!(
                self.inner.cross,
                crate::prepare::CrossProducts::MatrixFree { .. }
            ) {
                1e12
            } else {
                0.0
            };
        let out = run_interruptible(py, flops, &stop, |cancel| {
            self.inner
                .estimate_with(&opts, restrictions.as_ref(), data.as_ref(), cancel)
        });
        out.map(|inner| PyEstimate { inner })
            .map_err(|e| stop.raise(py, e))
    }

    /// Matrix-free path: standard errors of the coefficients of the given equations (by index)
    /// from conjugate-gradient solves, one array per equation.
    #[pyo3(signature = (est, equations, cg_tol=1e-10, cg_max_iter=5000))]
    fn cg_standard_errors<'py>(
        &self,
        py: Python<'py>,
        est: &PyEstimate,
        equations: Vec<usize>,
        cg_tol: f64,
        cg_max_iter: usize,
    ) -> PyResult<Vec<Bound<'py, PyArray1<f64>>>> {
        let stop = Interrupt::default();
        let out = run_interruptible(py, f64::INFINITY, &stop, |cancel| {
            self.inner
                .cg_standard_errors(&est.inner.omega, &equations, cg_tol, cg_max_iter, cancel)
        });
        out.map(|v| v.into_iter().map(|a| a.into_pyarray(py)).collect())
            .map_err(|e| stop.raise(py, e))
    }

    #[getter]
    fn matrix_free(&self) -> bool {
        matches!(
            self.inner.cross,
            crate::prepare::CrossProducts::MatrixFree { .. }
        )
    }

    /// Covariance of the stacked coefficients (K x K): kind "classical", "hc0" or "hc1" (the
    /// robust kinds need the data: ys and xs as given to `prepare`).
    #[pyo3(signature = (est, kind="classical", ys=None, xs=None))]
    fn coef_covariance<'py>(
        &self,
        py: Python<'py>,
        est: &PyEstimate,
        kind: &str,
        ys: Option<Vec<PyReadonlyArray1<'py, f64>>>,
        xs: Option<Vec<PyReadonlyArray2<'py, f64>>>,
    ) -> PyResult<Bound<'py, PyArray2<f64>>> {
        let out = self.of_kind(py, kind, ys, xs, |k, d| {
            self.inner.coef_covariance_of(&est.inner, k, d)
        })?;
        Ok(out.into_pyarray(py))
    }

    /// Standard errors of the stacked coefficients (square roots of the diagonal of
    /// `coef_covariance`, K values), without the K x K covariance where the kind allows it.
    #[pyo3(signature = (est, kind="classical", ys=None, xs=None))]
    fn coef_standard_errors<'py>(
        &self,
        py: Python<'py>,
        est: &PyEstimate,
        kind: &str,
        ys: Option<Vec<PyReadonlyArray1<'py, f64>>>,
        xs: Option<Vec<PyReadonlyArray2<'py, f64>>>,
    ) -> PyResult<Bound<'py, PyArray1<f64>>> {
        let out = self.of_kind(py, kind, ys, xs, |k, d| {
            self.inner.coef_standard_errors(&est.inner, k, d)
        })?;
        Ok(out.into_pyarray(py))
    }

    /// Variances of predicted means for new regressor rows (`new[i]`: m x K_i), of the given
    /// covariance kind, one array of m values per equation (`Prepared::prediction_variances`).
    #[pyo3(signature = (est, new, kind="classical", ys=None, xs=None))]
    fn prediction_variances<'py>(
        &self,
        py: Python<'py>,
        est: &PyEstimate,
        new: Vec<PyReadonlyArray2<'py, f64>>,
        kind: &str,
        ys: Option<Vec<PyReadonlyArray1<'py, f64>>>,
        xs: Option<Vec<PyReadonlyArray2<'py, f64>>>,
    ) -> PyResult<Vec<Bound<'py, PyArray1<f64>>>> {
        let views: Vec<_> = new.iter().map(|a| a.as_array()).collect();
        let out = self.of_kind(py, kind, ys, xs, |k, d| {
            self.inner.prediction_variances(&est.inner, k, d, &views)
        })?;
        Ok(out.into_iter().map(|v| v.into_pyarray(py)).collect())
    }

    /// Residual cross-products of unrestricted equation-by-equation OLS (N x N).
    fn ols_crossprod<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray2<f64>> {
        self.inner.ols_crossprod().into_pyarray(py)
    }

    /// Gaussian log-likelihood at Omega = S/T of the estimate's residuals (None if singular).
    fn log_likelihood(&self, py: Python<'_>, est: &PyEstimate) -> Option<f64> {
        // (S may be formed here, from the residuals a one-pass fit kept)
        py.detach(|| self.inner.log_likelihood(est.inner.resid_crossprod()))
    }

    #[getter]
    fn n_obs(&self) -> usize {
        self.inner.n_obs
    }
    #[getter]
    fn offsets(&self) -> Vec<usize> {
        self.inner.offsets.clone()
    }
    /// Only the OLS residual cross-products are kept (a preparation that came with a two-step
    /// FGLS fit computed from the data): GLS fits need a full preparation.
    #[getter]
    fn residuals_only(&self) -> bool {
        matches!(
            self.inner.cross,
            crate::prepare::CrossProducts::ResidualsOnly { .. }
        )
    }

    #[getter]
    fn shared_regressors(&self) -> bool {
        matches!(
            self.inner.cross,
            crate::prepare::CrossProducts::SharedRegressors { .. }
        )
    }
    #[getter]
    fn spans_constant(&self) -> Vec<bool> {
        self.inner
            .factors
            .iter()
            .map(|f| f.spans_constant)
            .collect()
    }
    #[getter]
    fn tss_centred(&self) -> Vec<f64> {
        self.inner.factors.iter().map(|f| f.tss_centred).collect()
    }
    #[getter]
    fn tss_raw(&self) -> Vec<f64> {
        self.inner.factors.iter().map(|f| f.tss_raw).collect()
    }
    #[getter]
    fn conditions(&self) -> Vec<f64> {
        self.inner.factors.iter().map(|f| f.cond).collect()
    }
}

#[pymethods]
impl PyEstimate {
    #[getter]
    fn coef<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray1<f64>> {
        self.inner.coef.clone().into_pyarray(py)
    }
    #[getter]
    fn omega<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray2<f64>> {
        self.inner.omega.clone().into_pyarray(py)
    }
    #[getter]
    fn resid_crossprod<'py>(&self, py: Python<'py>) -> Bound<'py, PyArray2<f64>> {
        // formed on first use by a one-pass FGLS estimate (a product over the T x N residuals)
        py.detach(|| self.inner.resid_crossprod().clone())
            .into_pyarray(py)
    }
    #[getter]
    fn n_iter(&self) -> usize {
        self.inner.n_iter
    }
    #[getter]
    fn converged(&self) -> bool {
        self.inner.converged
    }
    #[getter]
    fn criterion_path(&self) -> Vec<f64> {
        self.inner.criterion_path.clone()
    }
    #[getter]
    fn shrinkage(&self) -> Option<f64> {
        self.inner.shrinkage
    }
    #[getter]
    fn cg_iterations(&self) -> Vec<usize> {
        self.inner.cg_iterations.clone()
    }
    #[getter]
    fn cg_residual(&self) -> f64 {
        self.inner.cg_residual
    }
    #[getter]
    fn omega_cond(&self) -> f64 {
        self.inner.omega_cond
    }
    #[getter]
    fn n_restrictions(&self) -> usize {
        self.inner.n_restrictions
    }
    #[getter]
    fn method(&self) -> &'static str {
        self.inner.method.as_str()
    }
    #[getter]
    fn divisor(&self) -> &'static str {
        self.inner.divisor.as_str()
    }
}

/// A pass-1 summary: (n_rows, [R of [X_i | y_i]], [largest |y_i|]).
type Factors<'py> = (usize, Vec<PyReadonlyArray2<'py, f64>>, Vec<f64>);
type FactorsOut<'py> = (usize, Vec<Bound<'py, PyArray2<f64>>>, Vec<f64>);

fn factors_from_py(f: &Factors<'_>) -> RowFactors {
    RowFactors {
        n_rows: f.0,
        r: f.1.iter().map(|a| a.as_array().to_owned()).collect(),
        y_max: f.2.clone(),
    }
}

fn factors_to_py<'py>(py: Python<'py>, f: RowFactors) -> FactorsOut<'py> {
    (
        f.n_rows,
        f.r.into_iter().map(|a| a.into_pyarray(py)).collect(),
        f.y_max,
    )
}

/// The fields the pass-2 and one-pass summaries share: row count, column sums, y moments and
/// largest |y|.
type Shared = (
    usize,
    ndarray::Array1<f64>,
    Vec<f64>,
    Vec<f64>,
    Vec<f64>,
    Vec<f64>,
);

fn item<'py>(d: &Bound<'py, PyDict>, k: &str, what: &str) -> PyResult<Bound<'py, pyo3::PyAny>> {
    d.get_item(k)?
        .ok_or_else(|| PyValueError::new_err(format!("{what} lacks '{k}'")))
}

fn shared_from_py(d: &Bound<'_, PyDict>, what: &str) -> PyResult<Shared> {
    Ok((
        item(d, "n_rows", what)?.extract()?,
        item(d, "colsum", what)?
            .extract::<PyReadonlyArray1<f64>>()?
            .as_array()
            .to_owned(),
        item(d, "y_mean", what)?.extract()?,
        item(d, "y_m2", what)?.extract()?,
        item(d, "y_raw", what)?.extract()?,
        item(d, "y_max", what)?.extract()?,
    ))
}

fn shared_to_py<'py>(
    py: Python<'py>,
    s: Shared,
    key: &str,
    matrix: ndarray::Array2<f64>,
) -> PyResult<Bound<'py, PyDict>> {
    let d = PyDict::new(py);
    d.set_item("n_rows", s.0)?;
    d.set_item(key, matrix.into_pyarray(py))?;
    d.set_item("colsum", s.1.into_pyarray(py))?;
    d.set_item("y_mean", s.2)?;
    d.set_item("y_m2", s.3)?;
    d.set_item("y_raw", s.4)?;
    d.set_item("y_max", s.5)?;
    Ok(d)
}

fn stats_from_py(d: &Bound<'_, PyDict>) -> PyResult<CrossStats> {
    let (n_rows, colsum, y_mean, y_m2, y_raw, y_max) = shared_from_py(d, "pass-2 summary")?;
    let gram = item(d, "gram", "pass-2 summary")?
        .extract::<PyReadonlyArray2<f64>>()?
        .as_array()
        .to_owned();
    Ok(CrossStats {
        n_rows,
        gram,
        colsum,
        y_mean,
        y_m2,
        y_raw,
        y_max,
    })
}

fn stats_to_py(py: Python<'_>, s: CrossStats) -> PyResult<Bound<'_, PyDict>> {
    shared_to_py(
        py,
        (s.n_rows, s.colsum, s.y_mean, s.y_m2, s.y_raw, s.y_max),
        "gram",
        s.gram,
    )
}

fn summary_from_py(d: &Bound<'_, PyDict>) -> PyResult<RowSummary> {
    let (n_rows, colsum, y_mean, y_m2, y_raw, y_max) = shared_from_py(d, "row summary")?;
    let r = item(d, "r", "row summary")?
        .extract::<PyReadonlyArray2<f64>>()?
        .as_array()
        .to_owned();
    Ok(RowSummary {
        n_rows,
        r,
        colsum,
        y_mean,
        y_m2,
        y_raw,
        y_max,
    })
}

fn summary_to_py(py: Python<'_>, s: RowSummary) -> PyResult<Bound<'_, PyDict>> {
    shared_to_py(
        py,
        (s.n_rows, s.colsum, s.y_mean, s.y_m2, s.y_raw, s.y_max),
        "r",
        s.r,
    )
}

fn default_names(n: usize, xs: &[PyReadonlyArray2<'_, f64>]) -> (Vec<String>, Vec<Vec<String>>) {
    let names = (0..n).map(|i| format!("eq{i}")).collect();
    let regs = xs
        .iter()
        .map(|x| (0..x.as_array().ncols()).map(|j| format!("x{j}")).collect())
        .collect();
    (names, regs)
}

/// Pass 1 of a chunked fit on one chunk: (n_rows, [R of [X_i | y_i] per equation], [largest
/// |y_i| per equation]).
#[pyfunction]
#[pyo3(signature = (ys, xs, names, regressors, row_offset=0))]
fn pass1_chunk<'py>(
    py: Python<'py>,
    ys: Vec<PyReadonlyArray1<'py, f64>>,
    xs: Vec<PyReadonlyArray2<'py, f64>>,
    names: Vec<String>,
    regressors: Vec<Vec<String>>,
    row_offset: usize,
) -> PyResult<FactorsOut<'py>> {
    let data = equations(&ys, &xs, &names, &regressors)?;
    let out = py
        .detach(|| RowFactors::from_chunk(&data, row_offset))
        .map_err(|e| raise(py, e))?;
    Ok(factors_to_py(py, out))
}

/// Merges two pass-1 summaries.
#[pyfunction]
fn pass1_merge<'py>(
    py: Python<'py>,
    a: Factors<'py>,
    b: Factors<'py>,
) -> PyResult<FactorsOut<'py>> {
    let (a, b) = (factors_from_py(&a), factors_from_py(&b));
    let out = py.detach(|| a.merge(b)).map_err(|e| raise(py, e))?;
    Ok(factors_to_py(py, out))
}

/// Refuses a merged pass-1 summary whose largest |y| of an equation of `names` is out of range
/// (InputError naming it, as finishing would), before pass 2 reads the rows again.
#[pyfunction]
fn pass1_check(py: Python<'_>, names: Vec<String>, factors: Factors<'_>) -> PyResult<()> {
    factors_from_py(&factors)
        .check_y_range(&names)
        .map_err(|e| raise(py, e))
}

/// Pass 2 of a chunked fit on one chunk, given the merged pass-1 summary: a dict of sums.
#[pyfunction]
#[pyo3(signature = (ys, xs, factors, row_offset=0))]
fn pass2_chunk<'py>(
    py: Python<'py>,
    ys: Vec<PyReadonlyArray1<'py, f64>>,
    xs: Vec<PyReadonlyArray2<'py, f64>>,
    factors: Factors<'py>,
    row_offset: usize,
) -> PyResult<Bound<'py, PyDict>> {
    let (names, regs) = default_names(ys.len(), &xs);
    let data = equations(&ys, &xs, &names, &regs)?;
    let f = factors_from_py(&factors);
    let out = py
        .detach(|| Pass2Basis::new(&f).and_then(|b| CrossStats::from_chunk(&data, &b, row_offset)))
        .map_err(|e| raise(py, e))?;
    stats_to_py(py, out)
}

/// Merges two pass-2 summaries.
#[pyfunction]
fn pass2_merge<'py>(
    py: Python<'py>,
    a: Bound<'py, PyDict>,
    b: Bound<'py, PyDict>,
) -> PyResult<Bound<'py, PyDict>> {
    let (a, b) = (stats_from_py(&a)?, stats_from_py(&b)?);
    let out = py.detach(|| a.merge(b)).map_err(|e| raise(py, e))?;
    stats_to_py(py, out)
}

/// One-pass summary of a chunk (a square root of Z'Z for Z = [X_1 y_1 .. X_N y_N], column
/// sums, y moments and largest |y|): a dict that `row_merge` combines and `row_finish` completes.
#[pyfunction]
#[pyo3(signature = (ys, xs, names, regressors, row_offset=0))]
fn row_chunk<'py>(
    py: Python<'py>,
    ys: Vec<PyReadonlyArray1<'py, f64>>,
    xs: Vec<PyReadonlyArray2<'py, f64>>,
    names: Vec<String>,
    regressors: Vec<Vec<String>>,
    row_offset: usize,
) -> PyResult<Bound<'py, PyDict>> {
    let data = equations(&ys, &xs, &names, &regressors)?;
    let out = py
        .detach(|| RowSummary::from_chunk(&data, row_offset))
        .map_err(|e| raise(py, e))?;
    summary_to_py(py, out)
}

/// Merges two one-pass summaries.
#[pyfunction]
fn row_merge<'py>(
    py: Python<'py>,
    a: Bound<'py, PyDict>,
    b: Bound<'py, PyDict>,
) -> PyResult<Bound<'py, PyDict>> {
    let (a, b) = (summary_from_py(&a)?, summary_from_py(&b)?);
    let out = py.detach(|| a.merge(b)).map_err(|e| raise(py, e))?;
    summary_to_py(py, out)
}

/// The pass-1 factors and pass-2 statistics of the rows a one-pass summary covers, for
/// equations `names` of `widths[i]` = K_i + 1 columns.
#[pyfunction]
fn row_finish<'py>(
    py: Python<'py>,
    summary: Bound<'py, PyDict>,
    widths: Vec<usize>,
    names: Vec<String>,
) -> PyResult<(FactorsOut<'py>, Bound<'py, PyDict>)> {
    let s = summary_from_py(&summary)?;
    let (f, st) = py
        .detach(|| s.finish(&names, &widths))
        .map_err(|e| raise(py, e))?;
    Ok((factors_to_py(py, f), stats_to_py(py, st)?))
}

/// The prepared system from merged pass-1 and pass-2 summaries of all rows.
#[pyfunction]
fn prepare_from_summaries(
    py: Python<'_>,
    names: Vec<String>,
    regressors: Vec<Vec<String>>,
    factors: Factors<'_>,
    stats: Bound<'_, PyDict>,
) -> PyResult<PyPrepared> {
    let f = factors_from_py(&factors);
    let st = stats_from_py(&stats)?;
    py.detach(|| from_summaries(names, regressors, &f, &st))
        .map(|inner| PyPrepared { inner })
        .map_err(|e| raise(py, e))
}

/// Fits many independent systems on `threads` threads. The systems share one layout: `ys` and
/// `xs` hold one array per equation with the rows of every system stacked, and system g is rows
/// `bounds[g]..bounds[g + 1]` (views, nothing is copied). Returns a dict of arrays (coef, se:
/// G x K; omega: G x N x N; n_iter, converged, loglik: G) with NaN rows for failed systems, and
/// `errors`: a list with None or (exception class name, message) per system.
#[pyfunction]
#[pyo3(signature = (ys, xs, bounds, method, divisor, tol, max_iter, threads))]
#[allow(clippy::too_many_arguments)]
fn fit_many<'py>(
    py: Python<'py>,
    ys: Vec<PyReadonlyArray1<'py, f64>>,
    xs: Vec<PyReadonlyArray2<'py, f64>>,
    bounds: Vec<usize>,
    method: &str,
    divisor: &str,
    tol: f64,
    max_iter: usize,
    threads: usize,
) -> PyResult<Bound<'py, PyDict>> {
    let opts = FitOptions {
        method: Method::parse(method).map_err(|e| raise(py, e))?,
        divisor: Divisor::parse(divisor).map_err(|e| raise(py, e))?,
        tol,
        max_iter,
        ..Default::default()
    };
    if ys.len() != xs.len() {
        return Err(PyValueError::new_err(
            "ys and xs must list the same number of equations",
        ));
    }
    let n = ys.len();
    let rows = ys.first().map_or(0, |y| y.as_array().len());
    for (i, (y, x)) in ys.iter().zip(&xs).enumerate() {
        if y.as_array().len() != rows || x.as_array().nrows() != rows {
            return Err(PyValueError::new_err(format!(
                "equation {i}: every y and X must have the same {rows} stacked rows"
            )));
        }
    }
    if bounds.is_empty()
        || bounds.windows(2).any(|w| w[0] > w[1])
        || bounds[bounds.len() - 1] > rows
    {
        return Err(PyValueError::new_err(format!(
            "bounds must be non-decreasing row offsets within 0..={rows}, one more than the number of systems"
        )));
    }
    let g = bounds.len() - 1;
    let k: usize = xs.iter().map(|x| x.as_array().ncols()).sum();
    let (names, regs) = default_names(n, &xs);
    let yv: Vec<_> = ys.iter().map(|y| y.as_array()).collect();
    let xv: Vec<_> = xs.iter().map(|x| x.as_array()).collect();
    let systems = crate::batch::Stacked::new(yv, xv, bounds, names, regs);
    let stop = Interrupt::default();
    let flops = (g as f64) * (rows as f64 / g.max(1) as f64) * ((k + n) as f64).powi(2);
    let results = run_interruptible(py, flops, &stop, |cancel| {
        crate::batch::fit_batch(&systems, &opts, threads, cancel)
    });
    if results
        .iter()
        .any(|r| matches!(r, Err(SurError::Interrupted)))
    {
        return Err(stop.raise(py, SurError::Interrupted));
    }
    let mut coef = ndarray::Array2::<f64>::from_elem((g, k), f64::NAN);
    let mut se = ndarray::Array2::<f64>::from_elem((g, k), f64::NAN);
    let mut omega = ndarray::Array3::<f64>::from_elem((g, n, n), f64::NAN);
    let mut n_iter = vec![0usize; g];
    let mut converged = vec![false; g];
    let mut loglik = vec![f64::NAN; g];
    let errors = pyo3::types::PyList::empty(py);
    for (i, r) in results.into_iter().enumerate() {
        match r {
            Ok(f) => {
                coef.row_mut(i).assign(&f.coef);
                se.row_mut(i).assign(&f.se);
                omega.index_axis_mut(ndarray::Axis(0), i).assign(&f.omega);
                n_iter[i] = f.n_iter;
                converged[i] = f.converged;
                loglik[i] = f.loglik;
                errors.append(py.None())?;
            }
            Err(e) => errors.append((e.kind(), e.to_string()))?,
        }
    }
    let d = PyDict::new(py);
    d.set_item("coef", coef.into_pyarray(py))?;
    d.set_item("se", se.into_pyarray(py))?;
    d.set_item("omega", omega.into_pyarray(py))?;
    d.set_item("n_iter", n_iter)?;
    d.set_item("converged", converged)?;
    d.set_item("loglik", loglik)?;
    d.set_item("errors", errors)?;
    Ok(d)
}

/// Sets the number of threads blocksur's parallel steps may use (1 ..= 1024).
#[pyfunction]
fn set_threads(py: Python<'_>, n: usize) -> PyResult<()> {
    crate::runtime::set_threads(n).map_err(|e| raise(py, e))
}

/// The thread limit in force (`set_threads`, else RAYON_NUM_THREADS at first use, else the
/// cores this process may use).
#[pyfunction]
fn get_threads() -> usize {
    crate::runtime::get_threads()
}

/// How this extension computes: backend ("faer" or "lapack"), isa (the instruction set the
/// backend's kernels chose on this CPU), kernels_isa (that of blocksur's own vector kernels),
/// threads (the limit in force) and version (the crate's).
#[pyfunction]
fn build_info(py: Python<'_>) -> PyResult<Bound<'_, PyDict>> {
    let d = PyDict::new(py);
    d.set_item("backend", crate::kernels::backend_name())?;
    d.set_item("isa", crate::kernels::isa_name())?;
    d.set_item("kernels_isa", crate::kernels::kernels_isa_name())?;
    d.set_item("threads", crate::runtime::get_threads())?;
    d.set_item("version", env!("CARGO_PKG_VERSION"))?;
    Ok(d)
}

#[pymodule]
fn _core(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_function(wrap_pyfunction!(prepare, m)?)?;
    m.add_function(wrap_pyfunction!(fgls_from_data, m)?)?;
    m.add_function(wrap_pyfunction!(residuals, m)?)?;
    m.add_function(wrap_pyfunction!(pass1_chunk, m)?)?;
    m.add_function(wrap_pyfunction!(pass1_merge, m)?)?;
    m.add_function(wrap_pyfunction!(pass1_check, m)?)?;
    m.add_function(wrap_pyfunction!(pass2_chunk, m)?)?;
    m.add_function(wrap_pyfunction!(pass2_merge, m)?)?;
    m.add_function(wrap_pyfunction!(prepare_from_summaries, m)?)?;
    m.add_function(wrap_pyfunction!(fit_many, m)?)?;
    m.add_function(wrap_pyfunction!(row_chunk, m)?)?;
    m.add_function(wrap_pyfunction!(row_merge, m)?)?;
    m.add_function(wrap_pyfunction!(row_finish, m)?)?;
    m.add_function(wrap_pyfunction!(set_threads, m)?)?;
    m.add_function(wrap_pyfunction!(get_threads, m)?)?;
    m.add_function(wrap_pyfunction!(build_info, m)?)?;
    m.add_class::<PyPrepared>()?;
    m.add_class::<PyEstimate>()?;
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    Ok(())
}
