//! Step 0, equation by equation: the QR of X_i written into its columns of W, z_i = Q_i'y_i,
//! the residual (refined from the data in doubled precision where its error account asks for
//! it), its norm rho_i and direction q_i, the rank and scale checks with their messages; and
//! the same for a system whose equations share one regressor matrix.

use std::mem::MaybeUninit;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};

use ndarray::{
    s, Array1, Array2, ArrayView1, ArrayView2, ArrayViewMut1, ArrayViewMut2, Axis, ShapeBuilder,
};

use super::EquationFactor;
use crate::data::{check_finite, Equation, SystemData};
use crate::error::{Result, SurError};
use crate::kernels::qr::{thin_qr, thin_qr_in_place};
use crate::kernels::{dot, fmt_num, gram, scaled_norm, triangular_condition, upper_solve};

/// Step 0 for every equation into a fresh W = [Q_1 .. Q_N, q_1 .. q_N] (T x P, column-major).
pub(super) fn step_zero(
    data: &SystemData,
    t: usize,
    offsets: &[usize],
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<(Vec<EquationFactor>, Array2<f64>)> {
    let n = data.n_eq();
    let k = offsets[n];
    // W is written once, column block by column block, by `factor_all`: no zero-filling
    // pass. It is only assumed initialised after every block has been written.
    let mut w = Array2::<f64>::uninit((t, k + n).f());
    if let Some(b) = w.as_slice_memory_order_mut() {
        crate::kernels::advise_huge_pages(b);
    }
    let factors = {
        let (wq, mut wy) = w.view_mut().split_at(Axis(1), k);
        let mut blocks = Vec::with_capacity(n);
        let mut rest = wq;
        for (i, col) in wy.axis_iter_mut(Axis(1)).enumerate() {
            let (head, tail) = rest.split_at(Axis(1), offsets[i + 1] - offsets[i]);
            blocks.push((head, col));
            rest = tail;
        }
        factor_all(data, t, blocks, cancel)?
    };
    // SAFETY: factor_all returned Ok, so every equation wrote all of its Q_i columns and its
    // q_i column, and together those are all k + n columns of W.
    Ok((factors, unsafe { w.assume_init() }))
}

/// The largest |value| (0 for none; NaN is skipped, as `f64::max` does: non-finite values are
/// refused by their own check).
pub(crate) fn abs_max<'a>(y: impl IntoIterator<Item = &'a f64>) -> f64 {
    y.into_iter().fold(0.0f64, |a, v| a.max(v.abs()))
}

/// Refuses a dependent variable whose largest |value| is outside Y_RANGE (naming the equation
/// and which way it falls out), where its residual variance cannot be represented.
pub(super) fn y_in_range<'a>(eq: &Equation, y: impl Iterator<Item = &'a f64>) -> Result<()> {
    y_max_in_range(&eq.name, abs_max(y))
}

/// The check of `y_in_range` on the largest |y| of equation `equation`, however it was found
/// (in one pass over the data, or as the running maximum of the summaries of chunks). Zero (a y
/// of zeros) and non-finite values pass: other checks judge them.
pub(crate) fn y_max_in_range(equation: &str, ymax: f64) -> Result<()> {
    if !(ymax.is_finite() && ymax > 0.0) || (Y_RANGE.0..=Y_RANGE.1).contains(&ymax) {
        return Ok(());
    }
    let small = ymax < 1.0;
    Err(SurError::Scale {
        equation: equation.to_string(),
        detail: format!(
            "the dependent variable's largest value in magnitude is {ymax:.1e}, too {} for its sums \
             of squares and residual variance in double precision (they {} beyond 1e{}308)",
            if small { "small" } else { "large" },
            if small { "underflow" } else { "overflow" },
            if small { "-" } else { "+" }
        ),
    })
}

/// Column 2-norm, computed with scaling so that huge or tiny columns neither overflow nor underflow.
pub(crate) fn norm(v: ArrayView1<f64>) -> f64 {
    match v.as_slice() {
        Some(s) => scaled_norm(s),
        None => scaled_norm(&v.to_vec()),
    }
}

/// Total sums of squares of y: about its mean and about zero.
fn tss(y: &[f64]) -> (f64, f64) {
    let mean = crate::kernels::simd::sum(y) / y.len() as f64;
    (crate::kernels::simd::centred_squares(y, mean), dot(y, y))
}

