//! Small systems (K + N columns up to `MAX_COLUMNS`) in reusable buffers: the same steps as
//! `prepare` and `estimate` (Householder QR per equation, the Gram matrix of
//! W = [Q_1 q_1 .. Q_N q_N], GLS in the orthonormal basis, classical standard errors), without
//! the general machinery's allocations, threads, backend calls and diagnostics. A batch of
//! thousands of systems of a few equations spends most of its time there otherwise.
//!
//! It only ever answers when the general path would give the same answer: anything unusual
//! (a non-finite or tiny column, a rank test that fails, an Omega or GLS matrix near the
//! general path's singularity limits, shrinkage, restrictions) returns `None`, and the caller
//! runs the general path, which then gives the result or the typed error with its message.
//! Every such test keeps a margin of a factor 16 over the general path's limit, so rounding
//! differences between the two paths cannot change a decision.

use ndarray::{Array1, Array2, ArrayView1, ArrayView2};

use crate::batch::BatchFit;
use crate::estimate::omega::singular_floor;
use crate::estimate::{Divisor, FitOptions, Method};
use crate::kernels::qr::householder_qr;
use crate::kernels::simd::{dot, dots};
use crate::kernels::small::{chol_solve_in_place, small_chol, small_lower_inverse};
use crate::prepare::{rank_tol, refine_fit};

/// Largest K + N the small path takes (the K x K matrices stay in the cache).
pub(crate) const MAX_COLUMNS: usize = 96;

/// Margin of the small path's singularity tests over the general path's limits.
const MARGIN: f64 = 16.0;

/// Buffers one thread reuses from system to system.
#[derive(Default)]
pub(crate) struct Work {
    /// W, column-major T x P: equation i's QR block [Q_i | q_i] starts at column off_i + i.
    w: Vec<f64>,
    /// W'W, P x P row-major (both triangles).
    g: Vec<f64>,
    /// Per equation: R of the unscaled regressors (k_i x k_i, row-major), then its inverse.
    r: Vec<f64>,
    rinv: Vec<f64>,
    /// Scratch for one equation's Householder scalars tau.
    tau: Vec<f64>,
    /// GLS matrix M and its Cholesky factor (K x K column-major), then L^-1.
    m: Vec<f64>,
    u: Vec<f64>,
    /// N x N: S, Omega, correlation / its factor, Omega^-1.
    s: Vec<f64>,
    omega: Vec<f64>,
    c: Vec<f64>,
    sig: Vec<f64>,
    /// K: z, delta, new delta; K + N: a column of G A; per coefficient, its W column and equation.
    z: Vec<f64>,
    delta: Vec<f64>,
    next: Vec<f64>,
    ga: Vec<f64>,
    col: Vec<usize>,
    eq: Vec<usize>,
    /// T: a residual.
    e: Vec<f64>,
    /// N: rho, y scale, q column, equation offsets (N + 1).
    rho: Vec<f64>,
    yscale: Vec<f64>,
    qcol: Vec<usize>,
    off: Vec<usize>,
}

fn sized<T: Clone + Default>(v: &mut Vec<T>, n: usize) -> &mut [T] {
    if v.len() < n {
        v.resize(n, T::default());
    }
    &mut v[..n]
}

/// Lower Cholesky factor in place (column-major n x n, lower triangle read and written, upper
/// zeroed; `linalg::small_chol`). Returns the smallest squared pivot relative to the largest
/// diagonal entry, or None when a pivot is not positive.
fn chol(a: &mut [f64], n: usize) -> Option<f64> {
    let dmax = (0..n).map(|i| a[i * n + i]).fold(0.0f64, f64::max);
    if !small_chol(a, n) {
        return None;
    }
    Some(
        (0..n)
            .map(|j| a[j * n + j] * a[j * n + j] / dmax)
            .fold(f64::INFINITY, f64::min),
    )
}

impl Work {
    /// S(delta) into `self.s` (N x N, both triangles): residual cross-products at
    /// delta = gamma - z, from the Gram matrix (as `Prepared::residual_crossprod`).
    fn crossprod(&mut self, n: usize, k: usize, p: usize, use_next: bool) {
        let d = if use_next {
            &self.next[..k]
        } else {
            &self.delta[..k]
        };
        let (g, ga, s) = (&self.g, &mut self.ga, &mut self.s);
        for j in 0..n {
            let (a, b) = (self.off[j], self.off[j + 1]);
            // ga over coefficient rows (0..k) then q rows (k..k+n): column j of G A.
            for row in 0..(k + n) {
                let gr = if row < k {
                    self.col[row]
                } else {
                    self.qcol[row - k]
                };
                let grow = &g[gr * p..(gr + 1) * p];
                let mut v = self.rho[j] * grow[self.qcol[j]];
                for c in a..b {
                    v -= grow[self.col[c]] * d[c];
                }
                ga[row] = v;
            }
            for i in j..n {
                let mut v = self.rho[i] * ga[k + i];
                for c in self.off[i]..self.off[i + 1] {
                    v -= d[c] * ga[c];
                }
                s[i * n + j] = v;
                s[j * n + i] = v;
            }
        }
    }

