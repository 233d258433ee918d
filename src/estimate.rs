//! Estimation after the data pass: OLS, two-step FGLS and iterated FGLS, all in the orthonormal
//! coordinates of `prepare`, at a cost that does not depend on T.
//!
//! Coefficients are carried as delta = gamma - z, the departure from OLS in the orthonormal basis.
//! GLS for a given Omega solves M delta = h with M_ij = sigma^{ij} Q_i'Q_j and
//! h_i = sum_j sigma^{ij} rho_j Q_i'q_j (equivalent to M gamma = c of the textbook form, since
//! c = M z + h), and b_i = R_i^-1 (z_i + delta_i).

use ndarray::{s, Array1, Array2, ShapeBuilder};

use crate::error::{Result, SurError};
use crate::linalg::{chol_inverse, chol_lower, chol_solve, invert_omega, ln_det_spd, symmetrize, upper_inverse};
use crate::prepare::{CrossProducts, Prepared};

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
}

impl Divisor {
    pub fn parse(s: &str) -> Result<Divisor> {
        match s {
            "ml" => Ok(Divisor::Ml),
            "dof" => Ok(Divisor::Dof),
            _ => Err(SurError::InvalidOption(format!(
                "unknown omega divisor '{s}': use 'ml' (divide by T) or 'dof' (divide by sqrt((T-K_i)(T-K_j)))"
            ))),
        }
    }
    pub fn as_str(&self) -> &'static str {
        match self {
            Divisor::Ml => "ml",
            Divisor::Dof => "dof",
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
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions { method: Method::Fgls, divisor: Divisor::Ml, tol: 1e-10, max_iter: 1000 }
    }
}

impl FitOptions {
    pub fn validate(&self) -> Result<()> {
        if !(self.tol.is_finite() && self.tol >= 0.0) {
            return Err(SurError::InvalidOption(format!("tol must be a finite number >= 0, got {}", self.tol)));
        }
        if self.max_iter == 0 {
            return Err(SurError::InvalidOption("max_iter must be at least 1".into()));
        }
        Ok(())
    }
}

/// What the classical covariance of gamma is made of.
#[derive(Debug, Clone)]
enum CovSource {
    /// OLS: Cov(gamma_i, gamma_j) = omega_ij Q_i'Q_j.
    Ols,
    /// GLS: Cov(gamma) = M^-1, from the lower Cholesky factor of M.
    Gls { chol: Array2<f64> },
    /// GLS with shared regressors: M^-1 = Omega (x) I.
    SharedGls,
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
    /// Residual cross-products S at the final coefficients.
    pub resid_crossprod: Array2<f64>,
    /// Number of GLS steps (0 for OLS).
    pub n_iter: usize,
    pub converged: bool,
    /// The convergence criterion after each GLS step of an iterated fit.
    pub criterion_path: Vec<f64>,
    cov: CovSource,
}

impl Prepared {
    /// Residual cross-products S (N x N) at delta = gamma - z.
    pub fn residual_crossprod(&self, delta: &Array1<f64>) -> Array2<f64> {
        let n = self.n_eq();
        let k = self.n_coef();
        let rho: Vec<f64> = self.factors.iter().map(|f| f.rho).collect();
        let mut out = Array2::<f64>::zeros((n, n));
        match &self.cross {
            CrossProducts::SharedRegressors { qq } => {
                for i in 0..n {
                    let di = delta.slice(s![self.offsets[i]..self.offsets[i + 1]]);
                    for j in 0..=i {
                        let dj = delta.slice(s![self.offsets[j]..self.offsets[j + 1]]);
                        out[[i, j]] = rho[i] * rho[j] * qq[[i, j]] + di.dot(&dj);
                    }
                }
            }
            CrossProducts::General { gram } => {
                // Column j of G A, where A (P x N) holds -delta_j in the rows of Q_j and rho_j in row K + j.
                for j in 0..n {
                    let (a, b) = (self.offsets[j], self.offsets[j + 1]);
                    let dj = delta.slice(s![a..b]);
                    let mut ga = gram.slice(s![.., a..b]).dot(&dj);
                    ga.mapv_inplace(|v| -v);
                    ga.scaled_add(rho[j], &gram.column(k + j));
                    for i in j..n {
                        let (c, d) = (self.offsets[i], self.offsets[i + 1]);
                        out[[i, j]] = -delta.slice(s![c..d]).dot(&ga.slice(s![c..d])) + rho[i] * ga[k + i];
                    }
                }
            }
        }
        for i in 0..n {
            for j in (i + 1)..n {
                out[[i, j]] = out[[j, i]];
            }
        }
        out
    }

