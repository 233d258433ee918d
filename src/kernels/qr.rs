//! Thin QR factorisations: the written-out Householder QR for the narrow blocks of step 0 (one
//! equation's regressors: a few columns, many rows), the backend's blocked QR for wide ones.
//!
//! Why written out: faer's QR of a 5,000 x 6 block took 427 us against 20-40 us here (its
//! blocked algorithm is made for wide matrices); step 0 of case (c) factors 50 such blocks.
//! Well-conditioned narrow blocks of many rows go to CholeskyQR2 (three passes over the rows
//! instead of about m^2): step 0 of case (c) took 13.2 ms by Householder alone against
//! 2.6-3.0 ms with it (`examples/prof_engine`, two threads).

use ndarray::{Array2, ShapeBuilder};

use super::simd::{dot, dotn_with, outer_with, scaled_norm, sub_combination_with, Isa};
use super::small;
use super::{Backend, Dense};
use crate::error::{Result, SurError};

/// Widest block factored by `householder_qr` in `thin_qr_in_place`; wider ones go to the
/// backend.
pub(crate) const NARROW_QR_MAX: usize = 24;

/// Thin QR of a tall T x m matrix: Q (T x m, orthonormal columns, column-major) and
/// upper-triangular R (m x m) with A = Q R.
pub fn thin_qr(a: Array2<f64>) -> Result<(Array2<f64>, Array2<f64>)> {
    let (t, m) = a.dim();
    let mut a = if a.t().is_standard_layout() {
        a
    } else {
        super::to_fortran(&a)
    };
    let r = thin_qr_in_place(
        a.as_slice_memory_order_mut()
            .expect("column-major and contiguous"),
        t,
        m,
        &|| false,
    )?;
    Ok((a, r))
}

/// Thin QR in place: `buf` holds a column-major T x m matrix A (leading dimension T); on return
/// it holds Q and R (m x m, upper triangular, row-major) is returned, A = Q R. Blocks of up to
/// NARROW_QR_MAX columns, and wider ones the backend declines (numerically dependent columns),
/// by the written-out Householder QR, which asks `stop` before each column (a very long column
/// can be interrupted; a yes returns `SurError::Interrupted`).
pub fn thin_qr_in_place(
    buf: &mut [f64],
    t: usize,
    m: usize,
    stop: &dyn Fn() -> bool,
) -> Result<Array2<f64>> {
    assert_eq!(buf.len(), t * m, "thin_qr_in_place: buffer is not T x m");
    if t < m {
        return Err(SurError::numerical(
            "QR",
            format!("{t} rows for {m} columns"),
        ));
    }
    if m > NARROW_QR_MAX {
        let copy = buf.to_vec();
        let a = ndarray::ArrayViewMut2::from_shape((t, m).f(), &mut *buf).expect("T x m");
        if let Some(r) = Backend::qr_thin(a) {
            return Ok(r);
        }
        buf.copy_from_slice(&copy);
    }
    let mut r = vec![0.0f64; m * m];
    let mut tau = vec![0.0f64; m];
    householder_qr(buf, t, m, &mut r, &mut tau, stop)?;
    Ok(Array2::from_shape_vec((m, m), r).expect("m x m"))
}

/// The written-out Householder QR (LAPACK's unblocked geqr2 and org2r), with caller-owned
/// space: `buf` holds the column-major T x m matrix (T >= m) and gets Q; `r` (m x m, row-major,
/// every entry written) gets R; `tau` (m) is workspace. Small systems call it with buffers
/// they reuse.
pub(crate) fn householder_qr(
    buf: &mut [f64],
    t: usize,
    m: usize,
    r: &mut [f64],
    tau: &mut [f64],
    stop: &dyn Fn() -> bool,
) -> Result<()> {
    householder_qr_with(Isa::Best, buf, t, m, r, tau, stop)
}

