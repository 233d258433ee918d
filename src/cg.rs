//! The matrix-free GLS step for systems whose K x K matrices would not fit in memory, and the
//! Ledoit-Wolf shrinkage of Omega for systems with nearly as many equations as observations.
//!
//! With W = [Q_1 .. Q_N, q_1 .. q_N] kept (T x P), the GLS matrix acts on v as
//! U = [Q_1 v_1 .. Q_N v_N] (T x N), V = U Omega^-1, (M v)_i = Q_i' V[:, i]: T (2K + N^2) flops
//! and O(T N) memory, or T (2K + 4 T N) when Omega is a diagonal plus a rank-T matrix (shrinkage),
//! applied by the Woodbury identity. M_ii = sigma^{ii} I gives a free block-diagonal (scalar
//! per block) preconditioner for conjugate gradients.

use ndarray::{s, Array1, Array2, ShapeBuilder};

use crate::error::{Result, SurError};
use crate::linalg::{chol_inverse, chol_lower, gram, invert_omega, symmetrize};
use crate::prepare::{CrossProducts, Prepared};

/// Omega^-1 as an operator on T x N matrices (U -> U Omega^-1).
pub(crate) enum OmegaOp {
    Dense(Array2<f64>),
    /// Omega = diag(d) + c E'E (E: T x N): U Omega^-1 = U D^-1 - (U D^-1 E') C^-1 (E D^-1),
    /// C = I/c + E D^-1 E' (T x T).
    LowRank { dinv: Array1<f64>, f: Array2<f64>, e: Array2<f64>, cinv: Array2<f64> },
}

impl OmegaOp {
    /// Chooses the Woodbury form when Omega = lambda * target + (1 - lambda) E'E / T with a
    /// diagonal target and lambda > 0; the dense inverse otherwise.
    pub(crate) fn new(prep: &Prepared, omega: &Array2<f64>, low_rank: Option<(&Array1<f64>, f64, &Array2<f64>)>) -> Result<(OmegaOp, f64)> {
        match low_rank {
            Some((diag, c, e)) if diag.iter().all(|v| *v > 0.0) && c > 0.0 => {
                let dinv = diag.mapv(|v| 1.0 / v);
                let mut f = e.clone();
                for (mut col, di) in f.columns_mut().into_iter().zip(dinv.iter()) {
                    col *= *di;
                }
                let t = e.nrows();
                let mut cm = f.dot(&e.t());
                for i in 0..t {
                    cm[[i, i]] += 1.0 / c;
                }
                symmetrize(&mut cm);
                let l = chol_lower(crate::linalg::to_fortran(&cm))
                    .ok_or_else(|| SurError::numerical("Woodbury form of Omega", "not positive definite"))?;
                let cinv = chol_inverse(&l)?;
                Ok((OmegaOp::LowRank { dinv, f, e: e.clone(), cinv }, f64::NAN))
            }
            _ => {
                let (inv, cond) = invert_omega(omega, &prep.names, prep.n_obs, &prep.y_scales())?;
                Ok((OmegaOp::Dense(inv), cond))
            }
        }
    }

    pub(crate) fn apply(&self, u: &Array2<f64>) -> Array2<f64> {
        match self {
            OmegaOp::Dense(inv) => u.dot(inv),
            OmegaOp::LowRank { dinv, f, e, cinv } => {
                let mut ud = u.clone();
                for (mut col, di) in ud.columns_mut().into_iter().zip(dinv.iter()) {
                    col *= *di;
                }
                let g = ud.dot(&e.t()).dot(cinv); // T x T
                ud - g.dot(f)
            }
        }
    }

    /// The diagonal of Omega^-1.
    pub(crate) fn diag(&self) -> Array1<f64> {
        match self {
            OmegaOp::Dense(inv) => inv.diag().to_owned(),
            OmegaOp::LowRank { dinv, f, cinv, .. } => {
                let cf = cinv.dot(f);
                let n = f.ncols();
                Array1::from_shape_fn(n, |i| dinv[i] - f.column(i).dot(&cf.column(i)))
            }
        }
    }
}

