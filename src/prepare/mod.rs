//! Steps 0 and 1: per-equation orthonormalisation and one pass of cross-products over the data.
//!
//! Each equation's augmented matrix [X_i | y_i] gets a Householder QR. That gives
//! X_i = Q_i R_i, the OLS coordinates z_i = Q_i'y_i, and y_i = Q_i z_i + rho_i q_i with q_i a unit
//! vector orthogonal to Q_i and rho_i the norm of the OLS residual. Every residual of any
//! coefficient vector is then e_i = rho_i q_i - Q_i delta_i (delta_i = gamma_i - z_i), a combination
//! of the orthonormal columns of W = [Q_1 .. Q_N, q_1 .. q_N] (T x P, P = K + N) with coefficients
//! of the size of the residual itself. So the residual cross-products S = A'(W'W)A carry no
//! cancellation, however close R-squared is to one or however large the means of y are; the
//! textbook E - gamma'D - D'gamma + gamma'C gamma form loses digits in both cases.
//! After this pass nothing depends on T.

mod step0;

use ndarray::{s, Array1, Array2, ShapeBuilder};

use crate::data::{check_finite, SystemData};
use crate::error::Result;
use crate::kernels::{gram, gram_blocked, upper_solve};
pub(crate) use step0::{
    abs_max, check_rank, cond_of_scaled, orthogonal_unit, rank_tol, refine_fit, y_max_in_range,
};
use step0::{shared_regressors, step_zero, y_in_range};

/// What one equation contributes after orthonormalisation.
#[derive(Debug, Clone)]
pub struct EquationFactor {
    /// Upper-triangular K_i x K_i with X_i = Q_i R_i.
    pub r: Array2<f64>,
    /// Q_i'y_i: the OLS coefficients in the orthonormal basis.
    pub z: Array1<f64>,
    /// Norm of the OLS residual.
    pub rho: f64,
    /// Whether the columns of X_i span the constant vector (explicitly or through dummies).
    pub spans_constant: bool,
    /// Sum of squares of y_i about its mean, and about zero.
    pub tss_centred: f64,
    pub tss_raw: f64,
    /// Condition number estimate (1-norm, LAPACK trcon) of the column-scaled X_i: about how
    /// many digits least squares on this equation can lose (log10 of it).
    pub cond: f64,
}

/// The cross-products of W = [Q_1 .. Q_N, q_1 .. q_N].
#[derive(Debug, Clone)]
pub enum CrossProducts {
    /// The full P x P Gram matrix W'W.
    General { gram: Array2<f64> },
    /// W itself (T x P, column-major), for systems whose K x K matrices would not fit in
    /// memory: every product with the GLS matrix goes through W (conjugate gradients).
    MatrixFree { w: Array2<f64> },
    /// All equations share one regressor matrix: Q_i'Q_j = I and Q_i'q_j = 0, so only the N x N
    /// matrix q_i'q_j is needed.
    SharedRegressors { qq: Array2<f64> },
    /// Only q_i'q_j (N x N), the cross-products of the normalised OLS residuals: what a
    /// two-step FGLS fit computed from the data in one pass leaves behind (it formed and
    /// dropped the K x K products; see `Prepared::fgls_from_data`). Enough for OLS, the OLS
    /// residual cross-products and every covariance of that fit; any other estimation needs
    /// a full preparation.
    ResidualsOnly { qq: Array2<f64> },
}

/// Everything estimation needs: independent of T from here on.
#[derive(Debug, Clone)]
pub struct Prepared {
    pub n_obs: usize,
    pub names: Vec<String>,
    pub regressors: Vec<Vec<String>>,
    /// Offsets of each equation's coefficients in the stacked vector (length N + 1).
    pub offsets: Vec<usize>,
    pub factors: Vec<EquationFactor>,
    pub cross: CrossProducts,
}

impl Prepared {
    /// Validates the data and runs steps 0 and 1.
    pub fn new(data: &SystemData) -> Result<Prepared> {
        Self::new_with(data, &|| false)
    }