pub(crate) fn householder_qr_with(
    isa: Isa,
    buf: &mut [f64],
    t: usize,
    m: usize,
    r: &mut [f64],
    tau: &mut [f64],
    stop: &dyn Fn() -> bool,
) -> Result<()> {
    debug_assert!(buf.len() == t * m && t >= m && r.len() == m * m && tau.len() == m);
    r.fill(0.0);
    tau.fill(0.0);
    // Factor: column j below the diagonal becomes the reflector v_j (v_j[0] = 1 implied).
    for j in 0..m {
        if stop() {
            return Err(SurError::Interrupted);
        }
        let (left, right) = buf.split_at_mut((j + 1) * t);
        let x = &mut left[j * t + j..];
        let ss = dot(x, x);
        let norm = if ss.is_finite() && ss > 1e-290 {
            ss.sqrt()
        } else {
            scaled_norm(x)
        };
        if norm > 0.0 {
            let alpha = if x[0] > 0.0 { -norm } else { norm };
            let v0 = x[0] - alpha;
            let inv = 1.0 / v0;
            for e in x[1..].iter_mut() {
                *e *= inv;
            }
            tau[j] = -v0 / alpha;
            x[0] = alpha;
        }
        r[j * m + j] = x[0];
        let v = &x[1..];
        let tj = tau[j];
        if tj != 0.0 {
            reflect_columns(isa, &mut right[..(m - j - 1) * t], t, j, v, tj);
        }
        for c in 0..(m - j - 1) {
            r[j * m + j + 1 + c] = right[c * t + j];
        }
    }
    // Q = H_0 .. H_{m-1} [I_m; 0], built backwards in place as in org2r.
    for j in (0..m).rev() {
        if stop() {
            return Err(SurError::Interrupted);
        }
        let (left, right) = buf.split_at_mut((j + 1) * t);
        let colj = &mut left[j * t..];
        let tj = tau[j];
        if tj != 0.0 {
            reflect_columns(isa, &mut right[..(m - j - 1) * t], t, j, &colj[j + 1..], tj);
        }
        for e in colj[j + 1..].iter_mut() {
            *e *= -tj;
        }
        colj[j] = 1.0 - tj;
        colj[..j].fill(0.0);
    }
    Ok(())
}

/// col <- (I - tau v v') col for the reflector v = [1; tail], on rows j.. of each column of
/// the column-major block `cols` (T rows each), up to four columns per two passes over the
/// rows (the reflector is read once per group).
fn reflect_columns(isa: Isa, cols: &mut [f64], t: usize, j: usize, tail: &[f64], tau: f64) {
    for group in cols.chunks_mut(4 * t) {
        let n = group.len() / t;
        let mut it = group.chunks_exact_mut(t).map(|c| &mut c[j..]);
        match n {
            4 => reflect_group::<4>(
                isa,
                std::array::from_fn(|_| it.next().expect("four columns")),
                tail,
                tau,
            ),
            3 => reflect_group::<3>(
                isa,
                std::array::from_fn(|_| it.next().expect("three columns")),
                tail,
                tau,
            ),
            2 => reflect_group::<2>(
                isa,
                std::array::from_fn(|_| it.next().expect("two columns")),
                tail,
                tau,
            ),
            _ => {
                for c in it {
                    reflect_group::<1>(isa, [c], tail, tau);
                }
            }
        }
    }
}

/// The reflection of N columns: d_c = tau (c[0] + tail'c[1..]), c[0] -= d_c, c[1..] -= d_c
/// tail (one pass over the rows for the products, one for the updates).
fn reflect_group<const N: usize>(isa: Isa, mut cs: [&mut [f64]; N], tail: &[f64], tau: f64) {
    let s = dotn_with::<N>(isa, std::array::from_fn(|i| &cs[i][1..]), tail);
    let mut w = [0.0; N];
    for ((c, sc), wc) in cs.iter_mut().zip(s).zip(w.iter_mut()) {
        let d = tau * (c[0] + sc);
        c[0] -= d;
        *wc = -d;
    }
    outer_with::<N>(isa, cs.map(|c| &mut c[1..]), tail, w);
}

/// Largest 1-norm condition number of the column-scaled regressors that `cholqr2_in_place`
/// accepts. CholeskyQR2 is as accurate as Householder QR (orthogonality and backward error of
/// the order of the unit roundoff) while kappa^2 u stays well below one, kappa below about
/// u^(-1/2) / sqrt(T m) (Yamamoto, Nakatsukasa, Yanagisawa and Fukaya 2015); 1e4 keeps
/// kappa^2 u below 1e-8, a margin of several orders at any T in memory.
pub(crate) const CHOLQR_COND_MAX: f64 = 1e4;

/// Shortest columns `cholqr2_in_place` takes: below, its fixed costs (the small factorisations
/// and the condition test) outweigh the passes it saves (case (a), T = 200: step 0 34 -> 43 us
/// with it), and Householder keeps the rounding of small systems as it was (the restricted
/// first-order-condition property test on nearly saturated 7-row systems sits close to its
/// tolerance either way).
pub(crate) const CHOLQR_MIN_T: usize = 512;

/// Widest block `cholqr2_in_place` takes (its passes grow as m^2 / 4 and Householder's as m^2).
pub(crate) const CHOLQR_MAX_M: usize = 16;