/// Relative tolerance on the diagonal of the column-scaled R below which a column counts as a
/// linear combination of the earlier ones (the usual max(T, K) * eps rank rule).
pub(crate) fn rank_tol(t: usize, k: usize) -> f64 {
    10.0 * (t.max(k) as f64) * f64::EPSILON
}

/// QR of a column-scaled matrix [X_i | extra columns]: returns Q (T x K_i + m), R of the scaled
/// problem, and the column norms of X_i. Checks X_i for zero and collinear columns.
fn scaled_qr(
    eq: &Equation,
    extra: &[ArrayView1<f64>],
    t: usize,
) -> Result<(Array2<f64>, Array2<f64>, Vec<f64>)> {
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
    let (q, r) =
        thin_qr(a).map_err(|e| SurError::numerical(&format!("QR of equation '{}'", eq.name), e))?;
    check_rank(&eq.name, &eq.regressors, &r, &norms, t)?;
    Ok((q, r, norms))
}

fn zero_column(name: &str, column: &str) -> SurError {
    SurError::Collinear {
        equation: name.to_string(),
        column: column.to_string(),
        detail: "is zero in every row".into(),
    }
}

/// Rank check on the R factor of the column-scaled regressors (its first K columns).
pub(crate) fn check_rank(
    name: &str,
    regressors: &[String],
    rs: &Array2<f64>,
    norms: &[f64],
    t: usize,
) -> Result<()> {
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
fn collinear_error(
    name: &str,
    regressors: &[String],
    r: &Array2<f64>,
    norms: &[f64],
    j: usize,
) -> SurError {
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
                    if terms.is_empty() {
                        "0".to_string()
                    } else {
                        terms.join(" + ")
                    }
                )
            }
            Err(_) => "is a linear combination of earlier regressors".to_string(),
        }
    };
    SurError::Collinear {
        equation: name.to_string(),
        column: regressors[j].clone(),
        detail,
    }
}

pub(crate) fn cond_of_scaled(rs: &Array2<f64>, k: usize) -> f64 {
    triangular_condition(&rs.slice(s![..k, ..k]).to_owned())
}

/// Step 0 for every equation, writing Q_i and q_i into their columns of W. Equations are
/// independent, so when the work is large enough they are shared out over blocksur's pool
/// (each thread with its own scratch). The first failing equation in system order is the one
/// reported, as in a sequential pass; equations after a failure are not started.
fn factor_all(
    data: &SystemData,
    t: usize,
    blocks: Vec<WBlock<'_>>,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<Vec<EquationFactor>> {
    let n = blocks.len();
    let work: f64 = data
        .equations
        .iter()
        .map(|e| t as f64 * ((e.n_regressors() + 1) as f64).powi(2))
        .sum();
    let first_error = AtomicUsize::new(usize::MAX);
    let stop = AtomicBool::new(false);
    // Long columns: also ask between the columns of one equation (each step is then a pass
    // over many rows); short ones only between equations.
    let poll = || {
        if cancel() {
            stop.store(true, Ordering::Relaxed);
        }
        stop.load(Ordering::Relaxed)
    };
    let never = || false;
    let one = |scratch: &mut Vec<f64>,
               (i, (q, qy)): (usize, WBlock<'_>)|
     -> Option<Result<EquationFactor>> {
        if i > first_error.load(Ordering::Relaxed) || poll() {
            return None;
        }
        let out = factor_into(
            &data.equations[i],
            t,
            scratch,
            q,
            qy,
            if t >= LONG_COLUMN { &poll } else { &never },
        );
        if out.is_err() {
            first_error.fetch_min(i, Ordering::Relaxed);
        }
        Some(out)
    };
    let results: Vec<Option<Result<EquationFactor>>> = if work < PARALLEL_WORK || n < 2 {
        let mut scratch = Vec::new();
        blocks
            .into_iter()
            .enumerate()
            .map(|job| one(&mut scratch, job))
            .collect()
    } else {
        use rayon::prelude::*;
        crate::runtime::install(|| {
            blocks
                .into_par_iter()
                .enumerate()
                .with_max_len(1)
                .map_init(Vec::new, one)
                .collect()
        })
    };
    if stop.load(Ordering::Relaxed) {
        return Err(SurError::Interrupted);
    }
    let mut factors = Vec::with_capacity(n);
    for r in results {
        match r {
            Some(Ok(f)) => factors.push(f),
            Some(Err(e)) => return Err(e),
            None => break,
        }
    }
    match first_error.load(Ordering::Relaxed) {
        usize::MAX if factors.len() == n => Ok(factors),
        _ => unreachable!("an equation before the first failure was not factored"),
    }
}

/// One equation's columns of the not yet written W: Q_i (T x K_i) and q_i.
type WBlock<'a> = (
    ArrayViewMut2<'a, MaybeUninit<f64>>,
    ArrayViewMut1<'a, MaybeUninit<f64>>,
);

