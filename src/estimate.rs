//! Estimation after the data pass: OLS, two-step FGLS and iterated FGLS, all in the orthonormal
//! coordinates of `prepare`, at a cost that does not depend on T.
//!
//! Coefficients are carried as delta = gamma - z, the departure from OLS in the orthonormal basis.
//! GLS for a given Omega solves M delta = h with M_ij = sigma^{ij} Q_i'Q_j and
//! h_i = sum_j sigma^{ij} rho_j Q_i'q_j (equivalent to M gamma = c of the textbook form, since
//! c = M z + h), and b_i = R_i^-1 (z_i + delta_i).

use ndarray::{s, Array1, Array2, ShapeBuilder};

use crate::error::{Result, SurError};
use crate::linalg::{chol_inverse, chol_lower, chol_solve, gram, invert_omega, ln_det_spd, symmetrize, upper_inverse};
use crate::packed::{PackedLower, Segment};
use crate::prepare::{CrossProducts, Prepared};
use crate::cg::{ledoit_wolf, OmegaOp};
use crate::system::SystemData;

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
        FitOptions { method: Method::Fgls, divisor: Divisor::Ml, tol: 1e-10, max_iter: 1000, cg_tol: 1e-10, cg_max_iter: 5000 }
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
        if !(self.cg_tol.is_finite() && self.cg_tol > 0.0) || self.cg_max_iter == 0 {
            return Err(SurError::InvalidOption("cg_tol must be > 0 and cg_max_iter at least 1".into()));
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
    /// The same in packed storage (half the memory): the one-pass FGLS route's.
    Packed(PackedLower),
    /// Shared regressors: M = Omega^-1 (x) I, so M^-1 = Omega (x) I (this Omega).
    Shared(Array2<f64>),
    /// Matrix-free: M is never formed.
    MatrixFree,
}

impl Estimate {
    /// Residual cross-products S at the final coefficients (N x N, symmetric).
    pub fn resid_crossprod(&self) -> &Array2<f64> {
        self.resid_cross.get()
    }
}

/// Linear restrictions R b = q on the stacked coefficients.
#[derive(Debug, Clone)]
pub struct Restrictions {
    pub r: Array2<f64>,
    pub q: Array1<f64>,
}

/// Restrictions solved in the coordinates of b, where they are stated and well scaled:
/// b = b0 + N theta with R b0 = q (minimum norm) and N an orthonormal basis of the null space of
/// R. In the orthonormal basis gamma = blockdiag(R_i) b, so delta = d0 + G theta with
/// G = blockdiag(R_i) N and d0 = blockdiag(R_i) b0 - z.
#[derive(Debug, Clone)]
struct NullSpace {
    r: Array2<f64>,
    b0: Array1<f64>,
    n: Array2<f64>,
    g: Array2<f64>,
    d0: Array1<f64>,
}

/// The pieces of a restricted fit: the null space and, from its last step, the QR factors of
/// F = L'G (W = L L'; F = G when W = I): R_F^-1 (p x p) and Q_F (K x p).
#[derive(Debug, Clone)]
struct RestrictedParts {
    space: NullSpace,
    theta: Array1<f64>,
    rf_inv: Array2<f64>,
    qf: Array2<f64>,
}

/// The residual cross-products S of an estimate: given, or formed from its residuals (T x N,
/// column-major) on first use. The one-pass FGLS route ends with its residuals in hand, and S
/// from them is a T N^2 / 2 product (22 ms at N = 1000, T = 2000) that a fit read only for its
/// coefficients and standard errors never needs.
#[derive(Debug)]
struct ResidCross {
    s: std::sync::OnceLock<Array2<f64>>,
    /// The residuals S is formed from, until it is.
    pending: std::sync::Mutex<Option<Array2<f64>>>,
}

impl ResidCross {
    fn given(s: Array2<f64>) -> ResidCross {
        ResidCross { s: std::sync::OnceLock::from(s), pending: std::sync::Mutex::new(None) }
    }

    fn from_residuals(e: Array2<f64>) -> ResidCross {
        ResidCross { s: std::sync::OnceLock::new(), pending: std::sync::Mutex::new(Some(e)) }
    }

    fn get(&self) -> &Array2<f64> {
        self.s.get_or_init(|| {
            let e = self.pending.lock().unwrap_or_else(|p| p.into_inner()).take();
            let e = e.expect("residual cross-products: neither given nor their residuals kept");
            // symmetric (mirrored) and column-major: its transpose is itself, in row-major order
            match crate::linalg::gram_blocked(e.view(), &|| false) {
                Ok(g) => g.reversed_axes(),
                // (only an interruption, which `|| false` never asks for)
                Err(_) => e.t().dot(&e),
            }
        })
    }
}