    /// As `new`, asking `cancel` between equations and between row blocks of the Gram pass
    /// whether to stop (then it returns `SurError::Interrupted`).
    pub fn new_with(data: &SystemData, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Prepared> {
        Self::build(data, cancel, false)
    }

    /// As `new_with`, but keeps W (T x P) instead of forming the P x P Gram matrix: the
    /// matrix-free path for systems too large for K x K matrices.
    pub fn new_matrix_free(
        data: &SystemData,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<Prepared> {
        Self::build(data, cancel, true)
    }

    fn build(
        data: &SystemData,
        cancel: &(dyn Fn() -> bool + Sync),
        matrix_free: bool,
    ) -> Result<Prepared> {
        let t = data.validate_shapes(true)?;
        let n = data.n_eq();
        let mut offsets = vec![0usize];
        for eq in &data.equations {
            offsets.push(offsets.last().unwrap() + eq.n_regressors());
        }
        let k = offsets[n];
        let names: Vec<String> = data.equations.iter().map(|e| e.name.clone()).collect();
        let regressors: Vec<Vec<String>> = data
            .equations
            .iter()
            .map(|e| e.regressors.clone())
            .collect();
        let offs = offsets.clone();
        let done = move |factors, cross| Prepared {
            n_obs: t,
            names,
            regressors,
            offsets: offs,
            factors,
            cross,
        };

        if n > 1 && !matrix_free && data.identical_regressors() {
            for eq in &data.equations {
                check_finite(eq, 0)?;
                y_in_range(eq, eq.y.iter())?;
            }
            let (factors, qq) = shared_regressors(data, t)?;
            return Ok(done(factors, CrossProducts::SharedRegressors { qq }));
        }

        let (factors, w) = step_zero(data, t, &offsets, cancel)?;
        if matrix_free {
            return Ok(done(factors, CrossProducts::MatrixFree { w }));
        }
        let mut g = gram_blocked(w.view(), cancel)?;
        drop(w);
        // Exact by construction: orthonormal columns within an equation, q_i orthogonal to Q_i.
        for i in 0..n {
            let (a, b) = (offsets[i], offsets[i + 1]);
            g.slice_mut(s![a..b, a..b]).assign(&Array2::eye(b - a));
            g.slice_mut(s![a..b, k + i]).fill(0.0);
            g.slice_mut(s![k + i, a..b]).fill(0.0);
            g[[k + i, k + i]] = 1.0;
        }
        Ok(done(factors, CrossProducts::General { gram: g }))
    }

    /// Step 0 alone, with the basis it wrote: the factors and W = [Q_1 .. Q_N, q_1 .. q_N]
    /// (T x P, column-major). For estimators that read the basis once and need no Gram matrix
    /// kept (see `Prepared::fgls_from_data`). Systems whose equations share one regressor
    /// matrix are the caller's to route elsewhere: W is formed for them as for any other.
    pub(crate) fn basis(
        data: &SystemData,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<(Prepared, Array2<f64>)> {
        let t = data.validate_shapes(true)?;
        let n = data.n_eq();
        let mut offsets = vec![0usize];
        for eq in &data.equations {
            offsets.push(offsets.last().unwrap() + eq.n_regressors());
        }
        let (factors, w) = step_zero(data, t, &offsets, cancel)?;
        let prep = Prepared {
            n_obs: t,
            names: data.equations.iter().map(|e| e.name.clone()).collect(),
            regressors: data
                .equations
                .iter()
                .map(|e| e.regressors.clone())
                .collect(),
            offsets,
            factors,
            cross: CrossProducts::ResidualsOnly {
                qq: Array2::zeros((n, n)),
            },
        };
        Ok((prep, w))
    }

    pub fn n_eq(&self) -> usize {
        self.names.len()
    }

    /// Root mean square of each dependent variable, ||y_i|| / sqrt(T), from ||y||^2 =
    /// ||z||^2 + rho^2, computed without overflow.
    pub fn y_scales(&self) -> Vec<f64> {
        let t = (self.n_obs as f64).sqrt();
        self.factors
            .iter()
            .map(|f| {
                let m = f.z.iter().fold(f.rho.abs(), |a, b| a.max(b.abs()));
                if m == 0.0 {
                    return 0.0;
                }
                let s: f64 =
                    f.z.iter().map(|v| (v / m) * (v / m)).sum::<f64>() + (f.rho / m) * (f.rho / m);
                m * s.sqrt() / t
            })
            .collect()
    }

    pub fn n_coef(&self) -> usize {
        *self.offsets.last().unwrap()
    }

    pub fn k(&self, i: usize) -> usize {
        self.offsets[i + 1] - self.offsets[i]
    }

    /// OLS coefficients in the orthonormal basis, stacked.
    pub fn z(&self) -> Array1<f64> {
        let mut z = Array1::zeros(self.n_coef());
        for (i, f) in self.factors.iter().enumerate() {
            z.slice_mut(s![self.offsets[i]..self.offsets[i + 1]])
                .assign(&f.z);
        }
        z
    }

    /// b_i = R_i^-1 gamma_i for every equation.
    pub fn coef_from_gamma(&self, gamma: &Array1<f64>) -> Result<Array1<f64>> {
        let mut b = Array1::zeros(self.n_coef());
        for (i, f) in self.factors.iter().enumerate() {
            let (a, c) = (self.offsets[i], self.offsets[i + 1]);
            let bi = upper_solve(&f.r, &gamma.slice(s![a..c]).to_owned())?;
            b.slice_mut(s![a..c]).assign(&bi);
        }
        Ok(b)
    }

    /// Residual cross-products S (N x N) at delta = gamma - z.
    pub fn residual_crossprod(&self, delta: &Array1<f64>) -> Array2<f64> {
        let n = self.n_eq();
        let k = self.n_coef();
        let rho: Vec<f64> = self.factors.iter().map(|f| f.rho).collect();
        let mut out = crate::kernels::zeros_advised((n, n));
        match &self.cross {
            CrossProducts::MatrixFree { .. } => return self.crossprod_w(delta),
            CrossProducts::ResidualsOnly { qq } => {
                // `estimate_with` lets only OLS (delta = 0) run on these cross-products
                assert!(
                    delta.iter().all(|v| *v == 0.0),
                    "residual cross-products away from OLS need the Gram matrix"
                );
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
                let g = match gram
                    .as_slice_memory_order()
                    .filter(|_| gram.t().is_standard_layout())
                {
                    Some(g) => g,
                    None => {
                        copy = crate::kernels::to_fortran(gram);
                        copy.as_slice_memory_order().expect("column-major copy")
                    }
                };
                let dl: std::borrow::Cow<[f64]> = delta
                    .as_slice()
                    .map_or_else(|| delta.to_vec().into(), Into::into);
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
                        crate::kernels::simd::sub_combination_with(
                            crate::kernels::simd::Isa::Best,
                            ga,
                            d,
                            |c| &g[(a + c) * p + a..(a + c + 1) * p],
                        );
                    }
                    // plain slices: an ndarray view per (i, j) pair cost more than its few products
                    for i in j..n {
                        let (c, e) = (self.offsets[i], self.offsets[i + 1]);
                        let q: f64 = dl[c..e]
                            .iter()
                            .zip(&ga[c - a..e - a])
                            .map(|(x, y)| x * y)
                            .sum();
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
        let b = self
            .coef_from_gamma(&self.z())
            .unwrap_or_else(|_| Array1::zeros(self.n_coef()));
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
    /// W = [Q_1 .. Q_N, q_1 .. q_N] itself (the matrix-free path keeps it).
    pub(crate) fn w(&self) -> &Array2<f64> {
        match &self.cross {
            CrossProducts::MatrixFree { w } => w,
            _ => unreachable!("only on the matrix-free path"),
        }
    }

    /// [Q_1 v_1 .. Q_N v_N] (T x N).
    pub(crate) fn spread(&self, v: &Array1<f64>) -> Array2<f64> {
        let w = self.w();
        let n = self.n_eq();
        let mut u = Array2::<f64>::zeros((self.n_obs, n).f());
        for i in 0..n {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            u.column_mut(i)
                .assign(&w.slice(s![.., a..b]).dot(&v.slice(s![a..b])));
        }
        u
    }

    /// (Q_i' V[:, i]) stacked (K).
    pub(crate) fn gather(&self, v: &Array2<f64>) -> Array1<f64> {
        let w = self.w();
        let mut out = Array1::<f64>::zeros(self.n_coef());
        for i in 0..self.n_eq() {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            out.slice_mut(s![a..b])
                .assign(&w.slice(s![.., a..b]).t().dot(&v.column(i)));
        }
        out
    }

    /// Residual rows E (T x N) at delta, from W: e_i = rho_i q_i - Q_i delta_i.
    pub(crate) fn residual_rows_w(&self, delta: &Array1<f64>) -> Array2<f64> {
        let w = self.w();
        let k = self.n_coef();
        let mut e = self.spread(delta);
        e.mapv_inplace(|v| -v);
        for (i, f) in self.factors.iter().enumerate() {
            e.column_mut(i).scaled_add(f.rho, &w.column(k + i));
        }
        e
    }

    /// Residual cross-products on the matrix-free path: E'E.
    pub(crate) fn crossprod_w(&self, delta: &Array1<f64>) -> Array2<f64> {
        gram(self.residual_rows_w(delta).view())
    }
}
