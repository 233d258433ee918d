//! Estimation after the data pass: OLS, two-step FGLS and iterated FGLS, all in the orthonormal
//! coordinates of `prepare`, at a cost that does not depend on T.
//!
//! Coefficients are carried as delta = gamma - z, the departure from OLS in the orthonormal basis.
//! GLS for a given Omega solves M delta = h with M_ij = sigma^{ij} Q_i'Q_j and
//! h_i = sum_j sigma^{ij} rho_j Q_i'q_j (equivalent to M gamma = c of the textbook form, since
//! c = M z + h), and b_i = R_i^-1 (z_i + delta_i).
//!
//! This module holds the options, the estimate, the fitting loop and the `Estimation` trait (the
//! methods a `Prepared` system offers for estimation); the steps live in the submodules:
//! `omega` (Omega from residual cross-products, its inverse, shrinkage, the likelihood), `gls`
//! (one GLS step and the weight matrix), `pcg` (the preconditioned conjugate-gradient solver),
//! `restrict` (linear restrictions), `covariance` (covariances and standard errors), `one_pass`
//! (two-step FGLS in one pass over the basis) and `matrix_free` (GLS without K x K matrices).

pub(crate) mod covariance;
pub(crate) mod gls;
pub(crate) mod matrix_free;
pub(crate) mod omega;
pub(crate) mod one_pass;
pub(crate) mod pcg;
pub(crate) mod restrict;
#[cfg(test)]
mod tests;

use ndarray::{Array1, Array2};

use crate::data::SystemData;
use crate::error::{Result, SurError};
use crate::prepare::{CrossProducts, Prepared};
use gls::{iterated_singular, StepWeight, PCG_MIN_K, PCG_REFACTOR};
pub use omega::ledoit_wolf;
pub use one_pass::fgls_from_data;
use restrict::RestrictedParts;
pub use restrict::Restrictions;

