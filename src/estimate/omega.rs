//! Omega from residual cross-products (ML, degrees-of-freedom, Ledoit-Wolf shrinkage), its
//! inverse with the diagnosis of a singular Omega, and the Gaussian log-likelihood.

use ndarray::{Array1, Array2, ShapeBuilder};

use super::Divisor;
use crate::data::SystemData;
use crate::error::{Result, SurError};
use crate::kernels::{chol_inverse_owned, chol_lower, ln_det_spd, one_norm, zeros_advised};
use crate::prepare::{CrossProducts, Prepared};

/// Omega and what the matrix-free path needs to apply its inverse cheaply.
pub(crate) struct OmegaEst {
    pub(crate) omega: Array2<f64>,
    pub(crate) shrinkage: Option<f64>,
    /// (diagonal part, weight c, residual rows E) when Omega = diag + c E'E.
    pub(crate) low_rank: Option<(Array1<f64>, f64, Array2<f64>)>,
}

/// Omega from residual cross-products (the shrinkage estimators start from S/T and need
/// the residual rows as well: see `omega_at`).
pub(crate) fn omega_from(prep: &Prepared, s: &Array2<f64>, divisor: Divisor) -> Array2<f64> {
    let t = prep.n_obs as f64;
    let mut out = crate::kernels::zeros_advised(s.dim());
    match divisor {
        Divisor::Ml | Divisor::LedoitWolfDiagonal | Divisor::LedoitWolfIdentity => {
            out.zip_mut_with(s, |o, &v| *o = v / t)
        }
        Divisor::Dof => {
            let df: Vec<f64> = (0..prep.n_eq()).map(|i| t - prep.k(i) as f64).collect();
            ndarray::Zip::indexed(&mut out)
                .and(s)
                .for_each(|(i, j), o, &v| *o = v / (df[i] * df[j]).sqrt());
        }
    }
    out
}

/// Omega at delta (with S = its residual cross-products) for the chosen estimator.
/// Shrinkage needs the residual rows: from W on the matrix-free path, else from `data`.
pub(crate) fn omega_at(
    prep: &Prepared,
    delta: &Array1<f64>,
    s: &Array2<f64>,
    divisor: Divisor,
    data: Option<&SystemData>,
) -> Result<OmegaEst> {
    let identity = match divisor {
        Divisor::Ml | Divisor::Dof => {
            return Ok(OmegaEst {
                omega: omega_from(prep, s, divisor),
                shrinkage: None,
                low_rank: None,
            })
        }
        Divisor::LedoitWolfIdentity => true,
        Divisor::LedoitWolfDiagonal => false,
    };
    let rows = match &prep.cross {
        CrossProducts::MatrixFree { .. } => prep.residual_rows_w(delta),
        _ => {
            let data = data.ok_or_else(|| {
                SurError::InvalidOption(
                    "Ledoit-Wolf shrinkage needs the data (the residual rows)".into(),
                )
            })?;
            let coef = prep.coef_from_gamma(&(&prep.z() + delta))?;
            data.residuals(coef.as_slice().expect("contiguous"))
        }
    };
    let (omega, lambda, target) = ledoit_wolf(&rows, s, identity);
    let t = prep.n_obs as f64;
    let low_rank = matches!(prep.cross, CrossProducts::MatrixFree { .. })
        .then(|| (target.mapv(|v| v * lambda), (1.0 - lambda) / t, rows));
    Ok(OmegaEst {
        omega,
        shrinkage: Some(lambda),
        low_rank,
    })
}

/// Gaussian log-likelihood at Omega = S/T: -(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T).
/// +inf when S/T is singular (an exact fit: the Gaussian likelihood is unbounded); None
/// when `s` does not belong to this system.
pub(crate) fn log_likelihood(prep: &Prepared, s: &Array2<f64>) -> Option<f64> {
    if s.dim() != (prep.n_eq(), prep.n_eq()) {
        return None;
    }
    let t = prep.n_obs as f64;
    let n = prep.n_eq() as f64;
    let ld = ln_det_spd(&(s / t)).unwrap_or(f64::NEG_INFINITY);
    Some(-0.5 * n * t * (1.0 + (2.0 * std::f64::consts::PI).ln()) - 0.5 * t * ld)
}

/// Relative eigenvalue floor below which Omega counts as singular.
pub(crate) fn singular_floor(n: usize) -> f64 {
    (64.0 * n as f64 * f64::EPSILON).max(1e-13)
}

