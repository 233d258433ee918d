//! Two-step FGLS in one pass over the basis W, without the P x P Gram matrix (large systems).

use ndarray::{s, Array1, Array2, ShapeBuilder};

use super::gls::singular_gls;
use super::omega::{invert_omega, omega_from};
use super::{Divisor, Estimate, FitOptions, Method, ResidCross, Weight};
use crate::data::SystemData;
use crate::error::{Result, SurError};
use crate::prepare::{CrossProducts, Prepared};

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
/// GLS matrix is built in the K x K products' own buffer, its lower triangle alone touched:
/// peak memory W + K^2 / 2 (+ T N) instead of P^2 + K^2.
///
/// Returns the fit and a `Prepared` that keeps only q_i'q_j (`ResidualsOnly`): enough for
/// the fit's covariances, OLS and the OLS residual cross-products, not for other GLS fits.
/// Systems whose equations share one regressor matrix, and a single equation, take the
/// usual path (there is nothing to save).
pub fn fgls_from_data(
    data: &SystemData,
    divisor: Divisor,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<(Prepared, Estimate)> {
    let opts = FitOptions {
        method: Method::Fgls,
        divisor,
        ..FitOptions::default()
    };
    opts.validate()?;
    let usual = || -> Result<(Prepared, Estimate)> {
        let prep = Prepared::new_with(data, cancel)?;
        let est = crate::estimate::fit(&prep, &opts, None, None, cancel)?;
        Ok((prep, est))
    };
    if !matches!(divisor, Divisor::Ml | Divisor::Dof)
        || data.n_eq() < 2
        || data.identical_regressors()
    {
        return usual();
    }
    let interrupted = || {
        if cancel() {
            Err(SurError::Interrupted)
        } else {
            Ok(())
        }
    };
    let (mut prep, w) = Prepared::basis(data, cancel)?;
    let (n, k, t) = (prep.n_eq(), prep.n_coef(), prep.n_obs);
    let offsets = prep.offsets.clone();
    let rho: Vec<f64> = prep.factors.iter().map(|f| f.rho).collect();
    // q_i'q_j, exact on the diagonal by construction (each q_i has unit length)
    interrupted()?;
    let mut qq = crate::kernels::gram_blocked(w.slice(s![.., k..]), cancel)?;
    for i in 0..n {
        qq[[i, i]] = 1.0;
    }
    prep.cross = CrossProducts::ResidualsOnly { qq };
    let s_ols = prep.residual_crossprod(&Array1::zeros(k));
    let omega = omega_from(&prep, &s_ols, divisor);
    let (sigma_inv, cond) = invert_omega(&omega, &prep.names, t, &prep.y_scales())?;
    // h_a = Q_a' (E Omega^-1)_eq(a), E Omega^-1 = Wq (diag(rho) Omega^-1)
    interrupted()?;
    let wq = w.slice(s![.., k..]);
    let weights = Array2::from_shape_fn((n, n).f(), |(j, i)| rho[j] * sigma_inv[[j, i]]);
    let mut ew = crate::kernels::zeros_advised((t, n).f());
    crate::kernels::matmul_into(1.0, wq, weights.view(), false, ew.view_mut());
    let wbuf = w
        .as_slice_memory_order()
        .expect("W is column-major and contiguous");
    let ewbuf = ew.as_slice_memory_order().expect("column-major");
    let mut h = Array1::<f64>::zeros(k);
    for i in 0..n {
        let target = &ewbuf[i * t..(i + 1) * t];
        for a in offsets[i]..offsets[i + 1] {
            h[a] = crate::kernels::dot(&wbuf[a * t..(a + 1) * t], target);
        }
    }
    // M = C o sigma^{eq(a) eq(b)} in the buffer of C = Q'Q, the lower triangle alone (the
    // upper one of the fresh zeroed buffer is never touched, so never paged in)
    interrupted()?;
    let mut m = crate::kernels::gram_lower(w.slice(s![.., ..k]), cancel)?;
    {
        let mut eq_of = vec![0usize; k];
        for i in 0..n {
            eq_of[offsets[i]..offsets[i + 1]].fill(i);
        }
        // a pass over K^2 / 2 values (15 ms at K = 4000 on one thread), by columns over the
        // pool; Q_j'Q_j = I exactly by construction (as in the full preparation)
        let mbuf = m.as_slice_memory_order_mut().expect("column-major");
        let weigh = |(j, col): (usize, &mut [f64])| {
            let ej = eq_of[j];
            let sig = sigma_inv.column(ej);
            col[j] = sig[ej];
            let mut i = j + 1;
            let own_end = offsets[ej + 1];
            col[i..own_end].fill(0.0);
            i = own_end;
            for e in (ej + 1)..n {
                let (end, wgt) = (offsets[e + 1], sig[e]);
                col[i..end].iter_mut().for_each(|v| *v *= wgt);
                i = end;
            }
        };
        if k * k >= 1 << 16 {
            use rayon::prelude::*;
            crate::runtime::install(|| mbuf.par_chunks_mut(k).enumerate().for_each(weigh));
        } else {
            mbuf.chunks_mut(k).enumerate().for_each(weigh);
        }
    }
    interrupted()?;
    let chol =
        crate::kernels::chol_lower_of(m, true).ok_or_else(|| singular_gls(&prep.names, n, t))?;
    let delta = crate::kernels::chol_solve(&chol, &h)?;
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
                crate::kernels::axpy(col, &wbuf[a * t..(a + 1) * t], -delta[a]);
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
        weight: Weight::Chol(chol),
        restricted: None,
    };
    Ok((prep, est))
}