/// Columns at least this long are worth a Ctrl-C check each (a pass over them takes ~1 ms+).
const LONG_COLUMN: usize = 1 << 18;

/// Below this many flops-ish of step 0 (T (K_i + 1)^2 summed) threads cost more than they save.
const PARALLEL_WORK: f64 = 2.0e6;

/// Step 0 for one equation: copy X_i into its columns of W (checking it is finite), QR in
/// place there (leaving Q_i), Q_i'y_i, one step of refinement in doubled precision, and the
/// residual direction q_i into its column of W. `scratch` (per thread) holds the residual.
/// The refinement, when there is one, reads X_i from the data (row-major input in blocks of
/// rows transposed in cache, `residual_dot2`): a column-major copy kept for it had cost a copy
/// of X_i per equation even where no refinement follows (most equations, since
/// `plain_residual`).
///
/// y_i is not part of the QR: the refinement computes the residual from the data anyway,
/// and leaving it out saves a fifth to a third of the QR's passes over the rows. Columns are
/// not scaled either (Householder QR is columnwise backward stable, so scaling changes
/// nothing but over- and underflow): only a column whose norm is far from 1 is scaled. The
/// rank and condition checks use R with unit-norm columns, as before.
fn factor_into(
    eq: &Equation,
    t: usize,
    scratch: &mut Vec<f64>,
    mut wq: ArrayViewMut2<MaybeUninit<f64>>,
    mut wy: ArrayViewMut1<MaybeUninit<f64>>,
    stop: &dyn Fn() -> bool,
) -> Result<EquationFactor> {
    let k = eq.n_regressors();
    if scratch.len() < t {
        scratch.resize(t, 0.0);
    }
    let ebuf = &mut scratch[..t]; // y_i, then the refined residual
                                  // W's columns of Q_i: one contiguous T x k column-major block
    let block = wq
        .as_slice_memory_order_mut()
        .filter(|b| b.len() == t * k)
        .expect("W is column-major");
    {
        // in row blocks, asking `stop` between them (a long copy takes a while)
        let mut start = 0;
        while start < t {
            if stop() {
                return Err(SurError::Interrupted);
            }
            let end = (start + REFINE_ROWS).min(t);
            match eq.x.as_slice().filter(|_| eq.x.is_standard_layout()) {
                // row-major: scatter the rows into the k columns
                Some(xs) => {
                    // SAFETY: column j of the block is block[j * t..(j + 1) * t]; rows
                    // start..end of it are written (MaybeUninit<f64> has the layout of f64).
                    unsafe {
                        crate::kernels::dot2::scatter_rows(
                            &xs[start * k..end * k],
                            k,
                            block.as_mut_ptr().add(start) as *mut f64,
                            t,
                        )
                    };
                }
                None => {
                    for j in 0..k {
                        let src = eq.x.slice(s![start..end, j]);
                        for (d, v) in block[j * t + start..j * t + end].iter_mut().zip(src.iter()) {
                            d.write(*v);
                        }
                    }
                }
            }
            start = end;
        }
    }
    // SAFETY: the loop above wrote every one of the t * k values (it returns before this line
    // when interrupted), and MaybeUninit<f64> has the layout of f64.
    let scratch: &mut [f64] = unsafe { &mut *(block as *mut [MaybeUninit<f64>] as *mut [f64]) };
    // Column norms; a column far from unit scale is scaled (by `scale[j]`) against overflow.
    let mut norms = Vec::with_capacity(k);
    let mut scale = Vec::with_capacity(k);
    for j in 0..k {
        if stop() {
            return Err(SurError::Interrupted);
        }
        let col = &mut scratch[j * t..(j + 1) * t];
        let ss = dot(col, col); // NaN or inf when a value is (or the squares overflow)
        let nj = if ss.is_finite() && ss > 1e-290 {
            ss.sqrt()
        } else {
            check_finite(eq, 0)?;
            scaled_norm(col)
        };
        if nj == 0.0 {
            return Err(zero_column(&eq.name, &eq.regressors[j]));
        }
        if nj < X_TINY && col.iter().fold(0.0f64, |a, v| a.max(v.abs())) < f64::MIN_POSITIVE {
            return Err(SurError::Scale {
                equation: eq.name.clone(),
                detail: format!(
                    "regressor '{}' has norm {nj:.1e}: its values are in the subnormal range of \
                     double precision (below 2.2e-308), where digits are lost",
                    eq.regressors[j]
                ),
            });
        }
        norms.push(nj);
        if (1e-100..=1e100).contains(&nj) {
            scale.push(1.0);
        } else {
            let inv = 1.0 / nj;
            for v in col.iter_mut() {
                *v *= inv;
            }
            scale.push(nj);
        }
    }
    // y copied once (it may be a strided view): for the TSS and z = Q'y
    match eq.y.as_slice() {
        Some(y) => ebuf.copy_from_slice(y),
        None => ebuf.iter_mut().zip(eq.y.iter()).for_each(|(d, v)| *d = *v),
    }
    y_in_range(eq, ebuf.iter())?;
    let (tss_centred, tss_raw) = tss(ebuf);
    if !(tss_raw.is_finite() && tss_centred.is_finite()) {
        check_finite(eq, 0)?;
    }
    let qr_error = |e| match e {
        SurError::Interrupted => e,
        e => SurError::numerical(&format!("QR of equation '{}'", eq.name), e),
    };
    // well-conditioned narrow blocks by CholeskyQR2 (three passes over the rows), the others
    // by Householder
    let rq = match crate::kernels::qr::cholqr2_in_place(scratch, t, k, stop).map_err(qr_error)? {
        Some(r) => r,
        None => thin_qr_in_place(scratch, t, k, stop).map_err(qr_error)?,
    };
    // R in data units, and with unit-norm columns for the rank and condition checks
    let mut r = rq;
    let mut rs = r.clone();
    for j in 0..k {
        let (to_data, to_unit) = (scale[j], scale[j] / norms[j]);
        r.column_mut(j).mapv_inplace(|v| v * to_data);
        rs.column_mut(j).mapv_inplace(|v| v * to_unit);
    }
    check_rank(&eq.name, &eq.regressors, &rs, &norms, t)?;
    if stop() {
        return Err(SurError::Interrupted);
    }
    // z = Q'y
    let mut z = Array1::<f64>::zeros(k);
    crate::kernels::simd::dots(scratch, t, ebuf, z.as_slice_mut().expect("fresh vector"));
    let cond = cond_of_scaled(&rs, k);
    let plain = plain_residual(
        &scratch[..k * t],
        t,
        r.as_slice().expect("fresh k x k array"),
        z.as_slice().expect("fresh vector"),
        &norms,
        tss_raw.sqrt(),
        cond,
        ebuf,
    );
    let rho = match plain {
        Some(rho) => rho,
        None => refine_fit(
            eq.x,
            eq.y,
            &scratch[..k * t],
            t,
            r.as_slice().expect("fresh k x k array"),
            z.as_slice_mut().expect("fresh vector"),
            ebuf,
            stop,
        )?,
    };
    // Q_i is in place in W; its column sums say whether it spans the constant.
    let mut s2 = 0.0;
    for j in 0..k {
        let sum = crate::kernels::simd::sum(&scratch[j * t..(j + 1) * t]);
        s2 += sum * sum;
    }
    let inv = if rho > 0.0 {
        1.0 / rho
    } else {
        // an exact fit: any unit vector orthogonal to Q_i serves
        orthogonal_unit(&scratch[..k * t], t, k, ebuf);
        1.0
    };
    let wy = wy
        .as_slice_memory_order_mut()
        .filter(|c| c.len() == t)
        .expect("W is column-major");
    for (d, v) in wy.iter_mut().zip(ebuf.iter()) {
        d.write(v * inv);
    }
    let spans_constant = (t as f64 - s2).abs() <= 1e-9 * t as f64;
    Ok(EquationFactor {
        r,
        z,
        rho,
        spans_constant,
        tss_centred,
        tss_raw,
        cond,
    })
}