impl Clone for ResidCross {
    fn clone(&self) -> ResidCross {
        let pending = self.pending.lock().unwrap_or_else(|p| p.into_inner()).clone();
        ResidCross { s: self.s.clone(), pending: std::sync::Mutex::new(pending) }
    }
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
    resid_cross: ResidCross,
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
    weight: Weight,
    restricted: Option<RestrictedParts>,
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

impl Prepared {
    /// Residual cross-products S (N x N) at delta = gamma - z.
    pub fn residual_crossprod(&self, delta: &Array1<f64>) -> Array2<f64> {
        let n = self.n_eq();
        let k = self.n_coef();
        let rho: Vec<f64> = self.factors.iter().map(|f| f.rho).collect();
        let mut out = crate::linalg::zeros_advised((n, n));
        match &self.cross {
            CrossProducts::MatrixFree { .. } => return self.crossprod_w(delta),
            CrossProducts::ResidualsOnly { qq } => {
                // `estimate_with` lets only OLS (delta = 0) run on these cross-products
                assert!(delta.iter().all(|v| *v == 0.0), "residual cross-products away from OLS need the Gram matrix");
                for i in 0..n {
                    for j in 0..=i {
                        out[[i, j]] = rho[i] * rho[j] * qq[[i, j]];
                    }
                }
            }
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
                // Column j of G A, where A (P x N) holds -delta_j in the rows of Q_j and rho_j
                // in row K + j, from the contiguous columns of the column-major G (a BLAS dgemv
                // per equation woke OpenBLAS's pool N times per IFGLS step). Every path builds
                // G column-major; a copy serves otherwise.
                let p = gram.nrows();
                let copy;
                let g = match gram.as_slice_memory_order().filter(|_| gram.t().is_standard_layout()) {
                    Some(g) => g,
                    None => {
                        copy = crate::linalg::to_fortran(gram);
                        copy.as_slice_memory_order().expect("column-major copy")
                    }
                };
                let dl: std::borrow::Cow<[f64]> = delta.as_slice().map_or_else(|| delta.to_vec().into(), Into::into);
                let ols = dl.iter().all(|v| *v == 0.0);
                let mut scratch = vec![0.0; p];
                for j in 0..n {
                    let (a, b) = (self.offsets[j], self.offsets[j + 1]);
                    if ols {
                        // OLS residuals: S_ij = rho_i rho_j q_i'q_j, the y block of G alone
                        for i in j..n {
                            out[[i, j]] = rho[i] * (rho[j] * g[(k + j) * p + k + i]);
                        }
                        continue;
                    }
                    // Rows a.. of the column only (the pairs i >= j read no others): half the
                    // reads of G, and none of Q_j's columns where delta_j = 0.
                    let ga = &mut scratch[a..];
                    for (o, v) in ga.iter_mut().zip(&g[(k + j) * p + a..(k + j + 1) * p]) {
                        *o = rho[j] * v;
                    }
                    let d = &dl[a..b];
                    if d.iter().any(|v| *v != 0.0) {
                        crate::linalg::sub_combination_with(ga, d, |c| &g[(a + c) * p + a..(a + c + 1) * p]);
                    }
                    // plain slices: an ndarray view per (i, j) pair cost more than its few products
                    for i in j..n {
                        let (c, e) = (self.offsets[i], self.offsets[i + 1]);
                        let q: f64 = dl[c..e].iter().zip(&ga[c - a..e - a]).map(|(x, y)| x * y).sum();
                        out[[i, j]] = -q + rho[i] * ga[k + i - a];
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

    /// A natural size for each coefficient: |OLS estimate| + rho_i / ||x_j|| (the change in
    /// b_j that moves the fit by the residual's own size).
    pub fn coef_scales(&self) -> Vec<f64> {
        let mut out = Vec::with_capacity(self.n_coef());
        let b = self.coef_from_gamma(&self.z()).unwrap_or_else(|_| Array1::zeros(self.n_coef()));
        for (i, f) in self.factors.iter().enumerate() {
            for j in 0..self.k(i) {
                let cn = f.r.column(j).dot(&f.r.column(j)).sqrt();
                out.push(b[self.offsets[i] + j].abs() + if cn > 0.0 { f.rho / cn } else { 0.0 });
            }
        }
        out
    }

    /// Residual cross-products of equation-by-equation OLS (no restrictions).
    pub fn ols_crossprod(&self) -> Array2<f64> {
        self.residual_crossprod(&Array1::zeros(self.n_coef()))
    }

    /// Omega from residual cross-products (the shrinkage estimators start from S/T and need
    /// the residual rows as well: see `omega_at`).
    pub fn omega_from(&self, s: &Array2<f64>, divisor: Divisor) -> Array2<f64> {
        let t = self.n_obs as f64;
        let mut out = crate::linalg::zeros_advised(s.dim());
        match divisor {
            Divisor::Ml | Divisor::LedoitWolfDiagonal | Divisor::LedoitWolfIdentity => out.zip_mut_with(s, |o, &v| *o = v / t),
            Divisor::Dof => {
                let df: Vec<f64> = (0..self.n_eq()).map(|i| t - self.k(i) as f64).collect();
                ndarray::Zip::indexed(&mut out).and(s).for_each(|(i, j), o, &v| *o = v / (df[i] * df[j]).sqrt());
            }
        }
        out
    }

    /// Omega at delta (with S = its residual cross-products) for the chosen estimator.
    /// Shrinkage needs the residual rows: from W on the matrix-free path, else from `data`.
    fn omega_at(&self, delta: &Array1<f64>, s: &Array2<f64>, divisor: Divisor, data: Option<&SystemData>) -> Result<OmegaEst> {
        let identity = match divisor {
            Divisor::Ml | Divisor::Dof => {
                return Ok(OmegaEst { omega: self.omega_from(s, divisor), shrinkage: None, low_rank: None })
            }
            Divisor::LedoitWolfIdentity => true,
            Divisor::LedoitWolfDiagonal => false,
        };
        let rows = match &self.cross {
            CrossProducts::MatrixFree { .. } => self.residual_rows_w(delta),
            _ => {
                let data = data.ok_or_else(|| {
                    SurError::InvalidOption("Ledoit-Wolf shrinkage needs the data (the residual rows)".into())
                })?;
                let coef = self.coef_from_gamma(&(&self.z() + delta))?;
                data.residuals(coef.as_slice().expect("contiguous"))
            }
        };
        let (omega, lambda, target) = ledoit_wolf(&rows, s, identity);
        let t = self.n_obs as f64;
        let low_rank = matches!(self.cross, CrossProducts::MatrixFree { .. })
            .then(|| (target.mapv(|v| v * lambda), (1.0 - lambda) / t, rows));
        Ok(OmegaEst { omega, shrinkage: Some(lambda), low_rank })
    }

    /// One GLS step for a given Omega: the unrestricted delta, the weight, the condition
    /// estimate of Omega, and (matrix-free) the CG iterations and residual.
    fn gls_step(
        &self,
        est: &OmegaEst,
        start: &Array1<f64>,
        opts: &FitOptions,
        cancel: &(dyn Fn() -> bool + Sync),
        warm: Option<&Array2<f64>>,
        reuse: Option<Array2<f64>>,
    ) -> Result<GlsStep> {
        let n = self.n_eq();
        let k = self.n_coef();
        let omega = &est.omega;
        if let CrossProducts::MatrixFree { .. } = &self.cross {
            let lr = est.low_rank.as_ref().map(|(d, c, e)| (d, *c, e));
            let (op, cond) = OmegaOp::new(self, omega, lr)?;
            let (delta, its, res) = self.cg_solve(&op, start, opts.cg_tol, opts.cg_max_iter, cancel)?;
            return Ok((delta, StepWeight::Done(Weight::MatrixFree), cond, Some((its, res))));
        }
        let (sigma_inv, cond) = invert_omega(omega, &self.names, self.n_obs, &self.y_scales())?;
        let gram = match &self.cross {
            CrossProducts::SharedRegressors { .. } => {
                return Ok((Array1::zeros(k), StepWeight::Done(Weight::Shared(omega.clone())), cond, None))
            }
            CrossProducts::General { gram } => gram,
            CrossProducts::MatrixFree { .. } => unreachable!(),
            CrossProducts::ResidualsOnly { .. } => return Err(needs_full_preparation("a GLS step")),
        };
        let rho = Array1::from_iter(self.factors.iter().map(|f| f.rho));
        let eq_of: Vec<usize> = (0..n).flat_map(|i| std::iter::repeat_n(i, self.k(i))).collect();
        // M = C o sigma^{eq(a) eq(b)}, lower triangle only (potrf reads no more), column by column
        // on the contiguous columns of the column-major Gram matrix.
        let p = gram.nrows();
        let gbuf = gram.as_slice_memory_order().filter(|_| gram.t().is_standard_layout());
        // every entry the step reads (the lower triangle) is written below, so the last step's
        // matrix can be overwritten: no fresh K x K buffer to fault in and zero at each step
        // (128 MB on a 4000-coefficient system)
        let mut m = match reuse {
            Some(b) if b.dim() == (k, k) && b.t().is_standard_layout() => b,
            _ => crate::linalg::zeros_for_product(k),
        };
        {
            let mbuf = m.as_slice_memory_order_mut().expect("fresh column-major array");
            for j in 0..k {
                let ej = eq_of[j];
                let sig = sigma_inv.column(ej);
                let mcol = &mut mbuf[j * k..(j + 1) * k];
                match gbuf {
                    Some(g) => {
                        // by equation blocks: one weight per run of rows, no per-entry lookup
                        let gcol = &g[j * p..j * p + k];
                        let mut i = j;
                        for e in ej..n {
                            let (end, w) = (self.offsets[e + 1], sig[e]);
                            for (m, g) in mcol[i..end].iter_mut().zip(&gcol[i..end]) {
                                *m = g * w;
                            }
                            i = end;
                        }
                    }
                    None => {
                        for i in j..k {
                            mcol[i] = gram[[i, j]] * sig[eq_of[i]];
                        }
                    }
                }
            }
        }
        // h_a = sum_j sigma^{eq(a) j} rho_j Q_a'q_j
        let weights = Array2::from_shape_fn((n, n), |(e, j)| sigma_inv[[e, j]] * rho[j]);
        let qc = gram.slice(s![..k, k..k + n]);
        let h = Array1::from_shape_fn(k, |a| qc.row(a).dot(&weights.row(eq_of[a])));
        if let Some(l) = warm {
            if let Some((delta, iterations)) = warm_pcg(&m, l, &h, start) {
                return Ok((delta, StepWeight::Pending { m, iterations }, cond, None));
            }
        }
        let chol = self.factor_gls(m, true)?;
        let delta = chol_solve(&chol, &h)?;
        Ok((delta, StepWeight::Done(Weight::Chol(chol)), cond, None))
    }

    /// The Cholesky factor of the GLS matrix M (lower triangle given), or the singular-Omega
    /// error that says why it has none.
    /// `upper_is_zero`: M was built in a zeroed buffer with its lower triangle alone written
    /// (see `gls_step`).
    fn factor_gls(&self, m: Array2<f64>, upper_is_zero: bool) -> Result<Array2<f64>> {
        crate::linalg::chol_lower_of(m, upper_is_zero).ok_or_else(|| singular_gls(&self.names, self.n_eq(), self.n_obs))
    }

    /// W^-1 V for a K x m matrix V.
    fn weight_solve(&self, w: &Weight, v: &Array2<f64>) -> Result<Array2<f64>> {
        match w {
            Weight::Identity => Ok(v.clone()),
            Weight::MatrixFree => Err(matrix_free_unsupported("this covariance or restriction")),
            Weight::Chol(l) => chol_solve_mat(l, v),
            Weight::Packed(p) => p.solve_mat(v),
            Weight::Shared(omega) => {
                let mut out = Array2::<f64>::zeros(v.dim());
                for i in 0..self.n_eq() {
                    let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                    for j in 0..self.n_eq() {
                        let (c, d) = (self.offsets[j], self.offsets[j + 1]);
                        out.slice_mut(s![a..b, ..]).scaled_add(omega[[i, j]], &v.slice(s![c..d, ..]));
                    }
                }
                Ok(out)
            }
        }
    }

    /// W^-1 (K x K).
    fn weight_inverse(&self, w: &Weight) -> Result<Array2<f64>> {
        match w {
            Weight::Chol(l) => chol_inverse(l),
            Weight::Packed(p) => p.inverse(),
            _ => self.weight_solve(w, &Array2::eye(self.n_coef())),
        }
    }

    /// M X for the weight M of an estimator (I for OLS).
    fn weight_apply(&self, w: &Weight, x: &Array2<f64>) -> Result<Array2<f64>> {
        match w {
            Weight::Identity => Ok(x.clone()),
            Weight::Chol(l) => Ok(l.dot(&l.t().dot(x))),
            Weight::Packed(p) => {
                let l = p.to_full()?;
                Ok(l.dot(&l.t().dot(x)))
            }
            Weight::Shared(omega) => {
                let (sigma, _) = invert_omega(omega, &self.names, self.n_obs, &self.y_scales())?;
                self.weight_solve(&Weight::Shared(sigma), x)
            }
            Weight::MatrixFree => Err(matrix_free_unsupported("restrictions")),
        }
    }

    /// The null-space form of normalized restrictions.
    fn null_space(&self, rs: &Restrictions) -> Result<NullSpace> {
        use ndarray_linalg::SVD;
        let (m, k) = rs.r.dim();
        let dependent = || SurError::InvalidRestriction { index: None, detail: "are linearly dependent".into() };
        // Coefficients no restriction mentions keep their own unit directions in N. The others
        // fall into groups that restrictions link (two coefficients in one restriction are in
        // one group), and each group gets the SVD null space of its own restrictions: a
        // direction of N never mixes coefficients that no restriction links, so a poorly
        // determined coefficient does not leak into the variance of a well-determined one
        // (one SVD over all of them had mixed the groups' directions arbitrarily).
        let involved: Vec<usize> = (0..k).filter(|&j| rs.r.column(j).iter().any(|v| *v != 0.0)).collect();
        let free: Vec<usize> = (0..k).filter(|j| !involved.contains(j)).collect();
        let mut group: Vec<usize> = (0..k).collect();
        fn root(group: &mut [usize], mut j: usize) -> usize {
            while group[j] != j {
                group[j] = group[group[j]];
                j = group[j];
            }
            j
        }
        for row in rs.r.rows() {
            let mut first = None;
            for (j, v) in row.iter().enumerate() {
                if *v != 0.0 {
                    let rj = root(&mut group, j);
                    match first {
                        None => first = Some(rj),
                        Some(f) => group[rj] = f,
                    }
                }
            }
        }
        let mut n = Array2::<f64>::zeros((k, k - m));
        for (c, &j) in free.iter().enumerate() {
            n[[j, c]] = 1.0;
        }
        let mut col = free.len();
        let roots: Vec<usize> = involved.iter().map(|&j| root(&mut group, j)).collect();
        let mut seen = Vec::new();
        for &g in &roots {
            if seen.contains(&g) {
                continue;
            }
            seen.push(g);
            let members: Vec<usize> = involved.iter().zip(&roots).filter(|(_, r)| **r == g).map(|(j, _)| *j).collect();
            let rows: Vec<usize> = (0..m).filter(|&i| members.iter().any(|&j| rs.r[[i, j]] != 0.0)).collect();
            if rows.len() > members.len() || col + members.len() - rows.len() > k - m {
                return Err(dependent());
            }
            let rg = rs.r.select(ndarray::Axis(0), &rows).select(ndarray::Axis(1), &members);
            let (_, _, vt) = rg.svd(false, true).map_err(|e| SurError::numerical("SVD of the restrictions", e))?;
            let vt = vt.ok_or_else(|| SurError::numerical("SVD of the restrictions", "no right singular vectors"))?;
            for c in 0..(members.len() - rows.len()) {
                for (pos, &j) in members.iter().enumerate() {
                    n[[j, col + c]] = vt[[rows.len() + c, pos]];
                }
            }
            col += members.len() - rows.len();
        }
        if col != k - m {
            return Err(dependent());
        }
        let ri = rs.r.select(ndarray::Axis(1), &involved);
        let mut rrt = ri.dot(&ri.t());
        symmetrize(&mut rrt);
        let l = chol_lower(crate::linalg::to_fortran(&rrt)).ok_or_else(dependent)?;
        let b0i = ri.t().dot(&chol_solve(&l, &rs.q)?);
        let mut b0 = Array1::<f64>::zeros(k);
        for (row, &j) in involved.iter().enumerate() {
            b0[j] = b0i[row];
        }
        let mut g = Array2::<f64>::zeros((k, k - m));
        let mut d0 = Array1::<f64>::zeros(k);
        for (i, f) in self.factors.iter().enumerate() {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            g.slice_mut(s![a..b, ..]).assign(&f.r.dot(&n.slice(s![a..b, ..])));
            d0.slice_mut(s![a..b]).assign(&(f.r.dot(&b0.slice(s![a..b])) - &f.z));
        }
        Ok(NullSpace { r: rs.r.clone(), b0, n, g, d0 })
    }

    /// The restricted step: minimises the estimator's objective over delta = d0 + G theta,
    /// given the unrestricted solution delta_u of W delta = h: (G'WG) theta = G'W (delta_u - d0).
    ///
    /// Solved as the least-squares problem min ||L'(d0 + G theta - delta_u)|| (W = L L') by QR
    /// of F = L'G, so the conditioning of G enters once, not squared as in the normal equations.
    fn restrict(&self, delta_u: &Array1<f64>, w: &Weight, space: &NullSpace) -> Result<(Array1<f64>, RestrictedParts)> {
        let factor = self.weight_factor(w)?;
        let l = factor.as_deref();
        let gap = delta_u - &space.d0;
        let (f, c) = match l {
            None => (space.g.clone(), gap),
            Some(l) => (l.t().dot(&space.g), l.t().dot(&gap)),
        };
        let (qf, rf) = crate::linalg::thin_qr(crate::linalg::to_fortran(&f))?;
        let theta = crate::linalg::upper_solve(&rf, &qf.t().dot(&c)).map_err(|_| SurError::SingularOmega {
            equations: self.names.clone(),
            detail: "the GLS weights are numerically singular on the coefficients the \
                     restrictions leave free: the estimated cross-equation covariance is (nearly) \
                     singular; use fewer equations, method='fgls', or omega='ledoit-wolf'"
                .into(),
        })?;
        let out = &space.d0 + &space.g.dot(&theta);
        let rf_inv = upper_inverse(&rf)?;
        Ok((out, RestrictedParts { space: space.clone(), theta, rf_inv, qf }))
    }

    /// The lower Cholesky factor L of the weight W = L L' (None for W = I).
    fn weight_factor<'w>(&self, w: &'w Weight) -> Result<Option<std::borrow::Cow<'w, Array2<f64>>>> {
        use std::borrow::Cow;
        Ok(match w {
            Weight::Identity => None,
            Weight::Chol(l) => Some(Cow::Borrowed(l)),
            Weight::Packed(p) => Some(Cow::Owned(p.to_full()?)),
            Weight::Shared(_) => {
                let m = self.weight_apply(w, &Array2::eye(self.n_coef()))?;
                Some(Cow::Owned(
                    chol_lower(crate::linalg::to_fortran(&m))
                        .ok_or_else(|| SurError::numerical("restricted estimation", "GLS matrix not positive definite"))?,
                ))
            }
            Weight::MatrixFree => return Err(matrix_free_unsupported("restrictions")),
        })
    }

    /// Runs one estimation without restrictions.
    pub fn estimate(&self, opts: &FitOptions) -> Result<Estimate> {
        self.estimate_restricted(opts, None)
    }

    /// Runs one estimation, imposing R b = q when given. Omega comes from residuals that satisfy
    /// the restrictions at every stage (restricted OLS for the first step).
    pub fn estimate_restricted(&self, opts: &FitOptions, restrictions: Option<&Restrictions>) -> Result<Estimate> {
        self.estimate_with(opts, restrictions, None, &|| false)
    }

    /// As `estimate_restricted`, asking `cancel` before each GLS step whether to stop (then it
    /// returns `SurError::Interrupted`). `data` (the system's rows) is needed by Ledoit-Wolf
    /// shrinkage on the direct path.
    pub fn estimate_with(
        &self,
        opts: &FitOptions,
        restrictions: Option<&Restrictions>,
        data: Option<&SystemData>,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<Estimate> {
        opts.validate()?;
        self.check_matches(None, data)?;
        if matches!(self.cross, CrossProducts::ResidualsOnly { .. }) && (opts.method != Method::Ols || restrictions.is_some()) {
            return Err(needs_full_preparation("GLS steps and restrictions"));
        }
        let k = self.n_coef();
        let z = self.z();
        let constraint = match restrictions {
            None => None,
            Some(_) if matches!(self.cross, CrossProducts::MatrixFree { .. }) => {
                return Err(matrix_free_unsupported("restrictions"))
            }
            Some(rs) => {
                rs.validate(k)?;
                let rs = rs.normalized();
                let space = self.null_space(&rs)?;
                Some((space, rs))
            }
        };
        let impose = |delta: Array1<f64>, w: &Weight| -> Result<(Array1<f64>, Option<RestrictedParts>)> {
            match &constraint {
                None => Ok((delta, None)),
                Some((space, _)) => self.restrict(&delta, w, space).map(|(d, p)| (d, Some(p))),
            }
        };
        let (mut delta, mut restricted) = impose(Array1::zeros(k), &Weight::Identity)?;
        let mut weight = Weight::Identity;
        let mut pending: Option<Array2<f64>> = None;
        let mut warm_iterations = Vec::new();
        let mut s = self.residual_crossprod(&delta);
        let mut oest = self.omega_at(&delta, &s, opts.divisor, data)?;
        let mut n_iter = 0;
        let mut converged = true;
        let mut path = Vec::new();
        let mut omega_cond = f64::NAN;
        let mut cg_iterations = Vec::new();
        let mut cg_residual = f64::NAN;
        if opts.method != Method::Ols {
            let max_iter = if opts.method == Method::Fgls { 1 } else { opts.max_iter };
            converged = opts.method == Method::Fgls;
            // Steps after the first of an unrestricted iterated fit solve with conjugate
            // gradients preconditioned by the last Cholesky factor (the GLS matrix changes
            // little from step to step); the final step's matrix is factored at the end.
            let warm_allowed = opts.method == Method::IteratedFgls && constraint.is_none() && k >= PCG_MIN_K;
            let mut refactor = false;
            while n_iter < max_iter {
                if cancel() {
                    return Err(SurError::Interrupted);
                }
                let warm = match (&weight, warm_allowed && !refactor) {
                    (Weight::Chol(l), true) => Some(l),
                    _ => None,
                };
                let (unrestricted, sw, cond, cg) = self
                    .gls_step(&oest, &delta, opts, cancel, warm, pending.take())
                    .map_err(|e| if n_iter > 0 { iterated_singular(e, n_iter) } else { e })?;
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
                    oest = self.omega_at(&delta, &s, opts.divisor, data).map_err(|e| iterated_singular(e, n_iter))?;
                }
            }
        }
        if let Some(m) = pending.take() {
            weight = Weight::Chol(self.factor_gls(m, true)?);
        }
        // a final step whose conjugate gradients stopped at cg_max_iter short of cg_tol is
        // not a converged fit
        if cg_residual > opts.cg_tol {
            converged = false;
        }
        let OmegaEst { omega, shrinkage, .. } = oest;
        let gamma = &z + &delta;
        // restricted: b = b0 + N theta directly, so R b = q holds to the rounding of b itself
        // (the back substitution from gamma would add the conditioning of X_i to the gap)
        let coef = match &restricted {
            Some(p) => &p.space.b0 + &p.space.n.dot(&p.theta),
            None => self.coef_from_gamma(&gamma)?,
        };
        if let Some((_, rs)) = &constraint {
            rs.check_satisfied(&coef, &self.coef_scales())?;
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

    /// Two-step FGLS (Omega with the ML or degrees-of-freedom divisor) straight from the data,
    /// without the P x P Gram matrix: the same estimator as `Prepared::new` followed by
    /// `estimate_with` (method fgls, no restrictions), in less arithmetic and memory.
    ///
    /// The Gram matrix's K x N block Q_a'q_j costs T K N multiply-adds and serves iterated
    /// fits; one GLS step needs only its Omega-weighted sums h_a = Q_a' (E Omega^-1)_eq(a),
    /// E = [rho_j q_j] the OLS residuals: T N^2 for E Omega^-1 and T K for the products. Its
    /// final residual cross-products come from the residuals themselves (T N^2 / 2), formed
    /// when first asked for (the estimate keeps the T x N residuals until then). With
    /// K = 4000, N = 1000, T = 2000 that is 0.68 of the full data pass's multiply-adds, and the
    /// GLS matrix is built in the K x K products' own buffer: peak memory W + K^2 instead of
    /// P^2 + K^2.
    ///
    /// Returns the fit and a `Prepared` that keeps only q_i'q_j (`ResidualsOnly`): enough for
    /// the fit's covariances, OLS and the OLS residual cross-products, not for other GLS fits.
    /// Systems whose equations share one regressor matrix, and a single equation, take the
    /// usual path (there is nothing to save).
    pub fn fgls_from_data(data: &SystemData, divisor: Divisor, cancel: &(dyn Fn() -> bool + Sync)) -> Result<(Prepared, Estimate)> {
        let opts = FitOptions { method: Method::Fgls, divisor, ..FitOptions::default() };
        opts.validate()?;
        let usual = || -> Result<(Prepared, Estimate)> {
            let prep = Prepared::new_with(data, cancel)?;
            let est = prep.estimate_with(&opts, None, None, cancel)?;
            Ok((prep, est))
        };
        if !matches!(divisor, Divisor::Ml | Divisor::Dof) || data.n_eq() < 2 || data.identical_regressors() {
            return usual();
        }
        let interrupted = || if cancel() { Err(SurError::Interrupted) } else { Ok(()) };
        let (mut prep, w) = Prepared::basis(data, cancel)?;
        let (n, k, t) = (prep.n_eq(), prep.n_coef(), prep.n_obs);
        let offsets = prep.offsets.clone();
        let rho: Vec<f64> = prep.factors.iter().map(|f| f.rho).collect();
        // q_i'q_j, exact on the diagonal by construction (each q_i has unit length)
        interrupted()?;
        let mut qq = crate::linalg::gram_blocked(w.slice(s![.., k..]), cancel)?;
        for i in 0..n {
            qq[[i, i]] = 1.0;
        }
        prep.cross = CrossProducts::ResidualsOnly { qq };
        let s_ols = prep.residual_crossprod(&Array1::zeros(k));
        let omega = prep.omega_from(&s_ols, divisor);
        let (sigma_inv, cond) = invert_omega(&omega, &prep.names, t, &prep.y_scales())?;
        // h_a = Q_a' (E Omega^-1)_eq(a), E Omega^-1 = Wq (diag(rho) Omega^-1)
        interrupted()?;
        let wq = w.slice(s![.., k..]);
        let weights = Array2::from_shape_fn((n, n).f(), |(j, i)| rho[j] * sigma_inv[[j, i]]);
        let mut ew = crate::linalg::zeros_advised((t, n).f());
        ndarray::linalg::general_mat_mul(1.0, &wq, &weights, 0.0, &mut ew);
        let wbuf = w.as_slice_memory_order().expect("W is column-major and contiguous");
        let ewbuf = ew.as_slice_memory_order().expect("column-major");
        let mut h = Array1::<f64>::zeros(k);
        for i in 0..n {
            let target = &ewbuf[i * t..(i + 1) * t];
            for a in offsets[i]..offsets[i + 1] {
                h[a] = crate::linalg::dot(&wbuf[a * t..(a + 1) * t], target);
            }
        }
        // M = C o sigma^{eq(a) eq(b)} in the buffer of C = Q'Q, both in packed storage (the
        // lower triangle alone, half the memory of the square array)
        interrupted()?;
        let mut m = PackedLower::gram(w.slice(s![.., ..k]), cancel)?;
        {
            let mut eq_of = vec![0usize; k];
            for i in 0..n {
                eq_of[offsets[i]..offsets[i + 1]].fill(i);
            }
            // Q_j'Q_j = I exactly by construction (as in the full preparation)
            let weight = |r: usize, c: usize, v: f64| {
                let (er, ec) = (eq_of[r], eq_of[c]);
                if er != ec {
                    v * sigma_inv[[er, ec]]
                } else if r == c {
                    sigma_inv[[er, er]]
                } else {
                    0.0
                }
            };
            // a pass over K^2 / 2 values (15 ms at K = 4000 on one thread): both cores
            let threads = crate::prepare::work_threads((k * k) as f64);
            m.segments_par_mut(threads, &|seg| match seg {
                Segment::Row { i, j0, vals } => {
                    for (t, v) in vals.iter_mut().enumerate() {
                        *v = weight(i, j0 + t, *v);
                    }
                }
                Segment::Column { j, i0, vals } => {
                    for (t, v) in vals.iter_mut().enumerate() {
                        *v = weight(i0 + t, j, *v);
                    }
                }
            });
        }
        interrupted()?;
        let chol = m.factor().ok_or_else(|| singular_gls(&prep.names, n, t))?;
        let delta = chol.solve(&h)?;
        // residuals e_i = rho_i q_i - Q_i delta_i and their cross-products
        interrupted()?;
        // (in the buffer of E Omega^-1, which h has been read from)
        let mut e = ew;
        {
            let ebuf = e.as_slice_memory_order_mut().expect("column-major");
            for i in 0..n {
                let col = &mut ebuf[i * t..(i + 1) * t];
                for (o, q) in col.iter_mut().zip(&wbuf[(k + i) * t..(k + i + 1) * t]) {
                    *o = rho[i] * q;
                }
                for a in offsets[i]..offsets[i + 1] {
                    crate::linalg::axpy(col, &wbuf[a * t..(a + 1) * t], -delta[a]);
                }
            }
        }
        drop(w);
        let gamma = &prep.z() + &delta;
        let coef = prep.coef_from_gamma(&gamma)?;
        let est = Estimate {
            method: Method::Fgls,
            divisor,
            coef,
            gamma,
            omega,
            resid_cross: ResidCross::from_residuals(e),
            n_iter: 1,
            converged: true,
            criterion_path: Vec::new(),
            n_restrictions: 0,
            omega_cond: cond,
            shrinkage: None,
            cg_iterations: Vec::new(),
            cg_residual: f64::NAN,
            warm_iterations: Vec::new(),
            weight: Weight::Packed(chol),
            restricted: None,
        };
        Ok((prep, est))
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

    /// Classical covariance of gamma, unrestricted: W^-1 for GLS, omega_ij Q_i'Q_j for OLS.
    fn classical_gamma_cov(&self, est: &Estimate) -> Result<Array2<f64>> {
        if matches!(self.cross, CrossProducts::MatrixFree { .. }) {
            return Err(matrix_free_unsupported("the full covariance matrix"));
        }
        if !matches!(est.weight, Weight::Identity) {
            return self.weight_inverse(&est.weight);
        }
        let k = self.n_coef();
        let n = self.n_eq();
        let mut v = Array2::<f64>::zeros((k, k));
        for i in 0..n {
            for j in 0..n {
                let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                let (c, d) = (self.offsets[j], self.offsets[j + 1]);
                let mut blk = v.slice_mut(s![a..b, c..d]);
                match &self.cross {
                    CrossProducts::General { gram } => {
                        blk.assign(&gram.slice(s![a..b, c..d]));
                        blk *= est.omega[[i, j]];
                    }
                    CrossProducts::SharedRegressors { .. } => blk.diag_mut().fill(est.omega[[i, j]]),
                    CrossProducts::MatrixFree { .. } => unreachable!(),
                    CrossProducts::ResidualsOnly { .. } => return Err(needs_full_preparation("the full OLS covariance")),
                }
            }
        }
        Ok(v)
    }

    /// Checks that an estimate (and data, if given) belong to this prepared system.
    pub fn check_matches(&self, est: Option<&Estimate>, data: Option<&SystemData>) -> Result<()> {
        let n = self.n_eq();
        let bad = |what: &str| SurError::InvalidOption(format!("{what} does not belong to this system"));
        if let Some(est) = est {
            if est.coef.len() != self.n_coef() || est.omega.dim() != (n, n) {
                return Err(bad("the estimate"));
            }
        }
        if let Some(data) = data {
            if data.n_eq() != n
                || data.equations.iter().enumerate().any(|(i, e)| {
                    e.y.len() != self.n_obs || e.x.nrows() != self.n_obs || e.x.ncols() != self.k(i)
                })
            {
                return Err(bad("the data"));
            }
        }
        Ok(())
    }

    /// Covariance of gamma (K x K) of the given kind. Robust kinds need the data.
    pub fn gamma_covariance(&self, est: &Estimate, kind: CovKind, data: Option<&SystemData>) -> Result<Array2<f64>> {
        self.check_matches(Some(est), data)?;
        let v = match kind {
            CovKind::Classical => self.classical_gamma_cov(est)?,
            CovKind::Hc0 | CovKind::Hc1 => {
                let data = data.ok_or_else(|| SurError::InvalidOption("a robust covariance needs the data".into()))?;
                let meat = self.score_outer_product(est, data)?;
                let mut v = match &est.weight {
                    Weight::Identity => meat,
                    w => {
                        let left = self.weight_solve(w, &meat)?;
                        let mut v = self.weight_solve(w, &left.t().to_owned())?;
                        symmetrize(&mut v);
                        v
                    }
                };
                if kind == CovKind::Hc1 {
                    let t = self.n_obs as f64;
                    let kbar = self.n_coef() as f64 / self.n_eq() as f64;
                    v *= t / (t - kbar);
                }
                v
            }
        };
        Ok(v)
    }

    /// Covariance of a restricted fit, in b coordinates. With b = b0 + N theta,
    /// theta = A^-1 G'(h - W d0), A = G'WG = R_F'R_F (F = L'G = Q_F R_F) and h the score of the
    /// unrestricted step (W delta_u = h): A^-1 G' = R_F^-1 H' with H = L^-T Q_F (Q_F when W = I),
    /// so Cov(b) = P (H' B H) P', P = N R_F^-1 and B = Cov(h): M for classical GLS (then
    /// H'BH = I and Cov(b) = P P'), omega_ij Q_i'Q_j for classical OLS, the HC0 meat for the
    /// robust kinds. The conditioning of the regressors enters once, through R_F^-1 (forming
    /// A^-1 G'BG A^-1 from A^-1 had squared it: standard errors of nearly collinear, restricted
    /// equations off by percents).
    fn restricted_covariance(&self, est: &Estimate, p: &RestrictedParts, kind: CovKind, data: Option<&SystemData>) -> Result<Array2<f64>> {
        let (pmat, middle) = self.restricted_factors(est, p, kind, data)?;
        let mut out = match middle {
            None => pmat.dot(&pmat.t()),
            Some(c) => pmat.dot(&c).dot(&pmat.t()),
        };
        // a coefficient fixed by a restriction of its own has exactly zero (co)variance
        for j in fixed_alone(&p.space.r) {
            out.row_mut(j).fill(0.0);
            out.column_mut(j).fill(0.0);
        }
        symmetrize(&mut out);
        Ok(out)
    }

    /// Standard errors of a restricted fit from the factors of its covariance, without forming
    /// it: se_j = s_j sqrt(p_j' C p_j / s_j^2) for row p_j of P (C = H'BH, or I), s_j the row's
    /// largest magnitude. A regressor in units of 1e+-200 has a row of P near 1e-+200, whose
    /// squares the covariance matrix cannot hold (se had come out 0 or inf); a coefficient
    /// fixed by a restriction of its own has se 0, as its row and column of the covariance.
    fn restricted_standard_errors(&self, est: &Estimate, p: &RestrictedParts, kind: CovKind, data: Option<&SystemData>) -> Result<Array1<f64>> {
        let (mut pmat, middle) = self.restricted_factors(est, p, kind, data)?;
        let mut size = Array1::<f64>::zeros(pmat.nrows());
        for (mut row, s) in pmat.rows_mut().into_iter().zip(size.iter_mut()) {
            *s = row.iter().fold(0.0f64, |a, v| a.max(v.abs()));
            if *s > 0.0 && s.is_finite() {
                let inv = 1.0 / *s;
                row.mapv_inplace(|v| v * inv);
            }
        }
        let pc = middle.as_ref().map(|c| pmat.dot(c));
        let mut out = Array1::from_iter((0..pmat.nrows()).map(|j| {
            let q = match &pc {
                None => pmat.row(j).dot(&pmat.row(j)),
                Some(pc) => pc.row(j).dot(&pmat.row(j)),
            };
            size[j] * q.max(0.0).sqrt()
        }));
        for j in fixed_alone(&p.space.r) {
            out[j] = 0.0;
        }
        Ok(out)
    }

    /// The factors of `restricted_covariance`: P = N R_F^-1 (K x p) and H'BH (p x p; None when
    /// it is the identity, classical GLS), Cov(b) = P (H'BH) P'.
    fn restricted_factors(&self, est: &Estimate, p: &RestrictedParts, kind: CovKind, data: Option<&SystemData>) -> Result<(Array2<f64>, Option<Array2<f64>>)> {
        use ndarray_linalg::{Diag, SolveTriangular, UPLO};
        let pmat = p.space.n.dot(&p.rf_inv);
        let middle = match (kind, &est.weight) {
            (CovKind::Classical, Weight::Identity) => Some(self.classical_gamma_cov(est)?),
            (CovKind::Classical, _) => None,
            (CovKind::Hc0 | CovKind::Hc1, _) => {
                let data = data.ok_or_else(|| SurError::InvalidOption("a robust covariance needs the data".into()))?;
                let mut meat = self.score_outer_product(est, data)?;
                if kind == CovKind::Hc1 {
                    let t = self.n_obs as f64;
                    meat *= t / (t - self.n_coef() as f64 / self.n_eq() as f64);
                }
                Some(meat)
            }
        };
        let middle = match middle {
            None => None,
            Some(b) => {
                let h = match self.weight_factor(&est.weight)? {
                    None => p.qf.clone(),
                    Some(l) => l
                        .t()
                        .solve_triangular(UPLO::Upper, Diag::NonUnit, &p.qf)
                        .map_err(|e| SurError::numerical("restricted covariance", e))?,
                };
                let mut c = h.t().dot(&b.dot(&h));
                symmetrize(&mut c);
                Some(c)
            }
        };
        Ok((pmat, middle))
    }

    /// For classical GLS with a Cholesky factor L of M (square or packed): `visit(i, x_i)` for
    /// every equation i, x_i the rows from the equation's first of the columns of U = L^-1 that
    /// belong to it (U is zero above them), so (M^-1)_ii = x_i' x_i. U is solved a panel of
    /// whole equations at a time (columns c..d of U solve L[c.., c..] X = I[c.., c..d]): K^3/3
    /// flops in all, as one trtri, but only a K x PANEL block in memory. Ok(false), visiting
    /// nothing, for a weight without such a factor.
    fn inverse_panels(&self, est: &Estimate, mut visit: impl FnMut(usize, ndarray::ArrayView2<f64>)) -> Result<bool> {
        let panel: Option<PanelOfInverse<'_>> = match &est.weight {
            Weight::Chol(l) => Some(Box::new(move |c, d| inverse_columns(l, c, d))),
            Weight::Packed(p) => Some(Box::new(move |c, d| p.inverse_columns(c, d))),
            _ => None,
        };
        let Some(inverse_columns) = panel else { return Ok(false) };
        let n = self.n_eq();
        let mut first = 0;
        while first < n {
            let c = self.offsets[first];
            let mut last = first + 1;
            while last < n && self.offsets[last + 1] - c <= PANEL {
                last += 1;
            }
            let x = inverse_columns(c, self.offsets[last])?;
            for i in first..last {
                let (a, b) = (self.offsets[i] - c, self.offsets[i + 1] - c);
                visit(i, x.slice(s![a.., a..b]));
            }
            first = last;
        }
        Ok(true)
    }

    /// Variances of the predicted means x'b_i for new regressor rows (`xs[i]`: m x K_i, the same
    /// m for every equation), of the covariance kind given, without forming x V_ii x' from the
    /// covariance matrix: along a nearly collinear direction of X_i that product cancels (V_ii
    /// large, the variance small) and had lost three digits at condition 7e6. Here u = R_i^-T x
    /// (the conditioning of X_i taken out by one triangular solve) meets the covariance of
    /// gamma: classical GLS as |L^-1 panel u|^2, classical OLS as omega_ii |u|^2, the rest as
    /// u' C_ii u; restricted fits as w' C w with w = P_i' x (P = N R_F^-1).
    pub fn prediction_variances(&self, est: &Estimate, kind: CovKind, data: Option<&SystemData>, xs: &[ndarray::ArrayView2<f64>]) -> Result<Vec<Array1<f64>>> {
        use ndarray_linalg::{Diag, SolveTriangular, UPLO};
        self.check_matches(Some(est), data)?;
        let n = self.n_eq();
        if xs.len() != n || xs.iter().enumerate().any(|(i, x)| x.ncols() != self.k(i)) {
            return Err(SurError::InvalidOption("new regressors: one m x K_i array per equation".into()));
        }
        let quad = |w: &Array2<f64>, c: &Array2<f64>| -> Array1<f64> {
            // diag(w' C w) for the columns of w
            let cw = c.dot(w);
            Array1::from_iter(w.columns().into_iter().zip(cw.columns()).map(|(a, b)| a.dot(&b)))
        };
        if let Some(p) = &est.restricted {
            let (pmat, middle) = self.restricted_factors(est, p, kind, data)?;
            return Ok((0..n)
                .map(|i| {
                    let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                    // w = P_i' x for each new row (p x m)
                    let w = pmat.slice(s![a..b, ..]).t().dot(&xs[i].t());
                    match &middle {
                        None => w.map_axis(ndarray::Axis(0), |c| c.dot(&c)),
                        Some(c) => quad(&w, c),
                    }
                })
                .collect());
        }
        // u = R_i^-T x' (K_i x m) per equation
        let us: Vec<Array2<f64>> = (0..n)
            .map(|i| {
                self.factors[i]
                    .r
                    .t()
                    .solve_triangular(UPLO::Lower, Diag::NonUnit, &xs[i].t().to_owned())
                    .map_err(|e| SurError::numerical("prediction variances", e))
            })
            .collect::<Result<_>>()?;
        let sumsq = |u: &Array2<f64>| u.map_axis(ndarray::Axis(0), |c| c.dot(&c));
        if kind == CovKind::Classical {
            if matches!(self.cross, CrossProducts::MatrixFree { .. }) {
                return Err(matrix_free_unsupported("prediction standard errors"));
            }
            let mut out = vec![Array1::zeros(0); n];
            if self.inverse_panels(est, |i, x| out[i] = sumsq(&x.dot(&us[i])))? {
                return Ok(out);
            }
            if matches!(est.weight, Weight::Identity) {
                // omega_ii Q_i'Q_i = omega_ii I
                return Ok(us.iter().enumerate().map(|(i, u)| sumsq(u) * est.omega[[i, i]]).collect());
            }
        }
        let v = self.gamma_covariance(est, kind, data)?;
        Ok(us
            .iter()
            .enumerate()
            .map(|(i, u)| {
                let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                quad(u, &v.slice(s![a..b, a..b]).to_owned())
            })
            .collect())
    }

    /// Sum over rows of s_t s_t', s_t stacking Q_i[t,:]' u_t[i], with u_t = Omega^-1 e_t for GLS
    /// and u_t = e_t for OLS. One pass over the data in row blocks; Q_i = X_i R_i^-1.
    fn score_outer_product(&self, est: &Estimate, data: &SystemData) -> Result<Array2<f64>> {
        let t = self.n_obs;
        let k = self.n_coef();
        let n = self.n_eq();
        self.check_matches(Some(est), Some(data))?;
        data.validate_chunk(0, false)?;
        let sigma_inv = match &est.weight {
            Weight::Identity => None,
            _ => Some(invert_omega(&est.omega, &self.names, t, &self.y_scales())?.0),
        };
        let rinv: Vec<Array2<f64>> = self.factors.iter().map(|f| upper_inverse(&f.r)).collect::<Result<_>>()?;
        let mut meat = Array2::<f64>::zeros((k, k));
        let block = 2048usize;
        let mut start = 0;
        while start < t {
            let end = (start + block).min(t);
            let rows = end - start;
            let mut e = Array2::<f64>::zeros((rows, n));
            for (i, eq) in data.equations.iter().enumerate() {
                let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                let x = eq.x.slice(s![start..end, ..]);
                let fit = x.dot(&est.coef.slice(s![a..b]));
                let mut col = e.column_mut(i);
                col.assign(&eq.y.slice(s![start..end]));
                col -= &fit;
            }
            let u = match &sigma_inv {
                None => e,
                Some(si) => e.dot(si),
            };
            let mut sc = Array2::<f64>::zeros((rows, k).f());
            for (i, eq) in data.equations.iter().enumerate() {
                let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                let q = eq.x.slice(s![start..end, ..]).dot(&rinv[i]);
                let mut dst = sc.slice_mut(s![.., a..b]);
                dst.assign(&q);
                for (mut row, ui) in dst.rows_mut().into_iter().zip(u.column(i)) {
                    row *= *ui;
                }
            }
            meat += &gram(sc.view());
            start = end;
        }
        Ok(meat)
    }

    /// Covariance of the coefficients b (K x K): blockdiag(R_i^-1) Cov(gamma) blockdiag(R_i^-T).
    pub fn coef_covariance_of(&self, est: &Estimate, kind: CovKind, data: Option<&SystemData>) -> Result<Array2<f64>> {
        if let Some(p) = &est.restricted {
            self.check_matches(Some(est), data)?;
            return self.restricted_covariance(est, p, kind, data);
        }
        let v = self.gamma_covariance(est, kind, data)?;
        let rinv: Vec<Array2<f64>> = self.factors.iter().map(|f| upper_inverse(&f.r)).collect::<Result<_>>()?;
        let left = self.block_left_multiply(&rinv, &v);
        let mut out = self.block_left_multiply(&rinv, &left.t().to_owned());
        symmetrize(&mut out);
        Ok(out)
    }

    /// Variances of the coefficients b: the diagonal of `coef_covariance_of` without forming
    /// the K x K covariance when the kind allows it.
    ///
    /// Classical GLS: with M = L L' and U = L^-1 (one triangular inverse, K^3/3 flops),
    /// (M^-1)_ii = U_i' U_i for the columns U_i of equation i (zero above its first row), so
    /// Var(b_i) = column sums of squares of U_i R_i^-T. Classical OLS and shared regressors need
    /// only the diagonal blocks omega_ii Q_i'Q_i (resp. omega_ii I). Robust kinds and
    /// restricted fits take the diagonal of the full covariance (their K x K products remain).
    pub fn coef_variances(&self, est: &Estimate, kind: CovKind, data: Option<&SystemData>) -> Result<Array1<f64>> {
        self.check_matches(Some(est), data)?;
        if let Some(p) = &est.restricted {
            return Ok(self.restricted_covariance(est, p, kind, data)?.diag().to_owned());
        }
        let rinv: Vec<Array2<f64>> = self.factors.iter().map(|f| upper_inverse(&f.r)).collect::<Result<_>>()?;
        self.variances_with(est, kind, data, &rinv)
    }

    /// The variances of `coef_variances` with R_i^-1 given per equation (`rinv`): those of
    /// b or, given the inverse factors of the column-scaled regressors, of b_j times the norm
    /// of column j.
    fn variances_with(&self, est: &Estimate, kind: CovKind, data: Option<&SystemData>, rinv: &[Array2<f64>]) -> Result<Array1<f64>> {
        let mut out = Array1::<f64>::zeros(self.n_coef());
        if kind == CovKind::Classical {
            if matches!(self.cross, CrossProducts::MatrixFree { .. }) {
                return Err(matrix_free_unsupported("the covariance matrix"));
            }
            let offsets = &self.offsets;
            let mut t = Vec::new();
            let visited = self.inverse_panels(est, |i, x| {
                let ki = x.ncols();
                if ki > 16 {
                    let v = x.dot(&rinv[i].t());
                    for (j, col) in v.columns().into_iter().enumerate() {
                        out[offsets[i] + j] = col.dot(&col);
                    }
                    return;
                }
                // column j of x R_i^-T is sum_c x[:, c] R_i^-1[j, c] (c >= j): narrow blocks
                // without a BLAS call per equation
                t.clear();
                t.resize(x.nrows(), 0.0);
                for j in 0..ki {
                    t.iter_mut().for_each(|v| *v = 0.0);
                    for c in j..ki {
                        let f = rinv[i][[j, c]];
                        for (tv, xv) in t.iter_mut().zip(x.column(c)) {
                            *tv += f * xv;
                        }
                    }
                    out[offsets[i] + j] = crate::linalg::dot(&t, &t);
                }
            })?;
            if visited {
                return Ok(out);
            }
            for (i, ri) in rinv.iter().enumerate() {
                let (a, b) = (self.offsets[i], self.offsets[i + 1]);
                let w = est.omega[[i, i]];
                let blk = match (&est.weight, &self.cross) {
                    (Weight::Identity, CrossProducts::General { gram }) => gram.slice(s![a..b, a..b]).mapv(|g| g * w),
                    _ => Array2::from_diag_elem(b - a, w),
                };
                block_variances(ri, &blk, out.slice_mut(s![a..b]));
            }
            return Ok(out);
        }
        let v = self.gamma_covariance(est, kind, data)?;
        for (i, ri) in rinv.iter().enumerate() {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            block_variances(ri, &v.slice(s![a..b, a..b]).to_owned(), out.slice_mut(s![a..b]));
        }
        Ok(out)
    }

    /// Standard errors of the coefficients b: square roots of `coef_variances`, with a
    /// variance that rounding leaves a hair below zero (a coefficient a restriction fixes) read
    /// as zero.
    ///
    /// Unrestricted fits take them from the column-scaled problem, se(b_j) = se(b_j |x_j|) /
    /// |x_j| (|x_j| the norm of regressor j, the norm of column j of R_i): a regressor in units
    /// of 1e+-200 has a standard error near 1e-+200 whose square is beyond double precision,
    /// and squaring had given 0 or inf.
    pub fn coef_standard_errors(&self, est: &Estimate, kind: CovKind, data: Option<&SystemData>) -> Result<Array1<f64>> {
        if let Some(p) = &est.restricted {
            self.check_matches(Some(est), data)?;
            return self.restricted_standard_errors(est, p, kind, data);
        }
        let plain = self.coef_variances(est, kind, data)?;
        // variances that are all well inside double precision's range (the usual case) serve
        // as they are; the column-scaled problem only where one is near it or beyond
        let safe = |v: &f64| v.abs() > 1e-280 && v.abs() < 1e280;
        if plain.iter().all(safe) {
            return Ok(plain.mapv_into(|v| v.max(0.0).sqrt()));
        }
        let mut norms = Vec::with_capacity(self.n_coef());
        let mut rinv = Vec::with_capacity(self.n_eq());
        for f in &self.factors {
            let mut rs = f.r.clone();
            for mut col in rs.columns_mut() {
                let nj = crate::linalg::scaled_norm(&col.to_vec());
                norms.push(nj);
                if nj > 0.0 && nj.is_finite() {
                    col.mapv_inplace(|v| v / nj);
                }
            }
            rinv.push(upper_inverse(&rs)?);
        }
        let v = self.variances_with(est, kind, data, &rinv)?;
        Ok(Array1::from_iter(v.iter().zip(&norms).map(|(v, n)| v.max(0.0).sqrt() / n)))
    }

    /// Classical covariance of the coefficients b.
    pub fn coef_covariance(&self, est: &Estimate) -> Result<Array2<f64>> {
        self.coef_covariance_of(est, CovKind::Classical, None)
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
    /// +inf when S/T is singular (an exact fit: the Gaussian likelihood is unbounded); None
    /// when `s` does not belong to this system.
    pub fn log_likelihood(&self, s: &Array2<f64>) -> Option<f64> {
        if s.dim() != (self.n_eq(), self.n_eq()) {
            return None;
        }
        let t = self.n_obs as f64;
        let n = self.n_eq() as f64;
        let ld = ln_det_spd(&(s / t)).unwrap_or(f64::NEG_INFINITY);
        Some(-0.5 * n * t * (1.0 + (2.0 * std::f64::consts::PI).ln()) - 0.5 * t * ld)
    }
}

/// The coefficients a restriction of its own fixes (rows of R with one nonzero entry).
fn fixed_alone(r: &Array2<f64>) -> impl Iterator<Item = usize> + '_ {
    r.rows().into_iter().filter_map(|row| {
        let mut nz = row.iter().enumerate().filter(|(_, x)| **x != 0.0).map(|(j, _)| j);
        match (nz.next(), nz.next()) {
            (Some(j), None) => Some(j),
            _ => None,
        }
    })
}

/// A restriction row and its right-hand side scaled to a row of unit length, or None for a
/// row of zeros: first by its largest magnitude, so that the squares of entries near 1e+-200
/// neither overflow (a row of 1e200s had read as zeros, "redundant") nor underflow ("mentions
/// no coefficient").
fn unit_row(row: ndarray::ArrayView1<f64>, q: f64) -> Option<(Array1<f64>, f64)> {
    let top = row.iter().fold(0.0f64, |a, v| a.max(v.abs()));
    if !(top > 0.0 && top.is_finite()) {
        return None;
    }
    let scaled = row.mapv(|v| v / top);
    let n = scaled.dot(&scaled).sqrt();
    Some((scaled / n, q / top / n))
}

impl Restrictions {
    /// The same restrictions with each row of R (and q) scaled to unit length (`unit_row`).
    pub fn normalized(&self) -> Restrictions {
        let mut r = self.r.clone();
        let mut q = self.q.clone();
        for (i, mut row) in r.rows_mut().into_iter().enumerate() {
            if let Some((unit, rhs)) = unit_row(row.view(), q[i]) {
                row.assign(&unit);
                q[i] = rhs;
            }
        }
        Restrictions { r, q }
    }

    /// Checks R b = q to a tolerance relative to the size of the terms; a restriction that
    /// rounding kept from holding is reported rather than returned silently.
    /// `scales[j]` is a natural size of coefficient j (see `Prepared::coef_scales`).
    pub fn check_satisfied(&self, b: &Array1<f64>, scales: &[f64]) -> Result<()> {
        for (i, row) in self.r.rows().into_iter().enumerate() {
            let gap = row.dot(b) - self.q[i];
            let size: f64 = row
                .iter()
                .zip(b.iter().zip(scales))
                .map(|(a, (c, s))| a.abs() * (c.abs() + s))
                .sum::<f64>()
                + self.q[i].abs();
            if !(gap.abs() <= 1e-8 * size.max(f64::MIN_POSITIVE)) {
                return Err(SurError::InvalidRestriction {
                    index: Some(i),
                    detail: format!(
                        "could not be imposed accurately (R b - q = {} against terms of size {}): \
                         the coefficients it involves are on very different scales; rescale the \
                         regressors (e.g. income in thousands) and refit",
                        crate::linalg::fmt_num(gap),
                        crate::linalg::fmt_num(size)
                    ),
                });
            }
        }
        Ok(())
    }

    /// Checks shapes and finiteness, and that each restriction mentions a coefficient, adds
    /// information (is not implied by the earlier ones) and agrees with them.
    pub fn validate(&self, k: usize) -> Result<()> {
        let (m, kk) = self.r.dim();
        let bad = |index: Option<usize>, detail: String| SurError::InvalidRestriction { index, detail };
        if kk != k {
            return Err(bad(None, format!("the restriction matrix has {kk} columns but the system has {k} coefficients")));
        }
        if self.q.len() != m {
            return Err(bad(None, format!("{m} restrictions but {} right-hand sides", self.q.len())));
        }
        if m == 0 {
            return Err(bad(None, "no restrictions were given".into()));
        }
        if m >= k {
            return Err(bad(None, format!("{m} restrictions on {k} coefficients leave nothing to estimate")));
        }
        if self.r.iter().chain(self.q.iter()).any(|v| !v.is_finite()) {
            return Err(bad(None, "the restrictions contain NaN or infinite values".into()));
        }
        // Gram-Schmidt on the rows, in order: a row that adds (almost) nothing is redundant when
        // its right-hand side agrees, inconsistent when it does not.
        let mut basis: Vec<(Array1<f64>, f64)> = Vec::new();
        for i in 0..m {
            let Some((mut v, mut rhs)) = unit_row(self.r.row(i), self.q[i]) else {
                return Err(bad(Some(i), "mentions no coefficient".into()));
            };
            for _ in 0..2 {
                for (u, qu) in &basis {
                    let c = u.dot(&v);
                    v.scaled_add(-c, u);
                    rhs -= c * qu;
                }
            }
            let nv = v.dot(&v).sqrt();
            if nv < 1e-10 {
                let scale = 1.0 + self.q.iter().fold(0.0f64, |a, b| a.max(b.abs()));
                return Err(if rhs.abs() <= 1e-9 * scale {
                    bad(Some(i), "is implied by the restrictions before it (redundant): remove it".into())
                } else {
                    bad(Some(i), "contradicts the restrictions before it (inconsistent): no coefficients satisfy them all".into())
                });
            }
            basis.push((v / nv, rhs / nv));
        }
        Ok(())
    }
}

/// A singular Omega met after `steps` iterated FGLS steps, when the first Omega was not: the
/// iterations themselves drove it there (the Gaussian likelihood can be unbounded when T is
/// small against the equations and coefficients), which the usual causes do not explain.
fn iterated_singular(e: SurError, steps: usize) -> SurError {
    match e {
        SurError::SingularOmega { equations, detail } => SurError::SingularOmega {
            equations,
            detail: format!(
                "iterated FGLS drove the cross-equation covariance towards singularity: it was \
                 nonsingular at the start and is singular after {steps} GLS steps, as happens when \
                 there are few observations for the equations and coefficients (the likelihood may \
                 have no maximum); use method='fgls', omega='ledoit-wolf', or more observations. \
                 (If the data themselves are the cause, the test of the last Omega reads: {detail})"
            ),
        },
        e => e,
    }
}

/// One GLS step: delta, the weight, the condition estimate of Omega, and (matrix-free) the CG
/// iterations and final relative residual.
type GlsStep = (Array1<f64>, StepWeight, f64, Option<(usize, f64)>);

/// The weight a GLS step leaves: final, or the GLS matrix M (lower triangle) of a step solved
/// by preconditioned conjugate gradients, still to be factored if it is the last step.
enum StepWeight {
    Done(Weight),
    Pending { m: Array2<f64>, iterations: usize },
}

/// Below this many coefficients a fresh Cholesky factor costs less than the conjugate-gradient
/// iterations' bookkeeping (case (a), K = 20: 8 us per direct step, 18 us warm-started).
const PCG_MIN_K: usize = 48;
/// A warm-started solve that needed more iterations than this has the next step factor afresh.
const PCG_REFACTOR: usize = 8;
/// Iterations after which a warm-started solve gives up (the step is then solved directly).
const PCG_MAX: usize = 40;

/// Solves M x = h (M symmetric, lower triangle, column-major) by conjugate gradients from `x0`,
/// preconditioned with the Cholesky factor `l` of a nearby matrix, to the rounding level of a
/// direct solve: ||h - M x|| <= 16 eps (||M||_F ||x|| + ||h||) in the Jacobi-scaled system,
/// checked on the residual recomputed from scratch. Returns None (solve directly) when that is not reached in PCG_MAX
/// iterations or a step loses positive curvature (M not positive definite).
fn warm_pcg(m: &Array2<f64>, l: &Array2<f64>, h: &Array1<f64>, x0: &Array1<f64>) -> Option<(Array1<f64>, usize)> {
    use crate::linalg::{axpy, chol_solve_in_place, dot, sym_lower_matvec};
    let k = h.len();
    let (mb, lb) = (m.as_slice_memory_order()?, l.as_slice_memory_order()?);
    if !m.t().is_standard_layout() || !l.t().is_standard_layout() || l.nrows() != k || m.nrows() != k {
        return None;
    }
    let h = h.as_slice()?;
    // The stopping test is made in the Jacobi-scaled system D^-1/2 M D^-1/2 (D = diag M), so
    // that equations in very different units are each solved to their own rounding level, as
    // the (scale-invariant) Cholesky solve does.
    let sd: Vec<f64> = (0..k).map(|j| mb[j * k + j].sqrt()).collect();
    if sd.iter().any(|v| !(*v > 0.0 && v.is_finite())) {
        return None;
    }
    // ||D^-1/2 M D^-1/2||_F from the lower triangle (multiplications only: a division per
    // entry cost a tenth of an IFGLS step on 300 coefficients)
    let isd: Vec<f64> = sd.iter().map(|v| 1.0 / v).collect();
    let mut fro = 0.0;
    for j in 0..k {
        let col = &mb[j * k + j + 1..(j + 1) * k];
        let mut acc = 0.0;
        for (v, s) in col.iter().zip(&isd[j + 1..]) {
            let w = v * s;
            acc += w * w;
        }
        let d = mb[j * k + j] * isd[j] * isd[j];
        fro += d * d + 2.0 * acc * isd[j] * isd[j];
    }
    let fro = fro.sqrt();
    let scaled_norm = |v: &[f64], up: bool| -> f64 {
        v.iter().zip(&sd).map(|(a, d)| if up { a * d } else { a / d }).map(|a| a * a).sum::<f64>().sqrt()
    };
    let hn = scaled_norm(h, false);
    let mut x = x0.to_vec();
    let mut q = vec![0.0; k];
    let residual = |x: &[f64], q: &mut Vec<f64>| -> Vec<f64> {
        sym_lower_matvec(mb, k, x, q);
        h.iter().zip(q.iter()).map(|(a, b)| a - b).collect()
    };
    let mut r = residual(&x, &mut q);
    let mut z = r.clone();
    chol_solve_in_place(lb, k, &mut z);
    let mut p = z.clone();
    let mut rz = dot(&r, &z);
    for it in 0..=PCG_MAX {
        let thr = 16.0 * f64::EPSILON * (fro * scaled_norm(&x, true) + hn);
        if scaled_norm(&r, false) <= thr {
            // the updated residual drifts from the true one: confirm on a fresh one
            r = residual(&x, &mut q);
            if scaled_norm(&r, false) <= thr {
                return Some((Array1::from(x), it));
            }
            z.copy_from_slice(&r);
            chol_solve_in_place(lb, k, &mut z);
            p.copy_from_slice(&z);
            rz = dot(&r, &z);
        }
        if it == PCG_MAX {
            break;
        }
        sym_lower_matvec(mb, k, &p, &mut q);
        let pq = dot(&p, &q);
        if !(pq > 0.0 && pq.is_finite() && rz.is_finite()) {
            return None;
        }
        let alpha = rz / pq;
        axpy(&mut x, &p, alpha);
        axpy(&mut r, &q, -alpha);
        z.copy_from_slice(&r);
        chol_solve_in_place(lb, k, &mut z);
        let rz_new = dot(&r, &z);
        let beta = rz_new / rz;
        rz = rz_new;
        for (pi, zi) in p.iter_mut().zip(&z) {
            *pi = zi + beta * *pi;
        }
    }
    None
}

/// Omega and what the matrix-free path needs to apply its inverse cheaply.
struct OmegaEst {
    omega: Array2<f64>,
    shrinkage: Option<f64>,
    /// (diagonal part, weight c, residual rows E) when Omega = diag + c E'E.
    low_rank: Option<(Array1<f64>, f64, Array2<f64>)>,
}

fn needs_full_preparation(what: &str) -> SurError {
    SurError::InvalidOption(format!(
        "{what} need(s) the full cross-products of the regressors, which a two-step FGLS fit \
         computed from the data does not keep: prepare the system again (Prepared::new)"
    ))
}

fn matrix_free_unsupported(what: &str) -> SurError {
    SurError::InvalidOption(format!(
        "{what} is not available on the matrix-free (conjugate-gradient) path, which never forms \
         K x K matrices; use the direct solver (raise the memory limit) or, for standard errors, \
         the per-equation conjugate-gradient standard errors"
    ))
}

/// Solves (L L') X = B for a K x m right-hand side.
fn chol_solve_mat(l: &Array2<f64>, b: &Array2<f64>) -> Result<Array2<f64>> {
    let mut out = Array2::<f64>::zeros(b.dim());
    for (j, col) in b.columns().into_iter().enumerate() {
        out.column_mut(j).assign(&chol_solve(l, &col.to_owned())?);
    }
    Ok(out)
}

/// The error of a GLS matrix that is not numerically positive definite.
fn singular_gls(names: &[String], n: usize, t: usize) -> SurError {
    SurError::SingularOmega {
        equations: names.to_vec(),
        detail: format!(
            "the GLS normal matrix is not numerically positive definite: the estimated \
             cross-equation covariance is (nearly) singular for these regressors. With {n} \
             equations and {t} observations this happens when the residuals leave too few \
             degrees of freedom (the Gaussian ML estimator does not exist when N plus the \
             rank of all regressors together exceeds T); use method='fgls', fewer equations, \
             or omega='ledoit-wolf'"
        ),
    }
}

/// diag(A B A') into `out`, for a square block B.
fn block_variances(a: &Array2<f64>, b: &Array2<f64>, mut out: ndarray::ArrayViewMut1<f64>) {
    let ab = a.dot(b);
    for (j, o) in out.iter_mut().enumerate() {
        *o = ab.row(j).dot(&a.row(j));
    }
}

/// Rows and columns c.. x c..d of L^-1, for a factor in either storage.
type PanelOfInverse<'a> = Box<dyn Fn(usize, usize) -> Result<Array2<f64>> + 'a>;

/// Columns of whole equations per panel of L^-1 in `coef_variances` (a K x PANEL block).
const PANEL: usize = 256;

/// Factors up to this order are inverted by `inverse_columns`' own loops rather than BLAS.
const SMALL_PANEL: usize = 64;

/// Rows and columns c.. x c..d of L^-1 for the lower Cholesky factor from `chol_lower` (the
/// rows above c are zero): solves L[c.., c..] X = I[c.., c..d] by one BLAS trsm.
// A BLAS kernel: its home is linalg.rs, kept here while that module is being rewritten.
fn inverse_columns(l: &Array2<f64>, c: usize, d: usize) -> Result<Array2<f64>> {
    let k = l.nrows();
    if !l.t().is_standard_layout() || l.ncols() != k || c > d || d > k {
        return Err(SurError::numerical("inverse of the Cholesky factor", "unexpected factor layout"));
    }
    let (m, w) = (k - c, d - c);
    let mut x = crate::packed::identity_panel(m, w);
    if m == 0 || w == 0 {
        return Ok(x);
    }
    if (0..m).any(|i| l[[c + i, c + i]] == 0.0) {
        return Err(SurError::numerical("inverse of the Cholesky factor", "zero on the diagonal"));
    }
    if m <= SMALL_PANEL {
        // own loops: a BLAS trsm on a 20 x 20 factor cost 3 us of call overhead, most of a
        // small system's standard errors
        let lbuf = l.as_slice_memory_order().expect("column-major");
        let xbuf = x.as_slice_memory_order_mut().expect("column-major");
        crate::linalg::lower_inverse_columns(lbuf, k, c, m, w, xbuf);
        return Ok(x);
    }
    // SAFETY: `l` is k x k column-major, so L[c.., c..] starts at c * k + c with leading
    // dimension k; `x` is a fresh m x w column-major buffer with leading dimension m.
    unsafe {
        cblas_sys::cblas_dtrsm(
            cblas_sys::CBLAS_LAYOUT::CblasColMajor,
            cblas_sys::CBLAS_SIDE::CblasLeft,
            cblas_sys::CBLAS_UPLO::CblasLower,
            cblas_sys::CBLAS_TRANSPOSE::CblasNoTrans,
            cblas_sys::CBLAS_DIAG::CblasNonUnit,
            m as i32,
            w as i32,
            1.0,
            l.as_ptr().add(c * k + c),
            k as i32,
            x.as_mut_ptr(),
            m as i32,
        )
    };
    Ok(x)
}

#[cfg(test)]
mod variance_tests {
    use super::*;
    use crate::system::Equation;

    /// Deterministic regressors and correlated errors (no random crate): N equations with a
    /// constant and k - 1 trigonometric regressors; `shared` gives every equation the same X.
    fn system(n: usize, t: usize, k: usize, shared: bool) -> (Vec<Array1<f64>>, Vec<Array2<f64>>) {
        let xs: Vec<Array2<f64>> = (0..n)
            .map(|i| {
                let shift = if shared { 0.0 } else { i as f64 };
                Array2::from_shape_fn((t, k), |(r, j)| {
                    if j == 0 { 1.0 } else { ((r * (j + 2)) as f64 * 0.37 + shift * 1.3 + j as f64).sin() * (1.0 + j as f64) }
                })
            })
            .collect();
        let ys = (0..n)
            .map(|i| {
                Array1::from_shape_fn(t, |r| {
                    let common = (r as f64 * 1.7).sin();
                    let own = ((r * (i + 3)) as f64 * 0.91 + i as f64).cos();
                    xs[i].row(r).sum() + (1.0 + 0.2 * i as f64) * (0.8 * common + 0.6 * own)
                })
            })
            .collect();
        (ys, xs)
    }

    #[test]
    fn variances_are_the_diagonal_of_the_full_covariance() {
        // n = 100, k = 3: K = 300 spans two panels of L^-1
        for (n, shared) in [(4, false), (30, false), (100, false), (3, true)] {
            let (ys, xs) = system(n, 120, 3, shared);
            let data = SystemData::new(
                ys.iter().zip(&xs).enumerate().map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view())).collect(),
            );
            let p = Prepared::new(&data).unwrap();
            for method in [Method::Ols, Method::Fgls, Method::IteratedFgls] {
                let est = p.estimate(&FitOptions { method, ..Default::default() }).unwrap();
                for kind in [CovKind::Classical, CovKind::Hc0, CovKind::Hc1] {
                    let full = p.coef_covariance_of(&est, kind, Some(&data)).unwrap();
                    let var = p.coef_variances(&est, kind, Some(&data)).unwrap();
                    let se = p.coef_standard_errors(&est, kind, Some(&data)).unwrap();
                    for j in 0..var.len() {
                        let d = full[[j, j]];
                        assert!(d > 0.0);
                        assert!((var[j] - d).abs() <= 1e-13 * d, "{method:?} {kind:?} n={n}: {} vs {d}", var[j]);
                        assert!((se[j] * se[j] - d).abs() <= 1e-13 * d);
                    }
                }
            }
        }
    }

    /// Largest |a - b| over the largest |b|.
    fn rel(a: &[f64], b: &[f64]) -> f64 {
        let scale = b.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        a.iter().zip(b).fold(0.0f64, |m, (x, y)| m.max((x - y).abs())) / scale
    }

    #[test]
    fn two_step_fgls_from_the_data_is_the_usual_estimator() {
        // The same estimator by two routes (Gram matrix, or one pass over the basis): they differ
        // only in the order of the sums, so they agree to rounding (common practice: a few
        // hundred eps on conditioned data).
        for (n, t, k, ragged) in [(5, 60, 3, true), (12, 150, 4, true), (40, 100, 2, false), (2, 30, 5, true)] {
            let (ys, xs) = system(n, t, k, false);
            let xs: Vec<Array2<f64>> =
                xs.iter().enumerate().map(|(i, x)| x.slice(s![.., ..if ragged { 1 + (i % k) } else { k }]).to_owned()).collect();
            let data = SystemData::new(
                ys.iter().zip(&xs).enumerate().map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view())).collect(),
            );
            let full = Prepared::new(&data).unwrap();
            for divisor in [Divisor::Ml, Divisor::Dof] {
                let usual = full.estimate(&FitOptions { method: Method::Fgls, divisor, ..Default::default() }).unwrap();
                let (lite, fused) = Prepared::fgls_from_data(&data, divisor, &|| false).unwrap();
                assert!(matches!(lite.cross, CrossProducts::ResidualsOnly { .. }));
                let tag = format!("n={n} t={t} {divisor:?}");
                assert!(rel(fused.coef.as_slice().unwrap(), usual.coef.as_slice().unwrap()) < 1e-11, "coef {tag}");
                assert!(rel(fused.omega.as_slice_memory_order().unwrap(), usual.omega.as_slice_memory_order().unwrap()) < 1e-12, "omega {tag}");
                // S is formed on first use from the residuals the fit kept: a copy taken before
                // that forms the same S, and both are the definition e_i'e_j, e_i = y_i - X_i b_i
                let copy = fused.clone();
                let mut e = Array2::<f64>::zeros((t, n));
                let mut at = 0;
                for (i, (y, x)) in ys.iter().zip(&xs).enumerate() {
                    let b = fused.coef.slice(s![at..at + x.ncols()]);
                    e.column_mut(i).assign(&(y - &x.dot(&b)));
                    at += x.ncols();
                }
                let direct = e.t().dot(&e);
                assert!(rel(fused.resid_crossprod().as_standard_layout().as_slice().unwrap(), direct.as_slice().unwrap()) < 1e-10, "S {tag}");
                assert_eq!(copy.resid_crossprod(), fused.resid_crossprod());
                let (sf, su) = (fused.resid_crossprod().as_standard_layout().to_owned(), usual.resid_crossprod().as_standard_layout().to_owned());
                assert!(rel(sf.as_slice().unwrap(), su.as_slice().unwrap()) < 1e-11, "S {tag}");
                assert_eq!((fused.n_iter, fused.converged, fused.method), (1, true, Method::Fgls));
                assert!((fused.omega_cond - usual.omega_cond).abs() <= 1e-8 * usual.omega_cond);
                for kind in [CovKind::Classical, CovKind::Hc0] {
                    let a = lite.coef_covariance_of(&fused, kind, Some(&data)).unwrap();
                    let b = full.coef_covariance_of(&usual, kind, Some(&data)).unwrap();
                    assert!(rel(a.as_standard_layout().as_slice().unwrap(), b.as_standard_layout().as_slice().unwrap()) < 1e-10, "{kind:?} {tag}");
                    let se = lite.coef_standard_errors(&fused, kind, Some(&data)).unwrap();
                    let se_u = full.coef_standard_errors(&usual, kind, Some(&data)).unwrap();
                    assert!(rel(se.as_slice().unwrap(), se_u.as_slice().unwrap()) < 1e-10);
                }
                // what the light preparation still does: OLS and the OLS residual cross-products
                let ols = lite.estimate(&FitOptions { method: Method::Ols, ..Default::default() }).unwrap();
                let ols_u = full.estimate(&FitOptions { method: Method::Ols, ..Default::default() }).unwrap();
                assert_eq!(ols.coef, ols_u.coef);
                let (a, b) = (lite.ols_crossprod(), full.ols_crossprod());
                assert!(rel(a.as_slice().unwrap(), b.as_slice().unwrap()) < 1e-12);
                let se = lite.coef_standard_errors(&ols, CovKind::Classical, None).unwrap();
                assert!(rel(se.as_slice().unwrap(), full.coef_standard_errors(&ols_u, CovKind::Classical, None).unwrap().as_slice().unwrap()) < 1e-13);
                // and what it refuses, with a typed error rather than a wrong number
                for method in [Method::Fgls, Method::IteratedFgls] {
                    let err = lite.estimate(&FitOptions { method, ..Default::default() }).unwrap_err();
                    assert!(matches!(err, SurError::InvalidOption(ref m) if m.contains("prepare the system again")), "{err}");
                }
                assert!(matches!(lite.coef_covariance_of(&ols, CovKind::Classical, None), Err(SurError::InvalidOption(_))));
            }
        }
        // shared regressors and Ledoit-Wolf take the usual route
        let (ys, xs) = system(3, 40, 3, true);
        let data = SystemData::new(
            ys.iter().zip(&xs).enumerate().map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view())).collect(),
        );
        let (p, _) = Prepared::fgls_from_data(&data, Divisor::Ml, &|| false).unwrap();
        assert!(matches!(p.cross, CrossProducts::SharedRegressors { .. }));
    }

    #[test]
    fn two_step_fgls_from_the_data_names_a_singular_omega_and_stops_when_asked() {
        // equation 2 is equation 0 plus equation 1 with the same regressors: residuals that add
        // up, so Omega is singular (the budget-share case)
        let (ys, xs) = system(3, 50, 3, false);
        let mut ys = ys;
        let xs = vec![xs[0].clone(), xs[0].clone(), xs[1].clone()];
        ys[1] = &ys[0] * 2.0 + xs[0].column(1).mapv(|v| v * 0.1);
        let data = SystemData::new(
            ys.iter().zip(&xs).enumerate().map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view())).collect(),
        );
        let err = Prepared::fgls_from_data(&data, Divisor::Ml, &|| false).unwrap_err();
        let usual = Prepared::new(&data).unwrap().estimate(&FitOptions::default()).unwrap_err();
        assert!(matches!(err, SurError::SingularOmega { .. }), "{err}");
        assert_eq!(err.to_string(), usual.to_string());
        let (ys, xs) = system(4, 50, 3, false);
        let data = SystemData::new(
            ys.iter().zip(&xs).enumerate().map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view())).collect(),
        );
        assert!(matches!(Prepared::fgls_from_data(&data, Divisor::Ml, &|| true), Err(SurError::Interrupted)));
    }

    #[test]
    fn panels_of_the_inverse_factor_solve_the_triangular_system_on_both_routes() {
        // definition of the panel: L[c.., c..] X = I[c.., c..d]; orders on both sides of
        // SMALL_PANEL (own loops below, BLAS trsm above), against the plain identity
        for n in [7usize, SMALL_PANEL, SMALL_PANEL + 37] {
            let l = Array2::from_shape_fn((n, n).f(), |(i, j)| {
                if i < j { 0.0 } else if i == j { 1.0 + (i % 5) as f64 } else { ((i * 7 + j * 3) as f64 * 0.61).sin() }
            });
            for (c, d) in [(0, n), (0, 1), (n / 3, n / 2 + 1), (n - 1, n), (n, n)] {
                let x = inverse_columns(&l, c, d).unwrap();
                assert_eq!(x.dim(), (n - c, d - c));
                let lx = l.slice(s![c.., c..]).dot(&x);
                for ((i, j), v) in lx.indexed_iter() {
                    let want = if i == j { 1.0 } else { 0.0 };
                    assert!((v - want).abs() < 1e-12, "n {n} c {c} d {d}: (L X)[{i},{j}] = {v}");
                }
            }
        }
        let mut zero = Array2::<f64>::eye(5).reversed_axes(); // column-major, as the factors are
        zero[[2, 2]] = 0.0;
        assert!(inverse_columns(&zero, 0, 5).is_err());
    }
}
