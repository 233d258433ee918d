//! The matrix-free GLS step for systems whose K x K matrices would not fit in memory.
//!
//! With W = [Q_1 .. Q_N, q_1 .. q_N] kept (T x P), the GLS matrix acts on v as
//! U = [Q_1 v_1 .. Q_N v_N] (T x N), V = U Omega^-1, (M v)_i = Q_i' V[:, i]: T (2K + N^2) flops
//! and O(T N) memory, or T (2K + 4 T N) when Omega is a diagonal plus a rank-T matrix (shrinkage),
//! applied by the Woodbury identity. M_ii = sigma^{ii} I gives a free block-diagonal (scalar
//! per block) preconditioner for conjugate gradients.

use ndarray::{s, Array1, Array2, ShapeBuilder};

use super::omega::invert_omega;
use super::pcg::{pcg, End};
use crate::error::{Result, SurError};
use crate::kernels::{chol_inverse, chol_lower, matmul, symmetrize};
use crate::prepare::{CrossProducts, Prepared};

/// Omega^-1 as an operator on T x N matrices (U -> U Omega^-1).
pub(crate) enum OmegaOp {
    Dense(Array2<f64>),
    /// Omega = diag(d) + c E'E (E: T x N): U Omega^-1 = U D^-1 - (U D^-1 E') C^-1 (E D^-1),
    /// C = I/c + E D^-1 E' (T x T).
    LowRank {
        dinv: Array1<f64>,
        f: Array2<f64>,
        e: Array2<f64>,
        cinv: Array2<f64>,
    },
}

impl OmegaOp {
    /// Chooses the Woodbury form when Omega = lambda * target + (1 - lambda) E'E / T with a
    /// diagonal target and lambda > 0; the dense inverse otherwise.
    pub(crate) fn new(
        prep: &Prepared,
        omega: &Array2<f64>,
        low_rank: Option<(&Array1<f64>, f64, &Array2<f64>)>,
    ) -> Result<(OmegaOp, f64)> {
        match low_rank {
            Some((diag, c, e)) if diag.iter().all(|v| *v > 0.0) && c > 0.0 => {
                let dinv = diag.mapv(|v| 1.0 / v);
                let mut f = e.clone();
                for (mut col, di) in f.columns_mut().into_iter().zip(dinv.iter()) {
                    col *= *di;
                }
                let t = e.nrows();
                let mut cm = matmul(f.view(), e.t());
                for i in 0..t {
                    cm[[i, i]] += 1.0 / c;
                }
                symmetrize(&mut cm);
                let l = chol_lower(crate::kernels::to_fortran(&cm)).ok_or_else(|| {
                    SurError::numerical("Woodbury form of Omega", "not positive definite")
                })?;
                let cinv = chol_inverse(&l)?;
                Ok((
                    OmegaOp::LowRank {
                        dinv,
                        f,
                        e: e.clone(),
                        cinv,
                    },
                    f64::NAN,
                ))
            }
            _ => {
                let (inv, cond) = invert_omega(omega, &prep.names, prep.n_obs, &prep.y_scales())?;
                Ok((OmegaOp::Dense(inv), cond))
            }
        }
    }

    pub(crate) fn apply(&self, u: &Array2<f64>) -> Array2<f64> {
        match self {
            OmegaOp::Dense(inv) => matmul(u.view(), inv.view()),
            OmegaOp::LowRank { dinv, f, e, cinv } => {
                let mut ud = u.clone();
                for (mut col, di) in ud.columns_mut().into_iter().zip(dinv.iter()) {
                    col *= *di;
                }
                let g = matmul(matmul(ud.view(), e.t()).view(), cinv.view()); // T x T
                ud - matmul(g.view(), f.view())
            }
        }
    }

    /// The diagonal of Omega^-1.
    pub(crate) fn diag(&self) -> Array1<f64> {
        match self {
            OmegaOp::Dense(inv) => inv.diag().to_owned(),
            OmegaOp::LowRank { dinv, f, cinv, .. } => {
                let cf = matmul(cinv.view(), f.view());
                let n = f.ncols();
                Array1::from_shape_fn(n, |i| dinv[i] - f.column(i).dot(&cf.column(i)))
            }
        }
    }
}

/// M v on the matrix-free path: gather(spread(v) Omega^-1).
fn apply_m(prep: &Prepared, op: &OmegaOp, v: &Array1<f64>) -> Array1<f64> {
    prep.gather(&op.apply(&prep.spread(v)))
}