/// A unit vector orthogonal to the k orthonormal columns in `q` (T x k, column-major, k < T):
/// the first of the unit vectors e_0 .. e_k whose part orthogonal to Q keeps a squared norm of
/// at least 1/(k + 1) (one must: those parts' squared norms add up to at least 1), projected
/// twice ("twice is enough") and normalised.
pub(crate) fn orthogonal_unit(q: &[f64], t: usize, k: usize, out: &mut [f64]) {
    let out = &mut out[..t];
    let mut best = (0usize, -1.0f64);
    for c in 0..=k.min(t - 1) {
        // |P e_c|^2 = sum_j Q[c, j]^2
        let inside: f64 = (0..k).map(|j| q[j * t + c] * q[j * t + c]).sum();
        let outside = 1.0 - inside;
        if outside > best.1 {
            best = (c, outside);
        }
        if outside >= 1.0 / (k as f64 + 1.0) {
            break;
        }
    }
    out.fill(0.0);
    out[best.0] = 1.0;
    for _ in 0..2 {
        for j in 0..k {
            let qj = &q[j * t..(j + 1) * t];
            let c = dot(qj, out);
            crate::kernels::simd::axpy(out, qj, -c);
        }
    }
    let n = dot(out, out).sqrt();
    out.iter_mut().for_each(|v| *v /= n);
}