/// The inverse of the cross-equation covariance Omega, and the condition number estimate of
/// its correlation form. A singular Omega (an equation that fits exactly, equations whose
/// residuals are linearly dependent, more equations than observations) gets an error that names
/// the equations involved and the remedy.
///
/// `scales[i]` is the root mean square of equation i's dependent variable: an equation whose
/// residual standard deviation is below 1e-13 of it fits exactly (whatever the units of the
/// other equations).
pub fn invert_omega(
    omega: &Array2<f64>,
    names: &[String],
    n_obs: usize,
    scales: &[f64],
) -> Result<(Array2<f64>, f64)> {
    let n = omega.nrows();
    let diag: Vec<f64> = (0..n).map(|i| omega[[i, i]]).collect();
    for (i, &d) in diag.iter().enumerate() {
        let floor = scales.get(i).copied().unwrap_or(0.0) * 1e-13;
        if d.is_infinite() || (d.is_finite() && !scales.get(i).copied().unwrap_or(1.0).is_finite())
        {
            return Err(SurError::SingularOmega {
                equations: vec![names[i].clone()],
                detail: format!(
                    "equation '{}': the residual variance overflows double precision; rescale its \
                     dependent variable (and regressors) to moderate units",
                    names[i]
                ),
            });
        }
        if d.is_nan() || d <= 0.0 || d.sqrt() <= floor {
            return Err(SurError::SingularOmega {
                equations: vec![names[i].clone()],
                detail: format!(
                    "equation '{}' has (numerically) zero residual variance: it fits its data exactly, \
                     so the cross-equation covariance is singular; an identity needs no estimation, \
                     so drop the equation",
                    names[i]
                ),
            });
        }
    }
    // Work on the correlation matrix so the test below does not depend on the units.
    let d: Vec<f64> = diag.iter().map(|v| 1.0 / v.sqrt()).collect();
    // N x N temporaries on huge pages, one at a time (8 MB each at N = 1000): the factor is
    // formed in the correlation matrix's own buffer, which is formed again only to diagnose a
    // failure
    let correlation = || {
        let mut corr = zeros_advised((n, n).f());
        corr.zip_mut_with(omega, |c, &o| *c = o);
        for (j, mut col) in corr.columns_mut().into_iter().enumerate() {
            for (i, c) in col.iter_mut().enumerate() {
                *c *= d[i] * d[j];
            }
        }
        corr
    };
    let corr = correlation();
    let anorm = one_norm(&corr);
    let floor = singular_floor(n);
    let factor = chol_lower(corr).filter(|l| {
        let lmin = (0..n).map(|i| l[[i, i]]).fold(f64::INFINITY, f64::min);
        lmin * lmin > floor
    });
    let l = match factor {
        Some(l) => l,
        None => {
            let corr = correlation();
            diagnose_singular(&corr, names, n_obs, floor)?;
            chol_lower(corr)
                .ok_or_else(|| SurError::numerical("Cholesky of Omega", "not positive definite"))?
        }
    };
    let mut out = chol_inverse_owned(l)?;
    // the exact 1-norm condition number, from the inverse formed anyway (rather than LAPACK's
    // estimate from further triangular solves)
    let cond = match anorm * one_norm(&out) {
        c if c.is_finite() => c,
        _ => f64::INFINITY,
    };
    // inv is exactly symmetric and d_i d_j = d_j d_i, so the result is too; column-major like
    // inv, and its columns, which the GLS step reads, are contiguous
    for (j, mut col) in out.columns_mut().into_iter().enumerate() {
        for (i, c) in col.iter_mut().enumerate() {
            *c *= d[i] * d[j];
        }
    }
    Ok((out, cond))
}

/// Looks at the smallest eigenvalue of the residual correlation matrix and, when it is below the
/// floor, returns the error naming the equations in its eigenvector.
fn diagnose_singular(corr: &Array2<f64>, names: &[String], n_obs: usize, floor: f64) -> Result<()> {
    let n = corr.nrows();
    let (vals, vecs) = crate::kernels::sym_eigen(corr.view())?;
    let lmax = vals[n - 1];
    let lmin = vals[0];
    if lmin > floor * lmax {
        return Ok(());
    }
    if n > n_obs {
        return Err(SurError::SingularOmega {
            equations: names.to_vec(),
            detail: format!(
                "the cross-equation covariance is singular: {n} equations but only {n_obs} observations, \
                 so the residual covariance has rank at most {n_obs}; use fewer equations or more observations"
            ),
        });
    }
    let v = vecs.column(0);
    let vmax = v.iter().fold(0.0f64, |a, b| a.max(b.abs()));
    let involved: Vec<String> = (0..n)
        .filter(|&i| v[i].abs() >= 0.05 * vmax)
        .map(|i| names[i].clone())
        .collect();
    let quoted: Vec<String> = involved.iter().map(|s| format!("'{s}'")).collect();
    Err(SurError::SingularOmega {
        equations: involved.clone(),
        detail: format!(
            "the cross-equation covariance is singular (smallest/largest eigenvalue of the residual \
             correlation {:.1e}): the residuals of equations {} are linearly dependent. This happens \
             when the dependent variables add up to a constant or an identity, as budget or cost \
             shares that sum to one do, or when an equation repeats another. Drop one of these \
             equations (its coefficients follow from the others)",
            (lmin / lmax).max(0.0),
            quoted.join(", ")
        ),
    })
}

/// Ledoit-Wolf shrinkage of the ML covariance S/T of residual rows E (T x N).
/// `identity`: towards mu I, mu = trace/N, with the intensity of Ledoit & Wolf (2004) as
/// scikit-learn computes it; otherwise towards the diagonal of S/T, with intensity
/// sum_{i != j} Var(s_ij) / (T sum_{i != j} s_ij^2) clipped to [0, 1] (the same estimator of the
/// variance of each sample covariance). Returns (Omega, intensity, diagonal of the target).
pub fn ledoit_wolf(
    e: &Array2<f64>,
    s: &Array2<f64>,
    identity: bool,
) -> (Array2<f64>, f64, Array1<f64>) {
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
        let lambda = if beta <= 0.0 || delta <= 0.0 {
            0.0
        } else {
            beta / delta
        };
        let mut omega = &sml * (1.0 - lambda);
        for i in 0..n {
            omega[[i, i]] += lambda * mu;
        }
        (omega, lambda, Array1::from_elem(n, mu))
    } else {
        let diag2: f64 = sml.diag().iter().map(|v| v * v).sum();
        let off2 = fro2 - diag2;
        let var_off = (a - b) / t - off2;
        let lambda = if off2 <= 0.0 {
            1.0
        } else {
            (var_off / (t * off2)).clamp(0.0, 1.0)
        };
        let mut omega = &sml * (1.0 - lambda);
        for i in 0..n {
            omega[[i, i]] += lambda * sml[[i, i]];
        }
        (omega, lambda, sml.diag().to_owned())
    }
}