/// What a prepared system can estimate: the fits, their covariances and standard errors, the
/// likelihood. Implemented for `Prepared`; each method is one of this module's functions.
pub trait Estimation {
    /// Runs one estimation without restrictions.
    fn estimate(&self, opts: &FitOptions) -> Result<Estimate>;
    /// Runs one estimation, imposing R b = q when given.
    fn estimate_restricted(
        &self,
        opts: &FitOptions,
        restrictions: Option<&Restrictions>,
    ) -> Result<Estimate>;
    /// As `estimate_restricted`, asking `cancel` before each GLS step whether to stop (then it
    /// returns `SurError::Interrupted`). `data` (the system's rows) is needed by Ledoit-Wolf
    /// shrinkage on the direct path.
    fn estimate_with(
        &self,
        opts: &FitOptions,
        restrictions: Option<&Restrictions>,
        data: Option<&SystemData>,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<Estimate>;
    /// Checks that an estimate (and data, if given) belong to this prepared system.
    fn check_matches(&self, est: Option<&Estimate>, data: Option<&SystemData>) -> Result<()>;
    /// Omega from residual cross-products S with the divisor's rule (ML or degrees of freedom).
    fn omega_from(&self, s: &Array2<f64>, divisor: Divisor) -> Array2<f64>;
    /// Covariance of gamma (K x K) of the given kind. Robust kinds need the data.
    fn gamma_covariance(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array2<f64>>;
    /// Covariance of the coefficients b (K x K).
    fn coef_covariance_of(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array2<f64>>;
    /// Classical covariance of the coefficients b.
    fn coef_covariance(&self, est: &Estimate) -> Result<Array2<f64>>;
    /// Variances of the coefficients b, without the K x K covariance where the kind allows it.
    fn coef_variances(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array1<f64>>;
    /// Standard errors of the coefficients b.
    fn coef_standard_errors(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array1<f64>>;
    /// Variances of the predicted means x'b_i for new regressor rows (`xs[i]`: m x K_i).
    fn prediction_variances(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
        xs: &[ndarray::ArrayView2<f64>],
    ) -> Result<Vec<Array1<f64>>>;
    /// Gaussian log-likelihood at Omega = S/T (+inf when S/T is singular; None when `s` does
    /// not belong to this system).
    fn log_likelihood(&self, s: &Array2<f64>) -> Option<f64>;
    /// Matrix-free path: standard errors of the coefficients of the given equations.
    fn cg_standard_errors(
        &self,
        omega: &Array2<f64>,
        equations: &[usize],
        tol: f64,
        max_iter: usize,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<Vec<Array1<f64>>>;
}

impl Estimation for Prepared {
    fn estimate(&self, opts: &FitOptions) -> Result<Estimate> {
        fit(self, opts, None, None, &|| false)
    }
    fn estimate_restricted(
        &self,
        opts: &FitOptions,
        restrictions: Option<&Restrictions>,
    ) -> Result<Estimate> {
        fit(self, opts, restrictions, None, &|| false)
    }
    fn estimate_with(
        &self,
        opts: &FitOptions,
        restrictions: Option<&Restrictions>,
        data: Option<&SystemData>,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<Estimate> {
        fit(self, opts, restrictions, data, cancel)
    }
    fn check_matches(&self, est: Option<&Estimate>, data: Option<&SystemData>) -> Result<()> {
        check_matches(self, est, data)
    }
    fn omega_from(&self, s: &Array2<f64>, divisor: Divisor) -> Array2<f64> {
        omega::omega_from(self, s, divisor)
    }
    fn gamma_covariance(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array2<f64>> {
        covariance::gamma_covariance(self, est, kind, data)
    }
    fn coef_covariance_of(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array2<f64>> {
        covariance::coef_covariance_of(self, est, kind, data)
    }
    fn coef_covariance(&self, est: &Estimate) -> Result<Array2<f64>> {
        covariance::coef_covariance_of(self, est, CovKind::Classical, None)
    }
    fn coef_variances(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array1<f64>> {
        covariance::coef_variances(self, est, kind, data)
    }
    fn coef_standard_errors(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
    ) -> Result<Array1<f64>> {
        covariance::coef_standard_errors(self, est, kind, data)
    }
    fn prediction_variances(
        &self,
        est: &Estimate,
        kind: CovKind,
        data: Option<&SystemData>,
        xs: &[ndarray::ArrayView2<f64>],
    ) -> Result<Vec<Array1<f64>>> {
        covariance::prediction_variances(self, est, kind, data, xs)
    }
    fn log_likelihood(&self, s: &Array2<f64>) -> Option<f64> {
        omega::log_likelihood(self, s)
    }
    fn cg_standard_errors(
        &self,
        omega: &Array2<f64>,
        equations: &[usize],
        tol: f64,
        max_iter: usize,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<Vec<Array1<f64>>> {
        matrix_free::cg_standard_errors(self, omega, equations, tol, max_iter, cancel)
    }
}

/// The estimator.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    /// Equation-by-equation least squares.
    Ols,
    /// Two-step feasible GLS: Omega from the OLS residuals, then one GLS step.
    Fgls,
    /// Iterated FGLS: alternate Omega and GLS to a fixed point (the Gaussian ML estimator when
    /// the divisor is T).
    IteratedFgls,
}

impl Method {
    pub fn parse(s: &str) -> Result<Method> {
        match s {
            "ols" => Ok(Method::Ols),
            "fgls" => Ok(Method::Fgls),
            "ifgls" => Ok(Method::IteratedFgls),
            _ => Err(SurError::InvalidOption(format!(
                "unknown method '{s}': use 'ols', 'fgls' (two-step) or 'ifgls' (iterated)"
            ))),
        }
    }
    pub fn as_str(&self) -> &'static str {
        match self {
            Method::Ols => "ols",
            Method::Fgls => "fgls",
            Method::IteratedFgls => "ifgls",
        }
    }
}

/// How residual cross-products S become Omega.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Divisor {
    /// Omega = S / T (maximum likelihood).
    Ml,
    /// Omega_ij = S_ij / sqrt((T - K_i)(T - K_j)) (degrees-of-freedom corrected).
    Dof,
    /// Ledoit-Wolf shrinkage of S/T towards its diagonal.
    LedoitWolfDiagonal,
    /// Ledoit-Wolf shrinkage of S/T towards a scaled identity.
    LedoitWolfIdentity,
}

impl Divisor {
    pub fn parse(s: &str) -> Result<Divisor> {
        match s {
            "ml" => Ok(Divisor::Ml),
            "dof" => Ok(Divisor::Dof),
            "lw-diagonal" => Ok(Divisor::LedoitWolfDiagonal),
            "lw-identity" => Ok(Divisor::LedoitWolfIdentity),
            _ => Err(SurError::InvalidOption(format!(
                "unknown omega estimator '{s}': use 'ml' (divide by T), 'dof' (divide by \
                 sqrt((T-K_i)(T-K_j))), 'lw-diagonal' or 'lw-identity' (Ledoit-Wolf shrinkage)"
            ))),
        }
    }
    pub fn as_str(&self) -> &'static str {
        match self {
            Divisor::Ml => "ml",
            Divisor::Dof => "dof",
            Divisor::LedoitWolfDiagonal => "lw-diagonal",
            Divisor::LedoitWolfIdentity => "lw-identity",
        }
    }
}

/// Options of one fit.
#[derive(Debug, Clone, Copy)]
pub struct FitOptions {
    pub method: Method,
    pub divisor: Divisor,
    /// Iterated FGLS stops when the convergence criterion falls to or below this.
    pub tol: f64,
    /// Iterated FGLS stops after this many GLS steps, converged or not.
    pub max_iter: usize,
    /// Matrix-free path: conjugate gradients stop at this relative residual ...
    pub cg_tol: f64,
    /// ... or after this many iterations.
    pub cg_max_iter: usize,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            method: Method::Fgls,
            divisor: Divisor::Ml,
            tol: 1e-10,
            max_iter: 1000,
            cg_tol: 1e-10,
            cg_max_iter: 5000,
        }
    }
}

impl FitOptions {
    pub fn validate(&self) -> Result<()> {
        if !(self.tol.is_finite() && self.tol >= 0.0) {
            return Err(SurError::InvalidOption(format!(
                "tol must be a finite number >= 0, got {}",
                self.tol
            )));
        }
        if self.max_iter == 0 {
            return Err(SurError::InvalidOption(
                "max_iter must be at least 1".into(),
            ));
        }
        if !(self.cg_tol.is_finite() && self.cg_tol > 0.0) || self.cg_max_iter == 0 {
            return Err(SurError::InvalidOption(
                "cg_tol must be > 0 and cg_max_iter at least 1".into(),
            ));
        }
        Ok(())
    }
}

/// The weight matrix of the estimator in the orthonormal basis: the objective is
/// delta' W delta - 2 delta' h. OLS has W = I; GLS has W = M.
#[derive(Debug, Clone)]
pub(crate) enum Weight {
    Identity,
    /// Lower Cholesky factor of M.
    Chol(Array2<f64>),
    /// Shared regressors: M = Omega^-1 (x) I, so M^-1 = Omega (x) I (this Omega).
    Shared(Array2<f64>),
    /// Matrix-free: M is never formed.
    MatrixFree,
}

/// The result of one estimation.
#[derive(Debug, Clone)]
pub struct Estimate {
    pub method: Method,
    pub divisor: Divisor,
    /// Coefficients b, stacked by equation.
    pub coef: Array1<f64>,
    /// Coefficients in the orthonormal basis (gamma_i = R_i b_i).
    pub gamma: Array1<f64>,
    /// The Omega used in the final step (for OLS: from the OLS residuals).
    pub omega: Array2<f64>,
    /// Residual cross-products S at the final coefficients (see `resid_crossprod`).
    pub(crate) resid_cross: ResidCross,
    /// Number of GLS steps (0 for OLS).
    pub n_iter: usize,
    pub converged: bool,
    /// The convergence criterion after each GLS step of an iterated fit.
    pub criterion_path: Vec<f64>,
    /// Number of linearly independent restrictions imposed.
    pub n_restrictions: usize,
    /// Condition number estimate of the Omega of the final GLS step, in correlation form
    /// (NaN for OLS, which never inverts Omega).
    pub omega_cond: f64,
    /// Ledoit-Wolf intensity of the final Omega (None without shrinkage).
    pub shrinkage: Option<f64>,
    /// Matrix-free path: conjugate-gradient iterations of each GLS step, and the relative
    /// residual of the last solve (empty and NaN on the direct path).
    pub cg_iterations: Vec<usize>,
    pub cg_residual: f64,
    /// Direct path, iterated fit: the steps solved by conjugate gradients preconditioned with
    /// the previous factor, and their iteration counts (empty when every step was factored).
    pub warm_iterations: Vec<usize>,
    pub(crate) weight: Weight,
    pub(crate) restricted: Option<RestrictedParts>,
}

impl Estimate {
    /// Residual cross-products S at the final coefficients (N x N, symmetric).
    pub fn resid_crossprod(&self) -> &Array2<f64> {
        self.resid_cross.get()
    }
}

/// The residual cross-products S of an estimate: given, or formed from its residuals (T x N,
/// column-major) on first use. The one-pass FGLS route ends with its residuals in hand, and S
/// from them is a T N^2 / 2 product (22 ms at N = 1000, T = 2000) that a fit read only for its
/// coefficients and standard errors never needs.
#[derive(Debug)]
pub(crate) struct ResidCross {
    s: std::sync::OnceLock<Array2<f64>>,
    /// The residuals S is formed from, until it is.
    pending: std::sync::Mutex<Option<Array2<f64>>>,
}

impl ResidCross {
    pub(crate) fn given(s: Array2<f64>) -> ResidCross {
        ResidCross {
            s: std::sync::OnceLock::from(s),
            pending: std::sync::Mutex::new(None),
        }
    }

    pub(crate) fn from_residuals(e: Array2<f64>) -> ResidCross {
        ResidCross {
            s: std::sync::OnceLock::new(),
            pending: std::sync::Mutex::new(Some(e)),
        }
    }

    fn get(&self) -> &Array2<f64> {
        self.s.get_or_init(|| {
            let e = self
                .pending
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .take();
            let e = e.expect("residual cross-products: neither given nor their residuals kept");
            // symmetric (mirrored) and column-major: its transpose is itself, in row-major order
            crate::kernels::gram(e.view()).reversed_axes()
        })
    }
}

impl Clone for ResidCross {
    fn clone(&self) -> ResidCross {
        let pending = self
            .pending
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .clone();
        ResidCross {
            s: self.s.clone(),
            pending: std::sync::Mutex::new(pending),
        }
    }
}

/// Which covariance of the coefficients.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CovKind {
    /// The model-based covariance: M^-1 for GLS, omega_ij (X_i'X_i)^-1 X_i'X_j (X_j'X_j)^-1 for OLS.
    Classical,
    /// Heteroskedasticity-robust sandwich (White 1980, for systems).
    Hc0,
    /// HC0 scaled by T / (T - K/N), which is n / (n - k) for a single equation.
    Hc1,
}

impl CovKind {
    pub fn parse(s: &str) -> Result<CovKind> {
        match s {
            "classical" => Ok(CovKind::Classical),
            "hc0" => Ok(CovKind::Hc0),
            "hc1" => Ok(CovKind::Hc1),
            _ => Err(SurError::InvalidOption(format!(
                "unknown covariance '{s}': use 'classical', 'hc0' or 'hc1'"
            ))),
        }
    }
}

pub(crate) fn needs_full_preparation(what: &str) -> SurError {
    SurError::InvalidOption(format!(
        "{what} need(s) the full cross-products of the regressors, which a two-step FGLS fit \
         computed from the data does not keep: prepare the system again (Prepared::new)"
    ))
}

pub(crate) fn matrix_free_unsupported(what: &str) -> SurError {
    SurError::InvalidOption(format!(
        "{what} is not available on the matrix-free (conjugate-gradient) path, which never forms \
         K x K matrices; use the direct solver (raise the memory limit) or, for standard errors, \
         the per-equation conjugate-gradient standard errors"
    ))
}

/// As `estimate_restricted`, asking `cancel` before each GLS step whether to stop (then it
/// returns `SurError::Interrupted`). `data` (the system's rows) is needed by Ledoit-Wolf
/// shrinkage on the direct path.
pub(crate) fn fit(
    prep: &Prepared,
    opts: &FitOptions,
    restrictions: Option<&Restrictions>,
    data: Option<&SystemData>,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<Estimate> {
    opts.validate()?;
    check_matches(prep, None, data)?;
    if matches!(prep.cross, CrossProducts::ResidualsOnly { .. })
        && (opts.method != Method::Ols || restrictions.is_some())
    {
        return Err(needs_full_preparation("GLS steps and restrictions"));
    }
    let k = prep.n_coef();
    let z = prep.z();
    let constraint = match restrictions {
        None => None,
        Some(_) if matches!(prep.cross, CrossProducts::MatrixFree { .. }) => {
            return Err(matrix_free_unsupported("restrictions"))
        }
        Some(rs) => {
            rs.validate(k)?;
            let rs = rs.normalized();
            let space = restrict::null_space(prep, &rs)?;
            Some((space, rs))
        }
    };
    let impose =
        |delta: Array1<f64>, w: &Weight| -> Result<(Array1<f64>, Option<RestrictedParts>)> {
            match &constraint {
                None => Ok((delta, None)),
                Some((space, _)) => {
                    restrict::restrict(prep, &delta, w, space).map(|(d, p)| (d, Some(p)))
                }
            }
        };
    let (mut delta, mut restricted) = impose(Array1::zeros(k), &Weight::Identity)?;
    let mut weight = Weight::Identity;
    let mut pending: Option<Array2<f64>> = None;
    let mut warm_iterations = Vec::new();
    let mut s = prep.residual_crossprod(&delta);
    let mut oest = omega::omega_at(prep, &delta, &s, opts.divisor, data)?;
    let mut n_iter = 0;
    let mut converged = true;
    let mut path = Vec::new();
    let mut omega_cond = f64::NAN;
    let mut cg_iterations = Vec::new();
    let mut cg_residual = f64::NAN;
    if opts.method != Method::Ols {
        let max_iter = if opts.method == Method::Fgls {
            1
        } else {
            opts.max_iter
        };
        converged = opts.method == Method::Fgls;
        // Steps after the first of an unrestricted iterated fit solve with conjugate
        // gradients preconditioned by the last Cholesky factor (the GLS matrix changes
        // little from step to step); the final step's matrix is factored at the end.
        let warm_allowed =
            opts.method == Method::IteratedFgls && constraint.is_none() && k >= PCG_MIN_K;
        let mut refactor = false;
        while n_iter < max_iter {
            if cancel() {
                return Err(SurError::Interrupted);
            }
            let warm = match (&weight, warm_allowed && !refactor) {
                (Weight::Chol(l), true) => Some(l),
                _ => None,
            };
            let (unrestricted, sw, cond, cg) =
                gls::gls_step(prep, &oest, &delta, opts, cancel, warm, pending.take()).map_err(
                    |e| {
                        if n_iter > 0 {
                            iterated_singular(e, n_iter)
                        } else {
                            e
                        }
                    },
                )?;
            omega_cond = cond;
            if let Some((its, res)) = cg {
                cg_iterations.push(its);
                cg_residual = res;
            }
            let new_delta = match sw {
                StepWeight::Done(w) => {
                    let (d, parts) = impose(unrestricted, &w)?;
                    weight = w;
                    restricted = parts;
                    pending = None;
                    refactor = false;
                    d
                }
                StepWeight::Pending { m, iterations } => {
                    // `weight` keeps the factor that preconditioned this step
                    warm_iterations.push(iterations);
                    pending = Some(m);
                    refactor = iterations > PCG_REFACTOR;
                    unrestricted
                }
            };
            n_iter += 1;
            let crit = gls::criterion(prep, &z, &delta, &new_delta);
            if !crit.is_finite() {
                return Err(SurError::numerical(
                    "iterated FGLS",
                    "the coefficients became non-finite",
                ));
            }
            delta = new_delta;
            s = prep.residual_crossprod(&delta);
            if opts.method == Method::Fgls {
                break;
            }
            path.push(crit);
            if crit <= opts.tol {
                converged = true;
                break;
            }
            if n_iter < max_iter {
                oest = omega::omega_at(prep, &delta, &s, opts.divisor, data)
                    .map_err(|e| iterated_singular(e, n_iter))?;
            }
        }
    }
    if let Some(m) = pending.take() {
        weight = Weight::Chol(gls::factor_gls(prep, m, true)?);
    }
    // a final step whose conjugate gradients stopped at cg_max_iter short of cg_tol is
    // not a converged fit
    if cg_residual > opts.cg_tol {
        converged = false;
    }
    let omega::OmegaEst {
        omega, shrinkage, ..
    } = oest;
    let gamma = &z + &delta;
    // restricted: b = b0 + N theta directly, so R b = q holds to the rounding of b itself
    // (the back substitution from gamma would add the conditioning of X_i to the gap)
    let coef = match &restricted {
        Some(p) => &p.space.b0 + &p.space.n.dot(&p.theta),
        None => prep.coef_from_gamma(&gamma)?,
    };
    if let Some((_, rs)) = &constraint {
        rs.check_satisfied(&coef, &prep.coef_scales())?;
    }
    Ok(Estimate {
        method: opts.method,
        divisor: opts.divisor,
        coef,
        gamma,
        omega,
        resid_cross: ResidCross::given(s),
        n_iter,
        converged,
        criterion_path: path,
        n_restrictions: restrictions.map_or(0, |r| r.r.nrows()),
        omega_cond,
        shrinkage,
        cg_iterations,
        cg_residual,
        warm_iterations,
        weight,
        restricted,
    })
}

/// Checks that an estimate (and data, if given) belong to this prepared system.
pub(crate) fn check_matches(
    prep: &Prepared,
    est: Option<&Estimate>,
    data: Option<&SystemData>,
) -> Result<()> {
    let n = prep.n_eq();
    let bad =
        |what: &str| SurError::InvalidOption(format!("{what} does not belong to this system"));
    if let Some(est) = est {
        if est.coef.len() != prep.n_coef() || est.omega.dim() != (n, n) {
            return Err(bad("the estimate"));
        }
    }
    if let Some(data) = data {
        if data.n_eq() != n
            || data.equations.iter().enumerate().any(|(i, e)| {
                e.y.len() != prep.n_obs || e.x.nrows() != prep.n_obs || e.x.ncols() != prep.k(i)
            })
        {
            return Err(bad("the data"));
        }
    }
    Ok(())
}