    /// Omega from residual cross-products.
    pub fn omega_from(&self, s: &Array2<f64>, divisor: Divisor) -> Array2<f64> {
        let t = self.n_obs as f64;
        match divisor {
            Divisor::Ml => s / t,
            Divisor::Dof => {
                let df: Vec<f64> = (0..self.n_eq()).map(|i| t - self.k(i) as f64).collect();
                Array2::from_shape_fn(s.dim(), |(i, j)| s[[i, j]] / (df[i] * df[j]).sqrt())
            }
        }
    }

    /// One GLS step for a given Omega^-1: delta and the Cholesky factor of M (None when the
    /// regressors are shared, where GLS equals OLS and M^-1 = Omega (x) I).
    fn gls_step(&self, sigma_inv: &Array2<f64>) -> Result<(Array1<f64>, Option<Array2<f64>>)> {
        let n = self.n_eq();
        let k = self.n_coef();
        let gram = match &self.cross {
            CrossProducts::SharedRegressors { .. } => return Ok((Array1::zeros(k), None)),
            CrossProducts::General { gram } => gram,
        };
        let rho = Array1::from_iter(self.factors.iter().map(|f| f.rho));
        let mut m = Array2::<f64>::zeros((k, k).f());
        let mut h = Array1::<f64>::zeros(k);
        for i in 0..n {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            // h_i = Q_i'q . (sigma^{i.} * rho)
            let w = &sigma_inv.row(i) * &rho;
            h.slice_mut(s![a..b]).assign(&gram.slice(s![a..b, k..k + n]).dot(&w));
            for j in 0..=i {
                let (c, d) = (self.offsets[j], self.offsets[j + 1]);
                let sij = sigma_inv[[i, j]];
                let mut blk = m.slice_mut(s![a..b, c..d]);
                blk.assign(&gram.slice(s![a..b, c..d]));
                blk *= sij;
            }
        }
        let chol = chol_lower(m).ok_or_else(|| {
            SurError::numerical("Cholesky factorisation of the GLS normal matrix", "not positive definite")
        })?;
        let delta = chol_solve(&chol, &h)?;
        Ok((delta, Some(chol)))
    }

    /// Runs one estimation.
    pub fn estimate(&self, opts: &FitOptions) -> Result<Estimate> {
        opts.validate()?;
        let k = self.n_coef();
        let z = self.z();
        let mut delta = Array1::<f64>::zeros(k);
        let mut s = self.residual_crossprod(&delta);
        let mut omega = self.omega_from(&s, opts.divisor);
        let mut n_iter = 0;
        let mut converged = true;
        let mut path = Vec::new();
        let mut cov = CovSource::Ols;
        if opts.method != Method::Ols {
            let max_iter = if opts.method == Method::Fgls { 1 } else { opts.max_iter };
            converged = opts.method == Method::Fgls;
            while n_iter < max_iter {
                let sigma_inv = invert_omega(&omega, &self.names, self.n_obs)?;
                let (new_delta, chol) = self.gls_step(&sigma_inv)?;
                n_iter += 1;
                cov = match chol {
                    Some(c) => CovSource::Gls { chol: c },
                    None => CovSource::SharedGls,
                };
                let crit = self.criterion(&z, &delta, &new_delta);
                if !crit.is_finite() {
                    return Err(SurError::numerical("iterated FGLS", "the coefficients became non-finite"));
                }
                delta = new_delta;
                s = self.residual_crossprod(&delta);
                if opts.method == Method::Fgls {
                    break;
                }
                path.push(crit);
                if crit <= opts.tol {
                    converged = true;
                    break;
                }
                if n_iter < max_iter {
                    omega = self.omega_from(&s, opts.divisor);
                }
            }
        }
        let gamma = &z + &delta;
        let coef = self.coef_from_gamma(&gamma)?;
        Ok(Estimate {
            method: opts.method,
            divisor: opts.divisor,
            coef,
            gamma,
            omega,
            resid_crossprod: s,
            n_iter,
            converged,
            criterion_path: path,
            cov,
        })
    }