/// The residual in working precision, e = y - Q z, written over y in `e`, and its norm rho,
/// when `refine_fit` could change that norm by no more than about PLAIN_RESIDUAL_ULPS units in
/// the last place; None (with `e` then to be rewritten) when the refinement is needed.
///
/// The estimate is `refine_fit`'s own account of the errors it removes, relative to rho:
/// eps cond(X) from the QR, eps |X||b| / rho from levels that cancel (sum_j |X_j| |b_j|, with
/// b = R^-1 z in data units) and eps |y| / rho from forming y - Q z. Well-scaled regressors
/// with a residual that is not tiny pass (the benchmark systems: a fifth of step 0 saved);
/// data in levels that cancel, as NIST's Longley, or a near-exact fit, are refined.
#[allow(clippy::too_many_arguments)]
pub(crate) fn plain_residual(
    q: &[f64],
    t: usize,
    r: &[f64],
    z: &[f64],
    norms: &[f64],
    y_norm: f64,
    cond: f64,
    e: &mut [f64],
) -> Option<f64> {
    let k = z.len();
    if !(cond.is_finite() && y_norm.is_finite()) {
        return None;
    }
    // sum_j |X_j| |b_j|, b = R^-1 z (R row-major, data units)
    let mut small = [0.0f64; 64];
    let mut wide = Vec::new();
    let b: &mut [f64] = if k <= small.len() {
        &mut small[..k]
    } else {
        wide.resize(k, 0.0);
        &mut wide
    };
    back_substitute(r, z, b);
    let levels: f64 = norms.iter().zip(b.iter()).map(|(n, bj)| n * bj.abs()).sum();
    let e = &mut e[..t];
    crate::kernels::simd::sub_combination(e, q, t, z);
    let ss = dot(e, e);
    if !(ss.is_finite() && ss > 1e-290) {
        return None;
    }
    let rho = ss.sqrt();
    let estimate = cond + (levels + y_norm) / rho;
    (estimate.is_finite() && estimate <= PLAIN_RESIDUAL_ULPS).then_some(rho)
}

/// b = R^-1 z for the k x k upper-triangular R stored row-major (k = z.len() = b.len()).
fn back_substitute(r: &[f64], z: &[f64], b: &mut [f64]) {
    let k = z.len();
    for i in (0..k).rev() {
        let mut v = z[i];
        for c in (i + 1)..k {
            v -= r[i * k + c] * b[c];
        }
        b[i] = v / r[i * k + i];
    }
}

/// Largest error estimate (in units of eps, relative to rho) of a residual left unrefined.
pub(crate) const PLAIN_RESIDUAL_ULPS: f64 = 50.0;

