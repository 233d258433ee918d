//! The preconditioned conjugate-gradient solver of the core, for M x = h with M symmetric
//! positive definite. Two callers: the warm-started steps of an iterated fit (M dense,
//! preconditioned by the previous step's Cholesky factor, to the rounding level of a direct
//! solve) and the matrix-free GLS steps (M applied through W, preconditioned by its diagonal
//! blocks, to a relative residual).

use ndarray::{Array1, Array2};

use crate::error::{Result, SurError};
use crate::kernels::simd::{axpy, dot, sym_lower_matvec};
use crate::kernels::small::chol_solve_in_place;

/// How a solve ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum End {
    /// `done` held on a residual recomputed from scratch.
    Converged,
    /// `max_iter` iterations without that.
    MaxIter,
    /// A search direction without positive curvature: M is not (numerically) positive definite.
    LostCurvature,
}

/// Preconditioned conjugate gradients from `x0`: `apply(v, out)` sets out = M v,
/// `precondition(z)` replaces z by P^-1 z, `done(x, r)` says whether the residual r = h - M x
/// is small enough (it is confirmed on a residual recomputed from scratch, against the drift
/// of the updated one, which is also recomputed every `refresh` iterations when not 0).
/// `cancel` is asked every eight iterations. Returns x, the iterations and how it ended.
#[allow(clippy::too_many_arguments)]
pub(crate) fn pcg(
    apply: &mut dyn FnMut(&[f64], &mut [f64]),
    precondition: &mut dyn FnMut(&mut [f64]),
    h: &[f64],
    x0: &[f64],
    max_iter: usize,
    refresh: usize,
    done: &dyn Fn(&[f64], &[f64]) -> bool,
    cancel: &dyn Fn() -> bool,
) -> Result<(Vec<f64>, usize, End)> {
    let k = h.len();
    let mut x = x0.to_vec();
    let mut q = vec![0.0; k];
    let residual = |apply: &mut dyn FnMut(&[f64], &mut [f64]),
                    x: &[f64],
                    r: &mut Vec<f64>,
                    q: &mut Vec<f64>| {
        apply(x, q);
        r.clear();
        r.extend(h.iter().zip(q.iter()).map(|(a, b)| a - b));
    };
    let mut r = Vec::with_capacity(k);
    residual(apply, &x, &mut r, &mut q);
    let mut z = r.clone();
    precondition(&mut z);
    let mut p = z.clone();
    let mut rz = dot(&r, &z);
    for it in 0..=max_iter {
        if done(&x, &r) {
            // the updated residual drifts from the true one: confirm on a fresh one
            residual(apply, &x, &mut r, &mut q);
            if done(&x, &r) {
                return Ok((x, it, End::Converged));
            }
            z.copy_from_slice(&r);
            precondition(&mut z);
            p.copy_from_slice(&z);
            rz = dot(&r, &z);
        }
        if it == max_iter {
            break;
        }
        if it % 8 == 0 && cancel() {
            return Err(SurError::Interrupted);
        }
        apply(&p, &mut q);
        let pq = dot(&p, &q);
        if !(pq > 0.0 && pq.is_finite() && rz.is_finite()) {
            return Ok((x, it, End::LostCurvature));
        }
        let alpha = rz / pq;
        axpy(&mut x, &p, alpha);
        axpy(&mut r, &q, -alpha);
        if refresh > 0 && (it + 1) % refresh == 0 {
            residual(apply, &x, &mut r, &mut q);
        }
        z.copy_from_slice(&r);
        precondition(&mut z);
        let rz_new = dot(&r, &z);
        let beta = rz_new / rz;
        rz = rz_new;
        for (pi, zi) in p.iter_mut().zip(&z) {
            *pi = zi + beta * *pi;
        }
    }
    Ok((x, max_iter, End::MaxIter))
}

/// Iterations after which a warm-started solve gives up (the step is then solved directly).
pub(crate) const WARM_MAX: usize = 40;

