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

use ndarray::{s, Array1, Array2, ArrayView1, ShapeBuilder};

use crate::error::{Result, SurError};
use crate::linalg::{fmt_num, gram, gram_blocked, thin_qr, triangular_condition, upper_solve};
use crate::system::{Equation, SystemData};

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
    pub fn new_matrix_free(data: &SystemData, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Prepared> {
        Self::build(data, cancel, true)
    }

    fn build(data: &SystemData, cancel: &(dyn Fn() -> bool + Sync), matrix_free: bool) -> Result<Prepared> {
        let t = data.validate()?;
        let n = data.n_eq();
        let mut offsets = vec![0usize];
        for eq in &data.equations {
            offsets.push(offsets.last().unwrap() + eq.n_regressors());
        }
        let k = offsets[n];
        let names: Vec<String> = data.equations.iter().map(|e| e.name.clone()).collect();
        let regressors: Vec<Vec<String>> = data.equations.iter().map(|e| e.regressors.clone()).collect();

        if n > 1 && !matrix_free && data.identical_regressors() {
            let (factors, qq) = shared_regressors(data, t)?;
            return Ok(Prepared { n_obs: t, names, regressors, offsets, factors, cross: CrossProducts::SharedRegressors { qq } });
        }

        let p = k + n;
        let mut w = Array2::<f64>::zeros((t, p).f());
        let mut factors = Vec::with_capacity(n);
        for (i, eq) in data.equations.iter().enumerate() {
            if cancel() {
                return Err(SurError::Interrupted);
            }
            let (q, qy, f) = factor_equation(eq, t)?;
            w.slice_mut(s![.., offsets[i]..offsets[i + 1]]).assign(&q);
            w.column_mut(k + i).assign(&qy);
            factors.push(f);
        }
        let colsum = w.sum_axis(ndarray::Axis(0));
        for (i, f) in factors.iter_mut().enumerate() {
            let s2: f64 = colsum.slice(s![offsets[i]..offsets[i + 1]]).iter().map(|v| v * v).sum();
            f.spans_constant = (t as f64 - s2).abs() <= 1e-9 * t as f64;
        }
        if matrix_free {
            return Ok(Prepared { n_obs: t, names, regressors, offsets, factors, cross: CrossProducts::MatrixFree { w } });
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
        Ok(Prepared { n_obs: t, names, regressors, offsets, factors, cross: CrossProducts::General { gram: g } })
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
                let s: f64 = f.z.iter().map(|v| (v / m) * (v / m)).sum::<f64>() + (f.rho / m) * (f.rho / m);
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
            z.slice_mut(s![self.offsets[i]..self.offsets[i + 1]]).assign(&f.z);
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
}

/// Column 2-norm, computed with scaling so that huge or tiny columns neither overflow nor underflow.
pub(crate) fn norm(v: ArrayView1<f64>) -> f64 {
    let m = v.iter().fold(0.0f64, |a, b| a.max(b.abs()));
    if m == 0.0 {
        return 0.0;
    }
    m * v.iter().map(|x| (x / m) * (x / m)).sum::<f64>().sqrt()
}

fn tss(y: ArrayView1<f64>) -> (f64, f64) {
    let n = y.len() as f64;
    let mean = y.sum() / n;
    let c: f64 = y.iter().map(|v| (v - mean) * (v - mean)).sum();
    let r: f64 = y.iter().map(|v| v * v).sum();
    (c, r)
}

/// Relative tolerance on the diagonal of the column-scaled R below which a column counts as a
/// linear combination of the earlier ones (the usual max(T, K) * eps rank rule).
fn rank_tol(t: usize, k: usize) -> f64 {
    10.0 * (t.max(k) as f64) * f64::EPSILON
}

/// QR of a column-scaled matrix [X_i | extra columns]: returns Q (T x K_i + m), R of the scaled
/// problem, and the column norms of X_i. Checks X_i for zero and collinear columns.
fn scaled_qr(eq: &Equation, extra: &[ArrayView1<f64>], t: usize) -> Result<(Array2<f64>, Array2<f64>, Vec<f64>)> {
    let k = eq.n_regressors();
    let mut a = Array2::<f64>::zeros((t, k + extra.len()).f());
    let mut norms = Vec::with_capacity(k);
    for j in 0..k {
        let col = eq.x.column(j);
        let nj = norm(col);
        if nj == 0.0 {
            return Err(zero_column(&eq.name, &eq.regressors[j]));
        }
        a.column_mut(j).zip_mut_with(&col, |d, s| *d = s / nj);
        norms.push(nj);
    }
    for (m, e) in extra.iter().enumerate() {
        a.column_mut(k + m).assign(e);
    }
    let (q, r) = thin_qr(a).map_err(|e| SurError::numerical(&format!("QR of equation '{}'", eq.name), e))?;
    check_rank(&eq.name, &eq.regressors, &r, &norms, t)?;
    Ok((q, r, norms))
}

fn zero_column(name: &str, column: &str) -> SurError {
    SurError::Collinear { equation: name.to_string(), column: column.to_string(), detail: "is zero in every row".into() }
}

/// Rank check on the R factor of the column-scaled regressors (its first K columns).
pub(crate) fn check_rank(name: &str, regressors: &[String], rs: &Array2<f64>, norms: &[f64], t: usize) -> Result<()> {
    let k = norms.len();
    for (j, nj) in norms.iter().enumerate() {
        if *nj == 0.0 {
            return Err(zero_column(name, &regressors[j]));
        }
    }
    let tol = rank_tol(t, k);
    for j in 0..k {
        if rs[[j, j]].abs() <= tol {
            return Err(collinear_error(name, regressors, rs, norms, j));
        }
    }
    Ok(())
}

/// Names the earlier columns that column j is a combination of, with the weights in data units.
fn collinear_error(name: &str, regressors: &[String], r: &Array2<f64>, norms: &[f64], j: usize) -> SurError {
    let detail = if j == 0 {
        "is numerically zero".to_string()
    } else {
        let rj = r.slice(s![..j, ..j]).to_owned();
        let c = upper_solve(&rj, &r.slice(s![..j, j]).to_owned());
        match c {
            Ok(c) => {
                let w: Vec<f64> = (0..j).map(|l| c[l] * norms[j] / norms[l]).collect();
                let wmax = w.iter().fold(0.0f64, |a, b| a.max(b.abs()));
                let terms: Vec<String> = (0..j)
                    .filter(|&l| w[l].abs() > 1e-8 * wmax)
                    .map(|l| format!("{} * '{}'", fmt_num(w[l]), regressors[l]))
                    .collect();
                format!(
                    "is a linear combination of earlier regressors (column {j} = {})",
                    if terms.is_empty() { "0".to_string() } else { terms.join(" + ") }
                )
            }
            Err(_) => "is a linear combination of earlier regressors".to_string(),
        }
    };
    SurError::Collinear { equation: name.to_string(), column: regressors[j].clone(), detail }
}

pub(crate) fn cond_of_scaled(rs: &Array2<f64>, k: usize) -> f64 {
    triangular_condition(&rs.slice(s![..k, ..k]).to_owned())
}

/// Step 0 for one equation: Q_i (T x K_i), q_i (T) and the factor.
fn factor_equation(eq: &Equation, t: usize) -> Result<(Array2<f64>, Array1<f64>, EquationFactor)> {
    let k = eq.n_regressors();
    let ynorm = norm(eq.y);
    let yscale = if ynorm > 0.0 { ynorm } else { 1.0 };
    let ys = eq.y.mapv(|v| v / yscale);
    let (q, rs, norms) = scaled_qr(eq, &[ys.view()], t)?;
    let mut r = rs.slice(s![..k, ..k]).to_owned();
    for j in 0..k {
        r.column_mut(j).mapv_inplace(|v| v * norms[j]);
    }
    let z = rs.slice(s![..k, k]).mapv(|v| v * yscale);
    let last = rs[[k, k]];
    let sign = if last < 0.0 { -1.0 } else { 1.0 };
    let rho = last.abs() * yscale;
    let qy = q.column(k).mapv(|v| v * sign);
    let (tss_centred, tss_raw) = tss(eq.y);
    let cond = cond_of_scaled(&rs, k);
    let qx = q.slice(s![.., ..k]).to_owned();
    Ok((qx, qy, EquationFactor { r, z, rho, spans_constant: false, tss_centred, tss_raw, cond }))
}

/// Steps 0 and 1 when every equation has the same regressors: one QR for X, and the residual
/// matrix E = Y - Q Q'Y (T x N) in place of the P x P Gram matrix.
fn shared_regressors(data: &SystemData, t: usize) -> Result<(Vec<EquationFactor>, Array2<f64>)> {
    let eq0 = &data.equations[0];
    let k = eq0.n_regressors();
    let (q, rs, norms) = scaled_qr(eq0, &[], t)?;
    let mut r = rs.clone();
    for j in 0..k {
        r.column_mut(j).mapv_inplace(|v| v * norms[j]);
    }
    let n = data.n_eq();
    let mut y = Array2::<f64>::zeros((t, n).f());
    for (i, eq) in data.equations.iter().enumerate() {
        y.column_mut(i).assign(&eq.y);
    }
    let zmat = q.t().dot(&y); // K x N
    let mut e = y;
    e -= &q.dot(&zmat);
    // Reorthogonalise once: removes what rounding left of the projection (twice is enough).
    let corr = q.t().dot(&e);
    e -= &q.dot(&corr);
    let zmat = zmat + corr;
    let colsum = q.sum_axis(ndarray::Axis(0));
    let spans = (t as f64 - colsum.dot(&colsum)).abs() <= 1e-9 * t as f64;
    let cond = cond_of_scaled(&rs, k);
    let mut factors = Vec::with_capacity(n);
    let mut rho = Vec::with_capacity(n);
    for (i, eq) in data.equations.iter().enumerate() {
        let rh = norm(e.column(i));
        let (tss_centred, tss_raw) = tss(eq.y);
        factors.push(EquationFactor {
            r: r.clone(),
            z: zmat.column(i).to_owned(),
            rho: rh,
            spans_constant: spans,
            tss_centred,
            tss_raw,
            cond,
        });
        rho.push(rh);
    }
    for (i, &rh) in rho.iter().enumerate() {
        if rh > 0.0 {
            e.column_mut(i).mapv_inplace(|v| v / rh);
        }
    }
    let mut qq = gram(e.view());
    for (i, &rh) in rho.iter().enumerate() {
        if rh > 0.0 {
            qq[[i, i]] = 1.0;
        }
    }
    Ok((factors, qq))
}