    /// Largest relative change of an equation's coefficients in the orthonormal basis, which is
    /// the relative change of its fitted values: ||gamma_i(new) - gamma_i(old)|| / ||gamma_i(new)||.
    fn criterion(&self, z: &Array1<f64>, old: &Array1<f64>, new: &Array1<f64>) -> f64 {
        let mut worst = 0.0f64;
        for i in 0..self.n_eq() {
            let r = s![self.offsets[i]..self.offsets[i + 1]];
            let change = (&new.slice(r) - &old.slice(r)).mapv(|v| v * v).sum().sqrt();
            let size = (&z.slice(r) + &new.slice(r)).mapv(|v| v * v).sum().sqrt();
            let denom = size.max(self.factors[i].rho * f64::EPSILON).max(f64::MIN_POSITIVE);
            worst = worst.max(change / denom);
        }
        worst
    }

    /// Classical covariance of gamma (K x K).
    fn gamma_covariance(&self, est: &Estimate) -> Result<Array2<f64>> {
        let k = self.n_coef();
        let n = self.n_eq();
        let mut v = Array2::<f64>::zeros((k, k));
        match (&est.cov, &self.cross) {
            (CovSource::Gls { chol }, _) => {
                v = chol_inverse(chol)?;
            }
            (CovSource::SharedGls, _) | (CovSource::Ols, CrossProducts::SharedRegressors { .. }) => {
                for i in 0..n {
                    for j in 0..n {
                        let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                        let (c, d) = (self.offsets[j], self.offsets[j + 1]);
                        let mut blk = v.slice_mut(s![a..b, c..d]);
                        blk.diag_mut().fill(est.omega[[i, j]]);
                    }
                }
            }
            (CovSource::Ols, CrossProducts::General { gram }) => {
                for i in 0..n {
                    for j in 0..n {
                        let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                        let (c, d) = (self.offsets[j], self.offsets[j + 1]);
                        let mut blk = v.slice_mut(s![a..b, c..d]);
                        blk.assign(&gram.slice(s![a..b, c..d]));
                        blk *= est.omega[[i, j]];
                    }
                }
            }
        }
        Ok(v)
    }

    /// Classical covariance of the coefficients b (K x K): blockdiag(R_i^-1) Cov(gamma) blockdiag(R_i^-T).
    pub fn coef_covariance(&self, est: &Estimate) -> Result<Array2<f64>> {
        let v = self.gamma_covariance(est)?;
        let rinv: Vec<Array2<f64>> = self.factors.iter().map(|f| upper_inverse(&f.r)).collect::<Result<_>>()?;
        let left = self.block_left_multiply(&rinv, &v);
        let mut out = self.block_left_multiply(&rinv, &left.t().to_owned());
        symmetrize(&mut out);
        Ok(out)
    }

    fn block_left_multiply(&self, blocks: &[Array2<f64>], v: &Array2<f64>) -> Array2<f64> {
        let mut out = Array2::<f64>::zeros(v.dim());
        for (i, bi) in blocks.iter().enumerate() {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            out.slice_mut(s![a..b, ..]).assign(&bi.dot(&v.slice(s![a..b, ..])));
        }
        out
    }

    /// Gaussian log-likelihood at Omega = S/T: -(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T).
    /// None when S/T is singular (an equation that fits exactly).
    pub fn log_likelihood(&self, s: &Array2<f64>) -> Option<f64> {
        let t = self.n_obs as f64;
        let n = self.n_eq() as f64;
        let ld = ln_det_spd(&(s / t))?;
        Some(-0.5 * n * t * (1.0 + (2.0 * std::f64::consts::PI).ln()) - 0.5 * t * ld)
    }
}