    /// Omega from S for the divisor.
    fn omega_from_s(&mut self, n: usize, t: usize, divisor: Divisor) {
        let tf = t as f64;
        for i in 0..n {
            for j in 0..n {
                let v = self.s[i * n + j];
                self.omega[i * n + j] = match divisor {
                    Divisor::Dof => {
                        let di = tf - (self.off[i + 1] - self.off[i]) as f64;
                        let dj = tf - (self.off[j + 1] - self.off[j]) as f64;
                        v / (di * dj).sqrt()
                    }
                    _ => v / tf,
                };
            }
        }
    }

    /// Omega^-1 into `self.sig`, or None where `linalg::invert_omega` could refuse it.
    fn invert_omega(&mut self, n: usize) -> Option<()> {
        let mut dinv = [0.0f64; 64];
        for i in 0..n {
            let d = self.omega[i * n + i];
            let scale = self.yscale[i];
            if !d.is_finite()
                || !scale.is_finite()
                || d <= 0.0
                || d.sqrt() <= MARGIN * scale * 1e-13
            {
                return None;
            }
            dinv[i] = 1.0 / d.sqrt();
        }
        for i in 0..n {
            for j in 0..n {
                self.c[i * n + j] = self.omega[i * n + j] * dinv[i] * dinv[j];
            }
        }
        let worst = chol(&mut self.c[..n * n], n)?;
        if worst <= MARGIN * singular_floor(n) {
            return None;
        }
        // (L L')^-1 = U'U with U = L^-1; Omega^-1 = D (corr^-1) D.
        small_lower_inverse(&self.c[..n * n], n, &mut self.u[..n * n]);
        let u = &self.u[..n * n];
        for i in 0..n {
            for j in 0..=i {
                // sum over r >= i of U[r][i] U[r][j] (U column-major)
                let v = dot(&u[i * n + i..(i + 1) * n], &u[j * n + i..(j + 1) * n]);
                let v = v * dinv[i] * dinv[j];
                self.sig[i * n + j] = v;
                self.sig[j * n + i] = v;
            }
        }
        Some(())
    }

    /// One GLS step for the Omega^-1 in `self.sig`: M (factored in place in `self.m`) and the
    /// new delta in `self.next`. None when M is near singular.
    fn gls(&mut self, n: usize, k: usize, p: usize) -> Option<()> {
        let m = &mut self.m[..k * k];
        for a in 0..k {
            let grow = &self.g[self.col[a] * p..(self.col[a] + 1) * p];
            let sa = &self.sig[self.eq[a] * n..(self.eq[a] + 1) * n];
            for b in 0..=a {
                m[b * k + a] = grow[self.col[b]] * sa[self.eq[b]]; // (a, b), column-major lower
            }
            let mut h = 0.0;
            for j in 0..n {
                h += sa[j] * self.rho[j] * grow[self.qcol[j]];
            }
            self.next[a] = h;
        }
        let worst = chol(m, k)?;
        if worst <= MARGIN * 1e-13 {
            return None;
        }
        chol_solve_in_place(m, k, &mut self.next[..k]);
        Some(())
    }

    /// The convergence criterion of `Prepared::criterion` between `delta` and `next`.
    fn criterion(&self, n: usize) -> f64 {
        let mut worst = 0.0f64;
        for i in 0..n {
            let (mut change, mut size) = (0.0, 0.0);
            for c in self.off[i]..self.off[i + 1] {
                change += (self.next[c] - self.delta[c]).powi(2);
                size += (self.z[c] + self.next[c]).powi(2);
            }
            let denom = size
                .sqrt()
                .max(self.rho[i] * f64::EPSILON)
                .max(f64::MIN_POSITIVE);
            worst = worst.max(change.sqrt() / denom);
        }
        worst
    }
}