/// Thin QR in place by CholeskyQR2, for a well-conditioned narrow block: R_1 from the
/// Cholesky factor of A'A (columns scaled to unit norm for the factor and the condition test),
/// Q_1 = A R_1^-1, then the same again on Q_1 (the second pass brings the orthogonality of Q to
/// the rounding level), R = R_2 R_1. Three passes over the rows (the Gram matrix; Q_1 with its
/// Gram matrix; Q), in chunks that stay in cache, against about m^2 passes for the written-out
/// Householder.
///
/// Returns Ok(None), with `buf` untouched, when it declines: m outside 1..=CHOLQR_MAX_M, a
/// value that is not finite or a column norm far from 1 (below 1e-100 or above 1e100), or a
/// condition number of the column-scaled block above CHOLQR_COND_MAX; the caller then uses
/// Householder. R is returned row-major, its diagonal positive.
pub(crate) fn cholqr2_in_place(
    buf: &mut [f64],
    t: usize,
    m: usize,
    stop: &dyn Fn() -> bool,
) -> Result<Option<Array2<f64>>> {
    if m == 0 || m > CHOLQR_MAX_M || t < CHOLQR_MIN_T.max(m) || buf.len() != t * m {
        return Ok(None);
    }
    let mut g1 = vec![0.0f64; m * m];
    gram_rows(buf, t, m, &mut g1, None);
    if !g1.iter().all(|v| v.is_finite()) {
        return Ok(None);
    }
    let mut norms = [0.0f64; CHOLQR_MAX_M];
    for j in 0..m {
        let nj = g1[j * m + j].sqrt();
        if !(1e-100..=1e100).contains(&nj) {
            return Ok(None);
        }
        norms[j] = nj;
    }
    // Cholesky of the scaled Gram matrix D G D (unit diagonal), D = diag(1 / norms)
    for j in 0..m {
        for i in 0..m {
            g1[j * m + i] /= norms[i] * norms[j];
        }
    }
    if !small::small_chol(&mut g1, m) {
        return Ok(None);
    }
    // R_1 of the scaled block is L' (upper): its condition decides
    let r1s = Array2::from_shape_fn((m, m), |(i, j)| g1[i * m + j]);
    let cond = super::triangular_condition(&r1s);
    // (a NaN condition number declines too)
    if cond.is_nan() || cond > CHOLQR_COND_MAX {
        return Ok(None);
    }
    if stop() {
        return Err(SurError::Interrupted);
    }
    // R_1 in the block's units (column j times norms[j]); Q_1 = A R_1^-1 and its Gram matrix
    let r1 = Array2::from_shape_fn((m, m), |(i, j)| r1s[[i, j]] * norms[j]);
    let mut g2 = vec![0.0f64; m * m];
    gram_rows(buf, t, m, &mut g2, Some(&r1));
    if stop() {
        return Err(SurError::Interrupted);
    }
    // Q_1 has orthonormal columns to about kappa^2 u <= 1e-8: this factor exists
    if !(g2.iter().all(|v| v.is_finite()) && small::small_chol(&mut g2, m)) {
        return Err(SurError::numerical(
            "CholeskyQR2",
            "the second Gram matrix is not positive definite",
        ));
    }
    let r2 = Array2::from_shape_fn((m, m), |(i, j)| g2[i * m + j]);
    let mut chunk = 0;
    while chunk < t {
        let end = (chunk + QR_CHUNK).min(t);
        solve_rows(buf, t, m, &r2, chunk, end);
        chunk = end;
    }
    Ok(Some(r2.dot(&r1)))
}

/// Rows per chunk of the CholeskyQR2 passes: a chunk of every column stays in the first-level
/// cache while all the column pairs (or the triangular solve) are done on it.
const QR_CHUNK: usize = 512;

/// Rows r0..r1 of the column-major T x m block `buf` times R^-1 (R upper triangular), in
/// place: column j becomes (a_j - sum_{i<j} r_ij q_i) / r_jj, the columns before it final.
fn solve_rows(buf: &mut [f64], t: usize, m: usize, r: &Array2<f64>, r0: usize, r1: usize) {
    let mut c = [0.0f64; CHOLQR_MAX_M];
    for j in 0..m {
        let (done, rest) = buf.split_at_mut(j * t);
        let col = &mut rest[r0..r1];
        for i in 0..j {
            c[i] = r[[i, j]];
        }
        sub_combination_with(Isa::Best, col, &c[..j], |i| &done[i * t + r0..i * t + r1]);
        let inv = 1.0 / r[[j, j]];
        col.iter_mut().for_each(|v| *v *= inv);
    }
}