/// Solves M delta = h by preconditioned conjugate gradients from `start`, M applied through W
/// and preconditioned by its diagonal blocks sigma^{ii} I. Returns delta, the iteration count
/// and the final relative residual ||h - M delta|| / ||h||.
pub(crate) fn cg_solve(
    prep: &Prepared,
    op: &OmegaOp,
    start: &Array1<f64>,
    tol: f64,
    max_iter: usize,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<(Array1<f64>, usize, f64)> {
    let w = prep.w();
    let k = prep.n_coef();
    let n = prep.n_eq();
    // h = gather([rho_j q_j] Omega^-1)
    let mut z = Array2::<f64>::zeros((prep.n_obs, n).f());
    for (i, f) in prep.factors.iter().enumerate() {
        z.column_mut(i).scaled_add(f.rho, &w.column(k + i));
    }
    let h = prep.gather(&op.apply(&z));
    solve(prep, op, &h, start, tol, max_iter, cancel)
}

/// `cg_solve` for a given right-hand side.
fn solve(
    prep: &Prepared,
    op: &OmegaOp,
    h: &Array1<f64>,
    start: &Array1<f64>,
    tol: f64,
    max_iter: usize,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<(Array1<f64>, usize, f64)> {
    let sdiag = op.diag();
    let mut pre = vec![0.0; prep.n_coef()];
    for i in 0..prep.n_eq() {
        pre[prep.offsets[i]..prep.offsets[i + 1]].fill(1.0 / sdiag[i]);
    }
    let hnorm = h.dot(h).sqrt();
    if hnorm == 0.0 {
        return Ok((Array1::zeros(prep.n_coef()), 0, 0.0));
    }
    let hs = h.as_slice().expect("contiguous");
    let done = |_: &[f64], r: &[f64]| crate::kernels::dot(r, r).sqrt() / hnorm <= tol;
    let (x, its, end) = pcg(
        &mut |v, out| {
            out.copy_from_slice(
                apply_m(prep, op, &Array1::from(v.to_vec()))
                    .as_slice()
                    .expect("contiguous"),
            )
        },
        &mut |z| z.iter_mut().zip(&pre).for_each(|(a, p)| *a *= p),
        hs,
        &start.to_vec(),
        max_iter,
        50,
        &done,
        cancel,
    )?;
    if end == End::LostCurvature {
        return Err(SurError::numerical(
            "conjugate gradients",
            "the GLS matrix lost positive definiteness",
        ));
    }
    let x = Array1::from(x);
    let r = h - &apply_m(prep, op, &x);
    Ok((x, its, r.dot(&r).sqrt() / hnorm))
}

/// Standard errors of the coefficients of the given equations on the matrix-free path:
/// the diagonal of R_i^-1 (M^-1)_ii R_i^-T, with (M^-1)_ii from K_i conjugate-gradient solves.
pub(crate) fn cg_standard_errors(
    prep: &Prepared,
    omega: &Array2<f64>,
    equations: &[usize],
    tol: f64,
    max_iter: usize,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<Vec<Array1<f64>>> {
    if !matches!(prep.cross, CrossProducts::MatrixFree { .. }) {
        return Err(SurError::InvalidOption(
            "cg_standard_errors is for the matrix-free path".into(),
        ));
    }
    if omega.dim() != (prep.n_eq(), prep.n_eq()) {
        return Err(SurError::InvalidOption(
            "Omega does not belong to this system".into(),
        ));
    }
    let (op, _) = OmegaOp::new(prep, omega, None)?;
    let k = prep.n_coef();
    let mut out = Vec::new();
    for &i in equations {
        if i >= prep.n_eq() {
            return Err(SurError::InvalidOption(format!("no equation number {i}")));
        }
        let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
        let ki = b - a;
        let mut block = Array2::<f64>::zeros((ki, ki));
        for j in 0..ki {
            let mut e = Array1::<f64>::zeros(k);
            e[a + j] = 1.0;
            let (x, _, _) = solve(prep, &op, &e, &Array1::zeros(k), tol, max_iter, cancel)?;
            block.column_mut(j).assign(&x.slice(s![a..b]));
        }
        symmetrize(&mut block);
        let rinv = crate::kernels::upper_inverse(&prep.factors[i].r)?;
        let cov = rinv.dot(&block).dot(&rinv.t());
        out.push(cov.diag().mapv(|v| v.max(0.0).sqrt()));
    }
    Ok(out)
}