/// Fits one small system, or returns None when the general path must (see the module notes).
/// `ys[i]` (T) and `xs[i]` (T x K_i) are equation i's data.
pub(crate) fn fit(
    ys: &[ArrayView1<f64>],
    xs: &[ArrayView2<f64>],
    opts: &FitOptions,
    ws: &mut Work,
) -> Option<BatchFit> {
    let n = ys.len();
    if n == 0
        || n > 64
        || xs.len() != n
        || !matches!(opts.divisor, Divisor::Ml | Divisor::Dof)
        || opts.validate().is_err()
    {
        return None;
    }
    let t = ys[0].len();
    let off = sized(&mut ws.off, n + 1);
    off[0] = 0;
    for i in 0..n {
        let ki = xs[i].ncols();
        if ki == 0 || t <= ki || ys[i].len() != t || xs[i].nrows() != t {
            return None;
        }
        off[i + 1] = off[i] + ki;
    }
    let k = off[n];
    let p = k + n;
    if p > MAX_COLUMNS {
        return None;
    }
    let shared = n > 1 && xs[1..].iter().all(|x| crate::data::same_matrix(x, &xs[0]));
    for v in [&mut ws.z, &mut ws.delta, &mut ws.next] {
        sized(v, k).fill(0.0);
    }
    sized(&mut ws.ga, p);
    sized(&mut ws.col, k);
    sized(&mut ws.eq, k);
    for v in [&mut ws.rho, &mut ws.yscale] {
        sized(v, n);
    }
    sized(&mut ws.qcol, n);
    for v in [&mut ws.s, &mut ws.omega, &mut ws.c, &mut ws.sig] {
        sized(v, n * n);
    }
    sized(&mut ws.m, k * k);
    sized(&mut ws.u, k.max(n) * k.max(n));
    let rlen: usize = (0..n).map(|i| (ws.off[i + 1] - ws.off[i]).pow(2)).sum();
    sized(&mut ws.r, rlen);
    sized(&mut ws.rinv, rlen);
    sized(&mut ws.w, t * p);

    // Step 0: per equation, X_i QR'd in place and y_i projected, refined (as
    // `prepare::factor_into`, on the same numbers in the same order; columns far from unit
    // scale, which that path scales first, are left to it).
    let mut roff = 0;
    for i in 0..n {
        let (a, ki) = (ws.off[i], ws.off[i + 1] - ws.off[i]);
        let mi = ki + 1;
        let base = a + i;
        for c in 0..ki {
            ws.col[a + c] = base + c;
            ws.eq[a + c] = i;
        }
        ws.qcol[i] = base + ki;
        let buf = &mut ws.w[base * t..(base + mi) * t];
        let mut norms = [0.0f64; MAX_COLUMNS + 1];
        for j in 0..ki {
            let colbuf = &mut buf[j * t..(j + 1) * t];
            for (d, s) in colbuf.iter_mut().zip(xs[i].column(j).iter()) {
                *d = *s;
            }
            let ss = dot(colbuf, colbuf);
            if !(ss.is_finite() && ss > 1e-290) {
                return None;
            }
            norms[j] = ss.sqrt();
            if !(1e-100..=1e100).contains(&norms[j]) {
                return None;
            }
        }
        let (qx, qy) = buf.split_at_mut(ki * t);
        let r = &mut ws.r[roff..roff + ki * ki];
        let tau = sized(&mut ws.tau, ki);
        householder_qr(qx, t, ki, r, tau, &|| false).ok()?;
        // the general path's rank test on the unit-column R, with the margin (with shared
        // regressors it goes through a different QR)
        let tol = MARGIN * rank_tol(t, ki);
        if (0..ki).any(|j| (r[j * ki + j] / norms[j]).abs() <= tol) {
            return None;
        }
        // z = Q'y, then the refined residual (as the general path): q_i = e / rho
        let e = sized(&mut ws.e, t);
        for (d, v) in e.iter_mut().zip(ys[i].iter()) {
            *d = *v;
        }
        if !e.iter().all(|v| v.is_finite()) {
            return None;
        }
        dots(qx, t, e, &mut ws.z[a..a + ki]);
        let rho = refine_fit(
            xs[i].view(),
            ys[i].view(),
            qx,
            t,
            r,
            &mut ws.z[a..a + ki],
            e,
            &|| false,
        )
        .ok()?;
        ws.rho[i] = rho;
        if rho > 0.0 {
            let inv = 1.0 / rho;
            for (d, v) in qy.iter_mut().zip(e.iter()) {
                *d = v * inv;
            }
        } else {
            crate::prepare::orthogonal_unit(qx, t, ki, qy);
        }
        // root mean square of y_i, as `Prepared::y_scales`
        let mx = (a..a + ki).fold(ws.rho[i].abs(), |m, c| m.max(ws.z[c].abs()));
        ws.yscale[i] = if mx == 0.0 {
            0.0
        } else {
            let s2: f64 =
                (a..a + ki).map(|c| (ws.z[c] / mx).powi(2)).sum::<f64>() + (ws.rho[i] / mx).powi(2);
            mx * s2.sqrt() / (t as f64).sqrt()
        };
        // R_i^-1 (upper), for the coefficients and their variances
        let rinv = &mut ws.rinv[roff..roff + ki * ki];
        rinv.fill(0.0);
        for j in 0..ki {
            rinv[j * ki + j] = 1.0 / r[j * ki + j];
            for row in (0..j).rev() {
                let mut v = 0.0;
                for c in (row + 1)..=j {
                    v -= r[row * ki + c] * rinv[c * ki + j];
                }
                rinv[row * ki + j] = v / r[row * ki + row];
            }
        }
        roff += ki * ki;
    }

    // Step 1: W'W, computed across equations only; within an equation it is I by construction.
    let g = sized(&mut ws.g, p * p);
    for ei in 0..n {
        let (b0, b1) = (ws.off[ei] + ei, ws.off[ei + 1] + ei + 1);
        for a in b0..b1 {
            for b in b0..b1 {
                g[a * p + b] = if a == b { 1.0 } else { 0.0 };
            }
            for b in 0..b0 {
                let v = dot(&ws.w[a * t..(a + 1) * t], &ws.w[b * t..(b + 1) * t]);
                g[a * p + b] = v;
                g[b * p + a] = v;
            }
        }
    }

    // Estimation, as `Prepared::estimate_with` without restrictions.
    ws.crossprod(n, k, p, false);
    ws.omega_from_s(n, t, opts.divisor);
    let mut n_iter = 0;
    let mut converged = true;
    let mut gls_done = false;
    if opts.method != Method::Ols {
        let max_iter = if opts.method == Method::Fgls {
            1
        } else {
            opts.max_iter
        };
        converged = opts.method == Method::Fgls;
        while n_iter < max_iter {
            ws.invert_omega(n)?;
            if shared {
                ws.next[..k].fill(0.0);
            } else {
                ws.gls(n, k, p)?;
                gls_done = true;
            }
            n_iter += 1;
            let crit = ws.criterion(n);
            if !crit.is_finite() {
                return None;
            }
            ws.crossprod(n, k, p, true);
            let (d, nx) = (&mut ws.delta, &ws.next);
            d[..k].copy_from_slice(&nx[..k]);
            if opts.method == Method::Fgls || crit <= opts.tol {
                converged = true;
                break;
            }
            if n_iter < max_iter {
                ws.omega_from_s(n, t, opts.divisor);
            }
        }
    }

    // Coefficients b_i = R_i^-1 (z_i + delta_i), by back substitution.
    let mut coef = Array1::<f64>::zeros(k);
    let mut se = Array1::<f64>::zeros(k);
    let mut roff = 0;
    if gls_done {
        small_lower_inverse(&ws.m[..k * k], k, &mut ws.u[..k * k]);
    }
    for i in 0..n {
        let (a, ki) = (ws.off[i], ws.off[i + 1] - ws.off[i]);
        let r = &ws.r[roff..roff + ki * ki];
        let rinv = &ws.rinv[roff..roff + ki * ki];
        for row in (0..ki).rev() {
            let mut v = ws.z[a + row] + ws.delta[a + row];
            for c in (row + 1)..ki {
                v -= r[row * ki + c] * coef[a + c];
            }
            coef[a + row] = v / r[row * ki + row];
        }
        // Var(b_i) = R_i^-1 V_ii R_i^-T with V = M^-1 = U'U (GLS) or omega_ii I (OLS, and FGLS
        // with shared regressors, where GLS is OLS).
        for c in 0..ki {
            let var = if gls_done {
                let mut acc = 0.0;
                for row in a..k {
                    let mut v = 0.0;
                    for l in c..ki {
                        v += ws.u[(a + l) * k + row] * rinv[c * ki + l]; // U[row][a + l]
                    }
                    acc += v * v;
                }
                acc
            } else {
                let ss: f64 = (c..ki).map(|l| rinv[c * ki + l].powi(2)).sum();
                ws.omega[i * n + i] * ss
            };
            se[a + c] = var.max(0.0).sqrt();
        }
        roff += ki * ki;
    }
    let omega = Array2::from_shape_fn((n, n), |(i, j)| ws.omega[i * n + j]);
    // Gaussian log-likelihood at S / T (as `Prepared::log_likelihood`).
    let tf = t as f64;
    for idx in 0..n * n {
        ws.c[idx] = ws.s[idx] / tf;
    }
    let loglik = match chol(&mut ws.c[..n * n], n) {
        Some(_) => {
            let ld: f64 = (0..n).map(|i| 2.0 * ws.c[i * n + i].ln()).sum();
            -0.5 * n as f64 * tf * (1.0 + (2.0 * std::f64::consts::PI).ln()) - 0.5 * tf * ld
        }
        None => f64::NEG_INFINITY,
    };
    Some(BatchFit {
        coef,
        se,
        omega,
        n_iter,
        converged,
        loglik,
    })
}