/// One step of iterative refinement of an equation's least-squares fit in the data's own units
/// (Golub and Wilkinson's refinement with the QR factors): b = R^-1 z, e = y - X b from the
/// data in doubled precision (`residual_dot2`), z += Q'e, e -= Q (Q'e). Returns the residual
/// norm rho and leaves the residual in `e` (orthogonal to Q to rounding).
///
/// The QR's own residual norm carries an error of about eps cond(X) relative to rho, and a
/// residual computed from the data in working precision one of eps |X||b| / |e| (large when
/// the intercept and the regressors' levels cancel, as in NIST's Longley data): the doubled
/// precision removes the second, the projection the part of the first in the column space of
/// X. Every residual variance and standard error inherits rho. `q` holds Q (T x k,
/// column-major), `r` R in data units (k x k, row-major).
#[allow(clippy::too_many_arguments)]
pub(crate) fn refine_fit(
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    q: &[f64],
    t: usize,
    r: &[f64],
    z: &mut [f64],
    e: &mut [f64],
    stop: &dyn Fn() -> bool,
) -> Result<f64> {
    let k = z.len();
    let mut b = [0.0f64; 64];
    let mut bv = vec![];
    let b: &mut [f64] = if k <= 64 {
        &mut b[..k]
    } else {
        bv.resize(k, 0.0);
        &mut bv
    };
    back_substitute(r, z, b);
    let e = &mut e[..t];
    // in row blocks, asking `stop` between them (a long column takes a while)
    let mut start = 0;
    while start < t {
        if stop() {
            return Err(SurError::Interrupted);
        }
        let end = (start + REFINE_ROWS).min(t);
        crate::kernels::dot2::residual_dot2(
            x.slice(s![start..end, ..]),
            y.slice(s![start..end]),
            b,
            &mut e[start..end],
        );
        start = end;
    }
    if stop() {
        return Err(SurError::Interrupted);
    }
    // z += Q'e, e -= Q (Q'e): Q is orthonormal to rounding, so one classical projection serves
    // (Q'e goes where b was: b is not needed after the residual)
    let c = b;
    crate::kernels::simd::dots(q, t, e, c);
    for (zj, cj) in z.iter_mut().zip(c.iter()) {
        *zj += cj;
    }
    crate::kernels::simd::sub_combination(e, q, t, c);
    let ss = dot(e, e);
    Ok(if ss.is_finite() && ss > 1e-290 {
        ss.sqrt()
    } else {
        scaled_norm(e)
    })
}

/// The range of the largest |y_i| that step 0 accepts: beyond it the residual variances (squares
/// of values a little smaller than y) under- or overflow double precision, and the errors that
/// followed blamed an exact fit or a singular Omega.
const Y_RANGE: (f64, f64) = (1e-120, 1e120);

/// Regressor columns with a norm below this are looked at: refused when all their values are
/// subnormal (below 2.2e-308, with fewer digits; the column scaling of step 0 handles any column
/// of normal values).
const X_TINY: f64 = 1e-290;

/// Rows of one block of the copy and of the refinement's residual pass (between Ctrl-C checks).
const REFINE_ROWS: usize = 1 << 18;