impl Prepared {
    fn w(&self) -> &Array2<f64> {
        match &self.cross {
            CrossProducts::MatrixFree { w } => w,
            _ => unreachable!("only on the matrix-free path"),
        }
    }

    /// [Q_1 v_1 .. Q_N v_N] (T x N).
    fn spread(&self, v: &Array1<f64>) -> Array2<f64> {
        let w = self.w();
        let n = self.n_eq();
        let mut u = Array2::<f64>::zeros((self.n_obs, n).f());
        for i in 0..n {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            u.column_mut(i).assign(&w.slice(s![.., a..b]).dot(&v.slice(s![a..b])));
        }
        u
    }

    /// (Q_i' V[:, i]) stacked (K).
    fn gather(&self, v: &Array2<f64>) -> Array1<f64> {
        let w = self.w();
        let mut out = Array1::<f64>::zeros(self.n_coef());
        for i in 0..self.n_eq() {
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            out.slice_mut(s![a..b]).assign(&w.slice(s![.., a..b]).t().dot(&v.column(i)));
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

    /// Solves M delta = h by preconditioned conjugate gradients, from `start`. Returns delta, the
    /// iteration count and the final relative residual ||h - M delta|| / ||h||.
    pub(crate) fn cg_solve(
        &self,
        op: &OmegaOp,
        start: &Array1<f64>,
        tol: f64,
        max_iter: usize,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<(Array1<f64>, usize, f64)> {
        let w = self.w();
        let k = self.n_coef();
        let n = self.n_eq();
        // h = gather([rho_j q_j] Omega^-1)
        let mut z = Array2::<f64>::zeros((self.n_obs, n).f());
        for (i, f) in self.factors.iter().enumerate() {
            z.column_mut(i).scaled_add(f.rho, &w.column(k + i));
        }
        let h = self.gather(&op.apply(&z));
        self.pcg(op, &h, start, tol, max_iter, cancel)
    }

    fn apply_m(&self, op: &OmegaOp, v: &Array1<f64>) -> Array1<f64> {
        self.gather(&op.apply(&self.spread(v)))
    }

    fn pcg(
        &self,
        op: &OmegaOp,
        h: &Array1<f64>,
        start: &Array1<f64>,
        tol: f64,
        max_iter: usize,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<(Array1<f64>, usize, f64)> {
        let sdiag = op.diag();
        let mut pre = Array1::<f64>::zeros(self.n_coef());
        for i in 0..self.n_eq() {
            pre.slice_mut(s![self.offsets[i]..self.offsets[i + 1]]).fill(1.0 / sdiag[i]);
        }
        let hnorm = h.dot(h).sqrt();
        if hnorm == 0.0 {
            return Ok((Array1::zeros(self.n_coef()), 0, 0.0));
        }
        let mut x = start.clone();
        let mut r = h - &self.apply_m(op, &x);
        let mut zv = &r * &pre;
        let mut p = zv.clone();
        let mut rz = r.dot(&zv);
        let mut rel = r.dot(&r).sqrt() / hnorm;
        let mut it = 0;
        while rel > tol && it < max_iter {
            if it % 8 == 0 && cancel() {
                return Err(SurError::Interrupted);
            }
            let mp = self.apply_m(op, &p);
            let pmp = p.dot(&mp);
            if pmp.is_nan() || pmp <= 0.0 {
                return Err(SurError::numerical("conjugate gradients", "the GLS matrix lost positive definiteness"));
            }
            let alpha = rz / pmp;
            x.scaled_add(alpha, &p);
            r.scaled_add(-alpha, &mp);
            it += 1;
            // recompute the true residual now and then against drift
            if it % 50 == 0 {
                r = h - &self.apply_m(op, &x);
            }
            rel = r.dot(&r).sqrt() / hnorm;
            zv = &r * &pre;
            let rz_new = r.dot(&zv);
            let beta = rz_new / rz;
            rz = rz_new;
            p = &zv + &(beta * &p);
        }
        Ok((x, it, rel))
    }

    /// Standard errors of the coefficients of the given equations on the matrix-free path:
    /// the diagonal of R_i^-1 (M^-1)_ii R_i^-T, with (M^-1)_ii from K_i conjugate-gradient solves.
    pub fn cg_standard_errors(
        &self,
        omega: &Array2<f64>,
        equations: &[usize],
        tol: f64,
        max_iter: usize,
        cancel: &(dyn Fn() -> bool + Sync),
    ) -> Result<Vec<Array1<f64>>> {
        if !matches!(self.cross, CrossProducts::MatrixFree { .. }) {
            return Err(SurError::InvalidOption("cg_standard_errors is for the matrix-free path".into()));
        }
        if omega.dim() != (self.n_eq(), self.n_eq()) {
            return Err(SurError::InvalidOption("Omega does not belong to this system".into()));
        }
        let (op, _) = OmegaOp::new(self, omega, None)?;
        let k = self.n_coef();
        let mut out = Vec::new();
        for &i in equations {
            if i >= self.n_eq() {
                return Err(SurError::InvalidOption(format!("no equation number {i}")));
            }
            let (a, b) = (self.offsets[i], self.offsets[i + 1]);
            let ki = b - a;
            let mut block = Array2::<f64>::zeros((ki, ki));
            for j in 0..ki {
                let mut e = Array1::<f64>::zeros(k);
                e[a + j] = 1.0;
                let (x, _, _) = self.pcg(&op, &e, &Array1::zeros(k), tol, max_iter, cancel)?;
                block.column_mut(j).assign(&x.slice(s![a..b]));
            }
            symmetrize(&mut block);
            let rinv = crate::linalg::upper_inverse(&self.factors[i].r)?;
            let cov = rinv.dot(&block).dot(&rinv.t());
            out.push(cov.diag().mapv(|v| v.max(0.0).sqrt()));
        }
        Ok(out)
    }
}

/// Ledoit-Wolf shrinkage of the ML covariance S/T of residual rows E (T x N).
/// `identity`: towards mu I, mu = trace/N, with the intensity of Ledoit & Wolf (2004) as
/// scikit-learn computes it; otherwise towards the diagonal of S/T, with intensity
/// sum_{i != j} Var(s_ij) / (T sum_{i != j} s_ij^2) clipped to [0, 1] (the same estimator of the
/// variance of each sample covariance). Returns (Omega, intensity, diagonal of the target).
pub fn ledoit_wolf(e: &Array2<f64>, s: &Array2<f64>, identity: bool) -> (Array2<f64>, f64, Array1<f64>) {
    let t = e.nrows() as f64;
    let n = e.ncols();
    let sml = s / t;
    // sum_t ||e_t||^4 and sum_t sum_i e_ti^4
    let (mut a, mut b) = (0.0, 0.0);
    for row in e.rows() {
        let sq: f64 = row.iter().map(|v| v * v).sum();
        a += sq * sq;
        b += row.iter().map(|v| v * v * v * v).sum::<f64>();
    }
    let fro2: f64 = sml.iter().map(|v| v * v).sum();
    if identity {
        let mu = sml.diag().sum() / n as f64;
        let delta = (fro2 - 2.0 * mu * sml.diag().sum() + n as f64 * mu * mu) / n as f64;
        let beta = ((a / t - fro2) / (n as f64 * t)).min(delta);
        let lambda = if beta <= 0.0 || delta <= 0.0 { 0.0 } else { beta / delta };
        let mut omega = &sml * (1.0 - lambda);
        for i in 0..n {
            omega[[i, i]] += lambda * mu;
        }
        (omega, lambda, Array1::from_elem(n, mu))
    } else {
        let diag2: f64 = sml.diag().iter().map(|v| v * v).sum();
        let off2 = fro2 - diag2;
        let var_off = (a - b) / t - off2;
        let lambda = if off2 <= 0.0 { 1.0 } else { (var_off / (t * off2)).clamp(0.0, 1.0) };
        let mut omega = &sml * (1.0 - lambda);
        for i in 0..n {
            omega[[i, i]] += lambda * sml[[i, i]];
        }
        (omega, lambda, sml.diag().to_owned())
    }
}
