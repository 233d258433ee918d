//! One GLS step for a given Omega (the GLS matrix M = C o sigma^{eq(a) eq(b)} and the right-hand
//! side h, solved by Cholesky or, between the steps of an iterated fit, by conjugate gradients
//! preconditioned with the last factor), and the weight matrix an estimator leaves.

use ndarray::{s, Array1, Array2};

use super::matrix_free::OmegaOp;
use super::omega::{invert_omega, OmegaEst};
use super::pcg::warm_pcg;
use super::{matrix_free_unsupported, needs_full_preparation, FitOptions, Weight};
use crate::error::{Result, SurError};
use crate::kernels::{chol_inverse, chol_lower, chol_solve, chol_solve_mat, matmul};
use crate::prepare::{CrossProducts, Prepared};

/// A singular Omega met after `steps` iterated FGLS steps, when the first Omega was not: the
/// iterations themselves drove it there (the Gaussian likelihood can be unbounded when T is
/// small against the equations and coefficients), which the usual causes do not explain.
pub(crate) fn iterated_singular(e: SurError, steps: usize) -> SurError {
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
pub(crate) type GlsStep = (Array1<f64>, StepWeight, f64, Option<(usize, f64)>);

/// The weight a GLS step leaves: final, or the GLS matrix M (lower triangle) of a step solved
/// by preconditioned conjugate gradients, still to be factored if it is the last step.
pub(crate) enum StepWeight {
    Done(Weight),
    Pending { m: Array2<f64>, iterations: usize },
}

/// Below this many coefficients a fresh Cholesky factor costs less than the conjugate-gradient
/// iterations' bookkeeping (case (a), K = 20: 8 us per direct step, 18 us warm-started).
pub(crate) const PCG_MIN_K: usize = 48;

/// A warm-started solve that needed more iterations than this has the next step factor afresh.
pub(crate) const PCG_REFACTOR: usize = 8;

/// The error of a GLS matrix that is not numerically positive definite.
pub(crate) fn singular_gls(names: &[String], n: usize, t: usize) -> SurError {
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

/// One GLS step for a given Omega: the unrestricted delta, the weight, the condition
/// estimate of Omega, and (matrix-free) the CG iterations and residual.
pub(crate) fn gls_step(
    prep: &Prepared,
    est: &OmegaEst,
    start: &Array1<f64>,
    opts: &FitOptions,
    cancel: &(dyn Fn() -> bool + Sync),
    warm: Option<&Array2<f64>>,
    reuse: Option<Array2<f64>>,
) -> Result<GlsStep> {
    let n = prep.n_eq();
    let k = prep.n_coef();
    let omega = &est.omega;
    if let CrossProducts::MatrixFree { .. } = &prep.cross {
        let lr = est.low_rank.as_ref().map(|(d, c, e)| (d, *c, e));
        let (op, cond) = OmegaOp::new(prep, omega, lr)?;
        let (delta, its, res) = crate::estimate::matrix_free::cg_solve(
            prep,
            &op,
            start,
            opts.cg_tol,
            opts.cg_max_iter,
            cancel,
        )?;
        return Ok((
            delta,
            StepWeight::Done(Weight::MatrixFree),
            cond,
            Some((its, res)),
        ));
    }
    let (sigma_inv, cond) = invert_omega(omega, &prep.names, prep.n_obs, &prep.y_scales())?;
    let gram = match &prep.cross {
        CrossProducts::SharedRegressors { .. } => {
            return Ok((
                Array1::zeros(k),
                StepWeight::Done(Weight::Shared(omega.clone())),
                cond,
                None,
            ))
        }
        CrossProducts::General { gram } => gram,
        CrossProducts::MatrixFree { .. } => unreachable!(),
        CrossProducts::ResidualsOnly { .. } => return Err(needs_full_preparation("a GLS step")),
    };
    let rho = Array1::from_iter(prep.factors.iter().map(|f| f.rho));
    let eq_of: Vec<usize> = (0..n)
        .flat_map(|i| std::iter::repeat_n(i, prep.k(i)))
        .collect();
    // M = C o sigma^{eq(a) eq(b)}, lower triangle only (potrf reads no more), column by column
    // on the contiguous columns of the column-major Gram matrix.
    let p = gram.nrows();
    let gbuf = gram
        .as_slice_memory_order()
        .filter(|_| gram.t().is_standard_layout());
    // every entry the step reads (the lower triangle) is written below, so the last step's
    // matrix can be overwritten: no fresh K x K buffer to fault in and zero at each step
    // (128 MB on a 4000-coefficient system)
    let mut m = match reuse {
        Some(b) if b.dim() == (k, k) && b.t().is_standard_layout() => b,
        _ => crate::kernels::zeros_for_product(k),
    };
    {
        let mbuf = m
            .as_slice_memory_order_mut()
            .expect("fresh column-major array");
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
                        let (end, w) = (prep.offsets[e + 1], sig[e]);
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
    let chol = factor_gls(prep, m, true)?;
    let delta = chol_solve(&chol, &h)?;
    Ok((delta, StepWeight::Done(Weight::Chol(chol)), cond, None))
}

/// The Cholesky factor of the GLS matrix M (lower triangle given), or the singular-Omega
/// error that says why it has none.
/// `upper_is_zero`: M was built in a zeroed buffer with its lower triangle alone written
/// (see `gls_step`).
pub(crate) fn factor_gls(
    prep: &Prepared,
    m: Array2<f64>,
    upper_is_zero: bool,
) -> Result<Array2<f64>> {
    crate::kernels::chol_lower_of(m, upper_is_zero)
        .ok_or_else(|| singular_gls(&prep.names, prep.n_eq(), prep.n_obs))
}

/// W^-1 V for a K x m matrix V.
pub(crate) fn weight_solve(prep: &Prepared, w: &Weight, v: &Array2<f64>) -> Result<Array2<f64>> {
    match w {
        Weight::Identity => Ok(v.clone()),
        Weight::MatrixFree => Err(matrix_free_unsupported("this covariance or restriction")),
        Weight::Chol(l) => chol_solve_mat(l, v),
        Weight::Shared(omega) => {
            let mut out = Array2::<f64>::zeros(v.dim());
            for i in 0..prep.n_eq() {
                let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
                for j in 0..prep.n_eq() {
                    let (c, d) = (prep.offsets[j], prep.offsets[j + 1]);
                    out.slice_mut(s![a..b, ..])
                        .scaled_add(omega[[i, j]], &v.slice(s![c..d, ..]));
                }
            }
            Ok(out)
        }
    }
}

/// W^-1 (K x K).
pub(crate) fn weight_inverse(prep: &Prepared, w: &Weight) -> Result<Array2<f64>> {
    match w {
        Weight::Chol(l) => chol_inverse(l),
        _ => weight_solve(prep, w, &Array2::eye(prep.n_coef())),
    }
}

/// M X for the weight M of an estimator (I for OLS).
pub(crate) fn weight_apply(prep: &Prepared, w: &Weight, x: &Array2<f64>) -> Result<Array2<f64>> {
    match w {
        Weight::Identity => Ok(x.clone()),
        Weight::Chol(l) => Ok(matmul(l.view(), matmul(l.t(), x.view()).view())),
        Weight::Shared(omega) => {
            let (sigma, _) = invert_omega(omega, &prep.names, prep.n_obs, &prep.y_scales())?;
            weight_solve(prep, &Weight::Shared(sigma), x)
        }
        Weight::MatrixFree => Err(matrix_free_unsupported("restrictions")),
    }
}

/// The lower Cholesky factor L of the weight W = L L' (None for W = I).
pub(crate) fn weight_factor<'w>(
    prep: &Prepared,
    w: &'w Weight,
) -> Result<Option<std::borrow::Cow<'w, Array2<f64>>>> {
    use std::borrow::Cow;
    Ok(match w {
        Weight::Identity => None,
        Weight::Chol(l) => Some(Cow::Borrowed(l)),
        Weight::Shared(_) => {
            let m = weight_apply(prep, w, &Array2::eye(prep.n_coef()))?;
            Some(Cow::Owned(
                chol_lower(crate::kernels::to_fortran(&m)).ok_or_else(|| {
                    SurError::numerical("restricted estimation", "GLS matrix not positive definite")
                })?,
            ))
        }
        Weight::MatrixFree => return Err(matrix_free_unsupported("restrictions")),
    })
}

/// Largest relative change of an equation's coefficients in the orthonormal basis, which is
/// the relative change of its fitted values: ||gamma_i(new) - gamma_i(old)|| / ||gamma_i(new)||.
pub(crate) fn criterion(
    prep: &Prepared,
    z: &Array1<f64>,
    old: &Array1<f64>,
    new: &Array1<f64>,
) -> f64 {
    let mut worst = 0.0f64;
    for i in 0..prep.n_eq() {
        let r = s![prep.offsets[i]..prep.offsets[i + 1]];
        let change = (&new.slice(r) - &old.slice(r)).mapv(|v| v * v).sum().sqrt();
        let size = (&z.slice(r) + &new.slice(r)).mapv(|v| v * v).sum().sqrt();
        let denom = size
            .max(prep.factors[i].rho * f64::EPSILON)
            .max(f64::MIN_POSITIVE);
        worst = worst.max(change / denom);
    }
    worst
}