/// The Gram matrix (column-major m x m, both triangles) of the T x m block `buf`, or, with
/// `solve`, first replaces the block by buf R^-1 and gives the Gram matrix of that: in chunks
/// of QR_CHUNK rows (one pass over the block), each chunk's products by `dotn` (eight partial
/// sums) and the chunks' sums added pairwise (a binary counter of partial sums), so the
/// rounding error grows as log T.
fn gram_rows(buf: &mut [f64], t: usize, m: usize, g: &mut [f64], solve: Option<&Array2<f64>>) {
    let pairs = m * (m + 1) / 2;
    // levels[l] holds the sum of 2^l chunks when `full` has bit l
    let mut levels: Vec<f64> = Vec::new();
    let mut full = 0usize;
    let mut part = vec![0.0f64; pairs];
    let mut chunk = 0;
    while chunk < t {
        let end = (chunk + QR_CHUNK).min(t);
        if let Some(r) = solve {
            solve_rows(buf, t, m, r, chunk, end);
        }
        let col = |j: usize| &buf[j * t + chunk..j * t + end];
        let mut p = 0;
        for j in 0..m {
            let v = col(j);
            let mut i = 0;
            while i + 4 <= j + 1 {
                part[p..p + 4].copy_from_slice(&dotn_with(
                    Isa::Best,
                    [col(i), col(i + 1), col(i + 2), col(i + 3)],
                    v,
                ));
                p += 4;
                i += 4;
            }
            while i <= j {
                part[p] = dot(col(i), v);
                p += 1;
                i += 1;
            }
        }
        // carry the chunk's sums up the binary counter
        let mut level = 0;
        while full & (1 << level) != 0 {
            let stored = &levels[level * pairs..(level + 1) * pairs];
            part.iter_mut().zip(stored).for_each(|(a, b)| *a += b);
            level += 1;
        }
        if levels.len() < (level + 1) * pairs {
            levels.resize((level + 1) * pairs, 0.0);
        }
        levels[level * pairs..(level + 1) * pairs].copy_from_slice(&part);
        full = (full >> level << level) + (1 << level);
        chunk = end;
    }
    // the levels in use, smallest first
    let mut total = vec![0.0f64; pairs];
    for level in 0..usize::BITS as usize {
        if full & (1 << level) != 0 {
            total
                .iter_mut()
                .zip(&levels[level * pairs..(level + 1) * pairs])
                .for_each(|(a, b)| *a += b);
        }
    }
    let mut p = 0;
    for j in 0..m {
        for i in 0..=j {
            g[j * m + i] = total[p];
            g[i * m + j] = total[p];
            p += 1;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Both variants (scalar and the dispatched SIMD) and the backend's QR for wide blocks:
    /// Q'Q = I and Q R = A to rounding, R upper triangular (common practice: Householder QR
    /// is backward stable, errors of a few units of eps times the norms).
    #[test]
    fn householder_and_backend_qr_factor_the_matrix() {
        let mut s = 5u64;
        let mut rnd = move || {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        for (t, m) in [
            (7usize, 1usize),
            (50, 3),
            (300, 6),
            (1500, 9),
            (200, NARROW_QR_MAX + 6),
        ] {
            let a: Vec<f64> = (0..t * m).map(|_| rnd()).collect();
            let check = |q: &[f64], r: &Array2<f64>, label: &str| {
                for i in 0..m {
                    for j in 0..m {
                        let qq = dot(&q[i * t..(i + 1) * t], &q[j * t..(j + 1) * t]);
                        assert!(
                            (qq - if i == j { 1.0 } else { 0.0 }).abs() < 1e-13,
                            "{label} t={t} m={m}: Q'Q[{i},{j}] = {qq}"
                        );
                        if i > j {
                            assert_eq!(r[[i, j]], 0.0, "{label}: R not upper triangular");
                        }
                    }
                }
                for row in 0..t {
                    for j in 0..m {
                        let v: f64 = (0..=j).map(|c| q[c * t + row] * r[[c, j]]).sum();
                        assert!(
                            (v - a[j * t + row]).abs() < 1e-13,
                            "{label} t={t} m={m}: (QR)[{row},{j}]"
                        );
                    }
                }
            };
            if m <= NARROW_QR_MAX {
                for isa in Isa::ALL {
                    let mut q = a.clone();
                    let (mut r, mut tau) = (vec![0.0; m * m], vec![0.0; m]);
                    householder_qr_with(isa, &mut q, t, m, &mut r, &mut tau, &|| false).unwrap();
                    check(
                        &q,
                        &Array2::from_shape_vec((m, m), r).unwrap(),
                        &format!("{isa:?}"),
                    );
                }
            }
            let mut q = a.clone();
            let r = thin_qr_in_place(&mut q, t, m, &|| false).unwrap();
            check(&q, &r, "thin_qr_in_place");
        }
        let mut q = vec![0.0; 12];
        assert!(matches!(
            householder_qr(&mut q, 6, 2, &mut [0.0; 4], &mut [0.0; 2], &|| true),
            Err(SurError::Interrupted)
        ));
    }
}