/// Steps 0 and 1 when every equation has the same regressors: one QR for X, and the residual
/// matrix E = Y - Q Q'Y (T x N) in place of the P x P Gram matrix.
pub(super) fn shared_regressors(
    data: &SystemData,
    t: usize,
) -> Result<(Vec<EquationFactor>, Array2<f64>)> {
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
    let mut zmat = zmat + corr;
    // Refine each equation's fit from the data in doubled precision (see `refine_fit`).
    {
        let qbuf = q
            .as_slice_memory_order()
            .filter(|_| q.t().is_standard_layout())
            .expect("column-major Q");
        let rbuf = r.as_standard_layout().into_owned();
        let mut zi = vec![0.0; k];
        let mut ei = vec![0.0; t];
        for (i, eq) in data.equations.iter().enumerate() {
            for (d, v) in zi.iter_mut().zip(zmat.column(i)) {
                *d = *v;
            }
            let rbuf = rbuf.as_slice().expect("standard layout");
            refine_fit(eq.x, eq.y, qbuf, t, rbuf, &mut zi, &mut ei, &|| false)?;
            zmat.column_mut(i).assign(&ArrayView1::from(&zi[..]));
            e.column_mut(i).assign(&ArrayView1::from(&ei[..]));
        }
    }
    let colsum = q.sum_axis(ndarray::Axis(0));
    let spans = (t as f64 - colsum.dot(&colsum)).abs() <= 1e-9 * t as f64;
    let cond = cond_of_scaled(&rs, k);
    let mut factors = Vec::with_capacity(n);
    let mut rho = Vec::with_capacity(n);
    for (i, eq) in data.equations.iter().enumerate() {
        let rh = norm(e.column(i));
        let (tss_centred, tss_raw) = match eq.y.as_slice() {
            Some(y) => tss(y),
            None => tss(&eq.y.to_vec()),
        };
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

#[cfg(test)]
mod plain_residual_tests {
    use super::{cond_of_scaled, plain_residual, refine_fit, scaled_qr, PLAIN_RESIDUAL_ULPS};
    use crate::data::Equation;
    use ndarray::{Array1, Array2};

    /// The residual is left unrefined only where the refinement from the data in doubled
    /// precision (the reference, `refine_fit` on the same QR factors) would change rho, z and e
    /// by at most PLAIN_RESIDUAL_ULPS units in the last place relative to rho; data in levels
    /// that cancel (Longley-like) and a near-exact fit are refined. The bound is the
    /// refinement's own account of the errors it removes (see `refine_fit`).
    #[test]
    fn an_unrefined_residual_is_kept_only_where_refinement_would_not_change_it() {
        let mut seed = 7u64;
        let mut rnd = move || {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        let t = 2000;
        // (name, X, y, whether the plain residual should be kept)
        let mut cases: Vec<(&str, Array2<f64>, Array1<f64>, bool)> = Vec::new();
        let x = Array2::from_shape_fn((t, 5), |(_, j)| if j == 0 { 1.0 } else { 2.0 * rnd() });
        let y = Array1::from_shape_fn(t, |i| 0.5 + x[[i, 1]] - 0.3 * x[[i, 2]] + 0.7 * rnd());
        cases.push(("standardised regressors", x, y, true));
        let x = Array2::from_shape_fn((t, 4), |(_, j)| {
            if j == 0 {
                1.0
            } else {
                1.0e4 * j as f64 + 10.0 * rnd()
            }
        });
        let y = Array1::from_shape_fn(t, |i| {
            6.0e4 + 3.0 * x[[i, 1]] - 2.0 * x[[i, 2]] + 0.5 * x[[i, 3]] + rnd()
        });
        cases.push(("levels that cancel", x, y, false));
        let x = Array2::from_shape_fn((t, 3), |(_, j)| if j == 0 { 1.0 } else { rnd() });
        let y = Array1::from_shape_fn(t, |i| 1.0 + x[[i, 1]] + 2.0 * x[[i, 2]] + 1e-9 * rnd());
        cases.push(("near-exact fit", x, y, false));
        for (name, x, y, expect_plain) in cases {
            let k = x.ncols();
            let names: Vec<String> = (0..k).map(|j| format!("x{j}")).collect();
            let eq = Equation::new("e", y.view(), x.view()).with_regressors(names);
            let (q, rs, norms) = scaled_qr(&eq, &[], t).unwrap();
            let cond = cond_of_scaled(&rs, k);
            // R in data units, row-major
            let r: Vec<f64> = (0..k * k)
                .map(|a| rs[[a / k, a % k]] * norms[a % k])
                .collect();
            let qbuf: Vec<f64> = q.t().iter().copied().collect(); // column-major
            let z: Vec<f64> = (0..k).map(|j| q.column(j).dot(&y)).collect();
            let mut e = y.to_vec();
            let plain = plain_residual(&qbuf, t, &r, &z, &norms, y.dot(&y).sqrt(), cond, &mut e);
            assert_eq!(plain.is_some(), expect_plain, "{name}: cond {cond:.3e}");
            let (mut zr, mut er) = (z.clone(), vec![0.0; t]);
            let rho_ref = refine_fit(x.view(), y.view(), &qbuf, t, &r, &mut zr, &mut er, &|| {
                false
            })
            .unwrap();
            if let Some(rho) = plain {
                let tol = PLAIN_RESIDUAL_ULPS * f64::EPSILON * rho_ref;
                assert!(
                    (rho - rho_ref).abs() <= tol,
                    "{name}: rho {rho} against {rho_ref}"
                );
                let dz = z
                    .iter()
                    .zip(&zr)
                    .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
                assert!(
                    dz <= tol,
                    "{name}: z moved by {dz:.3e} (tolerance {tol:.3e})"
                );
                let de = e
                    .iter()
                    .zip(&er)
                    .map(|(a, b)| (a - b) * (a - b))
                    .sum::<f64>()
                    .sqrt();
                assert!(
                    de <= tol,
                    "{name}: e moved by {de:.3e} (tolerance {tol:.3e})"
                );
            }
        }
    }
}