/// Solves M x = h (M symmetric, lower triangle, column-major) from `x0`, preconditioned with
/// the Cholesky factor `l` of a nearby matrix, to the rounding level of a direct solve:
/// ||h - M x|| <= 16 eps (||M||_F ||x|| + ||h||) in the Jacobi-scaled system D^-1/2 M D^-1/2
/// (D = diag M), so that equations in very different units are each solved to their own
/// rounding level, as the (scale-invariant) Cholesky solve does. None (solve directly) when
/// that is not reached in WARM_MAX iterations or M loses positive curvature.
pub(crate) fn warm_pcg(
    m: &Array2<f64>,
    l: &Array2<f64>,
    h: &Array1<f64>,
    x0: &Array1<f64>,
) -> Option<(Array1<f64>, usize)> {
    let k = h.len();
    let (mb, lb) = (m.as_slice_memory_order()?, l.as_slice_memory_order()?);
    if !m.t().is_standard_layout()
        || !l.t().is_standard_layout()
        || l.nrows() != k
        || m.nrows() != k
    {
        return None;
    }
    let (h, x0) = (h.as_slice()?, x0.as_slice()?);
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
    let scaled = |v: &[f64], up: bool| -> f64 {
        v.iter()
            .zip(&sd)
            .map(|(a, d)| if up { a * d } else { a / d })
            .map(|a| a * a)
            .sum::<f64>()
            .sqrt()
    };
    let hn = scaled(h, false);
    let done = |x: &[f64], r: &[f64]| {
        scaled(r, false) <= 16.0 * f64::EPSILON * (fro * scaled(x, true) + hn)
    };
    let (x, its, end) = pcg(
        &mut |v, out| sym_lower_matvec(mb, k, v, out),
        &mut |z| chol_solve_in_place(lb, k, z),
        h,
        x0,
        WARM_MAX,
        0,
        &done,
        &|| false,
    )
    .ok()?;
    (end == End::Converged).then(|| (Array1::from(x), its))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A warm-started solve reaches the direct solution (to the rounding level the stopping
    /// rule states) from a preconditioner of a nearby matrix, and declines a matrix that is not
    /// positive definite; the matrix-free stopping rule (relative residual) with a diagonal
    /// preconditioner reaches its tolerance. Reference: the Cholesky solve (backend).
    #[test]
    fn pcg_solves_what_cholesky_solves() {
        let k = 60;
        let mut s = 11u64;
        let mut rnd = move || {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        let b = Array2::from_shape_fn((k + 20, k), |_| rnd());
        let mut m = crate::kernels::matmul(b.t(), b.view());
        let near = m.clone();
        for i in 0..k {
            m[[i, i]] += 0.1 * (1.0 + rnd());
        }
        let h = Array1::from_shape_fn(k, |_| rnd());
        let l_near = crate::kernels::chol_lower(crate::kernels::to_fortran(&near)).unwrap();
        let l = crate::kernels::chol_lower(crate::kernels::to_fortran(&m)).unwrap();
        let direct = crate::kernels::chol_solve(&l, &h).unwrap();
        let mf = crate::kernels::to_fortran(&m);
        let (x, its) = warm_pcg(&mf, &l_near, &h, &Array1::zeros(k)).expect("converges");
        assert!(its > 0 && its <= WARM_MAX);
        let big = direct.iter().fold(0.0f64, |a, v| a.max(v.abs()));
        let err = (&x - &direct).iter().fold(0.0f64, |a, v| a.max(v.abs())) / big;
        assert!(err < 1e-9, "relative error {err:.2e}");
        // not positive definite: declined
        let mut bad = mf.clone();
        bad[[3, 3]] = -50.0;
        assert!(warm_pcg(&bad, &l_near, &h, &Array1::zeros(k)).is_none());
        // relative-residual rule with a diagonal preconditioner, and the iteration cap
        let mb = mf.as_slice_memory_order().unwrap();
        let hn = dot(h.as_slice().unwrap(), h.as_slice().unwrap()).sqrt();
        let rel_done = |_: &[f64], r: &[f64]| dot(r, r).sqrt() <= 1e-12 * hn;
        let diag: Vec<f64> = (0..k).map(|i| m[[i, i]]).collect();
        let zeros = vec![0.0; k];
        let mut matvec = |v: &[f64], o: &mut [f64]| sym_lower_matvec(mb, k, v, o);
        let mut jacobi = |z: &mut [f64]| z.iter_mut().zip(&diag).for_each(|(a, d)| *a /= d);
        let mut none = |_: &mut [f64]| {};
        let hs = h.as_slice().unwrap();
        let (x, _, end) = pcg(
            &mut matvec,
            &mut jacobi,
            hs,
            &zeros,
            5000,
            50,
            &rel_done,
            &|| false,
        )
        .unwrap();
        assert_eq!(end, End::Converged);
        let err = x
            .iter()
            .zip(direct.iter())
            .fold(0.0f64, |a, (u, v)| a.max((u - v).abs()));
        assert!(err < 1e-8 * big);
        let (_, its, end) = pcg(&mut matvec, &mut none, hs, &zeros, 3, 0, &rel_done, &|| {
            false
        })
        .unwrap();
        assert_eq!((its, end), (3, End::MaxIter));
        assert!(matches!(
            pcg(
                &mut matvec,
                &mut none,
                hs,
                &zeros,
                30,
                0,
                &rel_done,
                &|| true
            ),
            Err(SurError::Interrupted)
        ));
    }
}
