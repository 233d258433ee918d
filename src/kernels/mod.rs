//! Dense linear algebra of the core: one small trait of the operations the estimators need
//! (`Dense`), implemented by faer (the default) and, with the cargo feature `lapack`, by a
//! vendor BLAS/LAPACK; the conversions between ndarray views and faer's matrices; and the
//! helpers the estimators call (Gram matrices over row blocks, Cholesky factors, solves and
//! inverses, triangular panels of inverses, condition numbers).
//!
//! Hand-written kernels that measurements kept live in the submodules: `simd` (dot products,
//! axpy, combinations over pulp), `qr` (Householder QR of narrow blocks), `dot2` (residuals in
//! doubled precision, for accuracy), `small` (factorisations of the batch path's tiny
//! matrices).

pub(crate) mod dot2;
// (under the `lapack` feature only the tests that compare the backends use faer's)
#[cfg(any(not(feature = "lapack"), test))]
mod faer_backend;
#[cfg(feature = "lapack")]
mod lapack_backend;
pub(crate) mod qr;
pub(crate) mod simd;
pub(crate) mod small;

use faer::Par;
use ndarray::{Array1, Array2, ArrayView2, ArrayViewMut2, ShapeBuilder};

use crate::error::{Result, SurError};
pub(crate) use simd::{axpy, dot, scaled_norm};

/// The dense operations the estimators need. Matrices are ndarray views of any strides
/// (column-major is fastest); `par` is the parallelism faer may use (the vendor backend runs
/// its own threads).
pub(crate) trait Dense {
    /// The backend's name, as `build_info` reports it.
    const NAME: &'static str;
    /// The lower triangle of C = A'A (A: T x P, C: P x P), added to C when `accumulate`; the
    /// strict upper triangle of C is not written.
    fn syrk_lower(a: ArrayView2<f64>, c: ArrayViewMut2<f64>, accumulate: bool, par: Par);
    /// C = alpha A B, added to C when `accumulate`.
    fn gemm(
        alpha: f64,
        a: ArrayView2<f64>,
        b: ArrayView2<f64>,
        accumulate: bool,
        c: ArrayViewMut2<f64>,
        par: Par,
    );
    /// The lower Cholesky factor in place (the lower triangle is read); false when a pivot is
    /// not positive. Entries near the diagonal in the strict upper triangle may be overwritten.
    fn cholesky(a: ArrayViewMut2<f64>, par: Par) -> bool;
    /// Solves op(T) X = B in place for a triangular T (lower or upper; op: transposed or not).
    fn trsm(t: ArrayView2<f64>, lower: bool, transpose: bool, b: ArrayViewMut2<f64>, par: Par);
    /// Thin QR of a rows x m matrix (rows >= m): `a` becomes Q; returns R (m x m). None (and
    /// `a` undefined) when the backend's QR passed over a column it judged dependent on the
    /// earlier ones (faer's does: its R is then a staircase); the caller then uses
    /// Householder QR, which keeps such a column with its tiny pivot for the rank checks.
    fn qr_thin(a: ArrayViewMut2<f64>) -> Option<Array2<f64>>;
    /// The R factor (m x m, upper triangular; rows past `a`'s zero) of a rows x m matrix,
    /// which is overwritten; None as for `qr_thin`.
    fn qr_r(a: ArrayViewMut2<f64>) -> Option<Array2<f64>>;
    /// Eigenvalues (ascending) and eigenvectors (columns) of a symmetric matrix (both triangles
    /// given).
    fn sym_eigen(a: ArrayView2<f64>) -> Result<(Array1<f64>, Array2<f64>)>;
    /// The right singular vectors V (n x n, columns in order of decreasing singular value) of
    /// an m x n matrix: its null space is spanned by the columns past its rank.
    fn right_singular_vectors(a: ArrayView2<f64>) -> Result<Array2<f64>>;
}

#[cfg(not(feature = "lapack"))]
pub(crate) use faer_backend::Faer as Backend;
#[cfg(feature = "lapack")]
pub(crate) use lapack_backend::Lapack as Backend;

/// The backend this build computes with: "faer" or "lapack".
pub fn backend_name() -> &'static str {
    Backend::NAME
}

/// The instruction set faer's matrix products dispatch to on this CPU (the same test faer
/// makes): "avx512", "avx2+fma", "sse2" (x86-64 without AVX2), "neon" or "scalar".
pub fn isa_name() -> &'static str {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx512f") {
            "avx512"
        } else if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
            "avx2+fma"
        } else {
            "sse2"
        }
    }
    #[cfg(target_arch = "aarch64")]
    {
        "neon"
    }
    #[cfg(not(any(target_arch = "x86_64", target_arch = "aarch64")))]
    {
        "scalar"
    }
}

/// The instruction set of blocksur's own vector kernels (pulp's dispatch).
pub fn kernels_isa_name() -> &'static str {
    simd::best_name()
}

/// The size of the CPU's largest cache (cpuid's deterministic cache parameters on x86-64: leaf 4
/// on Intel, 0x8000001D on AMD; 1 MiB when it cannot be read). faer's matrix products on x86-64
/// reserve twice this much per thread for their packed operands.
#[cfg_attr(not(any(feature = "python", test)), allow(dead_code))]
pub fn last_level_cache_bytes() -> usize {
    static BYTES: std::sync::OnceLock<usize> = std::sync::OnceLock::new();
    *BYTES.get_or_init(|| {
        let mut best = 0usize;
        #[cfg(target_arch = "x86_64")]
        {
            use std::arch::x86_64::{__cpuid, __cpuid_count};
            let max_basic = __cpuid(0).eax;
            let max_ext = __cpuid(0x8000_0000).eax;
            for leaf in [4u32, 0x8000_001D] {
                if (leaf < 0x8000_0000 && leaf > max_basic)
                    || (leaf >= 0x8000_0000 && leaf > max_ext)
                {
                    continue;
                }
                for sub in 0..16 {
                    let r = __cpuid_count(leaf, sub);
                    if r.eax & 0x1f == 0 {
                        break;
                    }
                    let ways = ((r.ebx >> 22) & 0x3ff) as usize + 1;
                    let partitions = ((r.ebx >> 12) & 0x3ff) as usize + 1;
                    let line = (r.ebx & 0xfff) as usize + 1;
                    let sets = r.ecx as usize + 1;
                    best = best.max(ways * partitions * line * sets);
                }
                if best > 0 {
                    break;
                }
            }
        }
        best.max(1 << 20)
    })
}

/// An ndarray view as a faer matrix (no copy; any strides).
#[cfg(any(not(feature = "lapack"), test))]
pub(crate) fn faer_ref(a: ArrayView2<'_, f64>) -> faer::MatRef<'_, f64> {
    let (r, c) = a.dim();
    let s = a.strides();
    // SAFETY: the view's pointer, shape and strides (in elements) describe memory the view
    // borrows for its lifetime, which the result keeps.
    unsafe { faer::MatRef::from_raw_parts(a.as_ptr(), r, c, s[0], s[1]) }
}

/// A mutable ndarray view as a faer matrix (no copy; any strides).
#[cfg(any(not(feature = "lapack"), test))]
pub(crate) fn faer_mut(mut a: ArrayViewMut2<'_, f64>) -> faer::MatMut<'_, f64> {
    let (r, c) = a.dim();
    let (s0, s1) = (a.strides()[0], a.strides()[1]);
    // SAFETY: as `faer_ref`, and the view's unique borrow moves into the result.
    unsafe { faer::MatMut::from_raw_parts_mut(a.as_mut_ptr(), r, c, s0, s1) }
}

/// Eigenpairs sorted by ascending eigenvalue.
fn sorted_eigen(vals: Array1<f64>, vecs: Array2<f64>) -> (Array1<f64>, Array2<f64>) {
    let mut order: Vec<usize> = (0..vals.len()).collect();
    order.sort_by(|&a, &b| vals[a].total_cmp(&vals[b]));
    let v = Array1::from_iter(order.iter().map(|&i| vals[i]));
    let mut u = Array2::<f64>::zeros(vecs.dim().f());
    for (c, &i) in order.iter().enumerate() {
        u.column_mut(c).assign(&vecs.column(i));
    }
    (v, u)
}

/// C = A B (column-major result) through the backend.
pub(crate) fn matmul(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    let mut c = Array2::<f64>::zeros((a.nrows(), b.ncols()).f());
    matmul_into(1.0, a, b, false, c.view_mut());
    c
}

/// C = alpha A B (+ C when `accumulate`) through the backend, threaded when large.
pub(crate) fn matmul_into(
    alpha: f64,
    a: ArrayView2<f64>,
    b: ArrayView2<f64>,
    accumulate: bool,
    c: ArrayViewMut2<f64>,
) {
    if a.ncols() == 0 {
        if !accumulate {
            let mut c = c;
            c.fill(0.0);
        }
        return;
    }
    let flops = (a.nrows() * a.ncols() * b.ncols()) as f64;
    crate::runtime::with_par(flops, |par| Backend::gemm(alpha, a, b, accumulate, c, par));
}

/// W'W for a T x P matrix (any strides), full and symmetric, column-major.
pub fn gram(w: ArrayView2<f64>) -> Array2<f64> {
    gram_blocked(w, &|| false).expect("gram without cancellation cannot be interrupted")
}

/// W'W (full and symmetric, column-major) by the backend's syrk, also for small matrices
/// (faer's took 5.2 us on a 200 x 25 matrix against 6.8 us by dot products, 83 us on
/// 1000 x 60 against 380 us), accumulated over row blocks (each a fraction of a second); between blocks `cancel` is
/// asked whether to stop (then Err(Interrupted)). Over many blocks the block sums are added
/// pairwise, so a long product (T = 10^7) keeps the accuracy of one block's.
pub fn gram_blocked(w: ArrayView2<f64>, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Array2<f64>> {
    let p = w.ncols();
    let mut g = gram_lower_in(w, zeros_for_product(p), cancel)?;
    mirror(&mut g, true);
    Ok(g)
}

/// The lower triangle of W'W (P x P, column-major; zeros above the diagonal, never written),
/// over row blocks as `gram_blocked`. The buffer is not advised onto huge pages: a 2 MB page
/// holds dozens of columns, so touching their lower parts would page in the untouched upper
/// half as well (the one-pass route counts on it staying out of memory).
pub fn gram_lower(w: ArrayView2<f64>, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Array2<f64>> {
    let p = w.ncols();
    gram_lower_in(w, Array2::<f64>::zeros((p, p).f()), cancel)
}

/// `gram_lower` into `g`, a P x P column-major array of zeros.
fn gram_lower_in(
    w: ArrayView2<f64>,
    mut g: Array2<f64>,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<Array2<f64>> {
    let (t, p) = w.dim();
    if t == 0 || p == 0 {
        return Ok(g);
    }
    let rows = gram_block_rows(t, p);
    let blocks = t.div_ceil(rows);
    let syrk =
        |a: ArrayView2<f64>, c: ArrayViewMut2<f64>, accumulate: bool| syrk_rows(a, c, accumulate);
    if blocks <= PLAIN_SUM_BLOCKS {
        for b in 0..blocks {
            if cancel() {
                return Err(SurError::Interrupted);
            }
            let (r0, r1) = (b * rows, ((b + 1) * rows).min(t));
            syrk(w.slice(ndarray::s![r0..r1, ..]), g.view_mut(), b > 0);
        }
    } else {
        // pairwise: levels[l] holds the sum of 2^l blocks when `full` has bit l
        let mut levels: Vec<Array2<f64>> = Vec::new();
        let mut full = 0usize;
        let mut part = Array2::<f64>::zeros((p, p).f());
        for b in 0..blocks {
            if cancel() {
                return Err(SurError::Interrupted);
            }
            let (r0, r1) = (b * rows, ((b + 1) * rows).min(t));
            syrk(w.slice(ndarray::s![r0..r1, ..]), part.view_mut(), false);
            let mut level = 0;
            while full & (1 << level) != 0 {
                part += &levels[level];
                level += 1;
            }
            if levels.len() <= level {
                levels.resize_with(level + 1, || Array2::zeros((p, p).f()));
            }
            std::mem::swap(&mut levels[level], &mut part);
            full = (full >> level << level) + (1 << level);
        }
        for (level, sum) in levels.iter().enumerate() {
            if full & (1 << level) != 0 {
                g += sum;
            }
        }
    }
    Ok(g)
}

/// The lower triangle of A'A into C (added when `accumulate`). A narrow product (P up to
/// ROW_SPLIT_MAX_P) is split by rows into pieces whose products are formed on the pool's
/// threads, one piece a thread, and added in a fixed order: the backend's own threading splits
/// the product's columns and, on a tall narrow matrix (a million rows, thirty columns), spent
/// most of its time in barriers (5 s against 0.3 s). The pieces depend on the rows only, so
/// the result does not depend on the thread count. Wider products are threaded by the backend.
fn syrk_rows(a: ArrayView2<f64>, mut c: ArrayViewMut2<f64>, accumulate: bool) {
    let (t, p) = a.dim();
    let flops = (t * p * p) as f64;
    let pieces = (t / ROW_SPLIT_MIN_ROWS).clamp(1, ROW_SPLIT_PIECES);
    if pieces < 2
        || flops < crate::runtime::PARALLEL_MIN_FLOPS
        || !crate::runtime::parallel_allowed()
    {
        crate::runtime::with_par(flops, |par| Backend::syrk_lower(a, c, accumulate, par));
        return;
    }
    if p > ROW_SPLIT_MAX_P {
        return syrk_panels(a, c, accumulate);
    }
    let bounds: Vec<usize> = (0..=pieces).map(|i| i * t / pieces).collect();
    let one = |i: usize| {
        let mut g = Array2::<f64>::zeros((p, p).f());
        Backend::syrk_lower(
            a.slice(ndarray::s![bounds[i]..bounds[i + 1], ..]),
            g.view_mut(),
            false,
            Par::Seq,
        );
        g
    };
    let mut parts: Vec<Array2<f64>> = if crate::runtime::parallel_allowed() {
        use rayon::prelude::*;
        crate::runtime::install(|| (0..pieces).into_par_iter().map(one).collect())
    } else {
        (0..pieces).map(one).collect()
    };
    // pairwise, in a fixed order
    let mut width = 1;
    while width < pieces {
        for i in (0..pieces).step_by(2 * width) {
            if i + width < pieces {
                let (head, tail) = parts.split_at_mut(i + width);
                head[i] += &tail[0];
            }
        }
        width *= 2;
    }
    if accumulate {
        c += &parts[0];
    } else {
        c.assign(&parts[0]);
    }
}

/// The lower triangle of A'A into C by column panels of PANEL_COLUMNS, one panel a task on the
/// pool: its diagonal block by syrk, the rows below it by one product, each on one thread. For
/// wide products, where row pieces would need a P x P array each; like them, no barriers (the
/// backend's own threading of the (d)-sized product waited in them for a third of its time
/// on a shared host), and each entry is formed by one call on one thread, so the result does
/// not depend on the thread count.
fn syrk_panels(a: ArrayView2<f64>, mut c: ArrayViewMut2<f64>, accumulate: bool) {
    use rayon::prelude::*;
    let p = a.ncols();
    let mut panels: Vec<(usize, ArrayViewMut2<f64>)> = c
        .axis_chunks_iter_mut(ndarray::Axis(1), PANEL_COLUMNS)
        .enumerate()
        .map(|(i, v)| (i * PANEL_COLUMNS, v))
        .collect();
    // the widest products (the leftmost panels) first
    panels.sort_by_key(|(j0, _)| *j0);
    crate::runtime::install(|| {
        panels
            .into_par_iter()
            .with_max_len(1)
            .for_each(|(j0, mut panel)| {
                let w = panel.ncols();
                let (top, below) = panel.view_mut().split_at(ndarray::Axis(0), j0 + w);
                let diag = top.slice_move(ndarray::s![j0.., ..]);
                Backend::syrk_lower(
                    a.slice(ndarray::s![.., j0..j0 + w]),
                    diag,
                    accumulate,
                    Par::Seq,
                );
                if j0 + w < p {
                    Backend::gemm(
                        1.0,
                        a.slice(ndarray::s![.., j0 + w..]).t(),
                        a.slice(ndarray::s![.., j0..j0 + w]),
                        accumulate,
                        below,
                        Par::Seq,
                    );
                }
            })
    });
}

/// Columns per panel of `syrk_panels`.
const PANEL_COLUMNS: usize = 256;

/// Widest product `syrk_rows` splits by rows (its pieces' partial products are P x P each).
const ROW_SPLIT_MAX_P: usize = 1024;
/// Pieces of a row-split product, at most, and the fewest rows of a piece.
const ROW_SPLIT_PIECES: usize = 8;
const ROW_SPLIT_MIN_ROWS: usize = 512;

/// Up to this many row blocks the Gram matrix adds them one after the other.
const PLAIN_SUM_BLOCKS: usize = 64;

/// Rows per block of a T x P Gram product: about 2e9 multiply-adds (a fraction of a second,
/// the longest wait for a stop request), at least 1,024 rows.
pub(crate) fn gram_block_rows(t: usize, p: usize) -> usize {
    let rows = ((2e9 / (p as f64 * p as f64).max(1.0)) as usize).max(1024);
    let blocks = t.div_ceil(rows).max(1);
    t.div_ceil(blocks).max(1)
}

/// The lower Cholesky factor of a symmetric positive definite matrix (only its lower triangle
/// is read), in place; zeros above the diagonal. None when it is not positive definite.
pub fn chol_lower(a: Array2<f64>) -> Option<Array2<f64>> {
    chol_lower_of(a, false)
}

/// `chol_lower`, told whether the strict upper triangle of `a` already holds zeros (the GLS
/// matrix, whose lower triangle alone is written into a zeroed buffer): then that half is
/// neither written nor, where the buffer is fresh, faulted in.
pub fn chol_lower_of(mut a: Array2<f64>, upper_is_zero: bool) -> Option<Array2<f64>> {
    let n = a.nrows();
    if !a.t().is_standard_layout() {
        a = to_fortran(&a);
    }
    let flops = (n as f64).powi(3) / 3.0;
    let ok = crate::runtime::with_par(flops, |par| Backend::cholesky(a.view_mut(), par));
    if !ok || !(0..n).all(|i| a[[i, i]].is_finite() && a[[i, i]] > 0.0) {
        return None;
    }
    // faer writes scratch values into a narrow band above the diagonal (up to 15 entries above
    // it when measured; the whole triangle of a matrix of order below 16): cleared in a band
    // of UPPER_BAND when the rest is known to be zero, else entirely
    let band = if upper_is_zero { UPPER_BAND } else { n };
    for j in 1..n {
        a.column_mut(j)
            .slice_mut(ndarray::s![j.saturating_sub(band)..j])
            .fill(0.0);
    }
    Some(a)
}

/// Entries above the diagonal that `chol_lower_of` clears when the rest of the upper triangle
/// is zero already (the backend may write scratch values there; faer writes up to 15).
const UPPER_BAND: usize = 64;

/// Solves op(T) X = B for a triangular T: a copy of B is solved and returned.
pub(crate) fn solve_triangular(
    t: ArrayView2<f64>,
    lower: bool,
    transpose: bool,
    b: ArrayView2<f64>,
) -> Array2<f64> {
    let mut x = Array2::<f64>::zeros(b.dim().f());
    x.assign(&b);
    solve_triangular_in_place(t, lower, transpose, x.view_mut());
    x
}

/// Solves op(T) X = B in place.
pub(crate) fn solve_triangular_in_place(
    t: ArrayView2<f64>,
    lower: bool,
    transpose: bool,
    b: ArrayViewMut2<f64>,
) {
    let n = t.nrows();
    if n == 0 || b.ncols() == 0 {
        return;
    }
    let flops = (n * n * b.ncols()) as f64;
    crate::runtime::with_par(flops, |par| Backend::trsm(t, lower, transpose, b, par));
}

/// Solves (L L') X = B for the lower factor from `chol_lower` (B: n x m).
pub fn chol_solve_mat(l: &Array2<f64>, b: &Array2<f64>) -> Result<Array2<f64>> {
    if b.nrows() != l.nrows() {
        return Err(SurError::numerical("Cholesky solve", "dimension mismatch"));
    }
    let mut x = Array2::<f64>::zeros(b.dim().f());
    x.assign(b);
    solve_triangular_in_place(l.view(), true, false, x.view_mut());
    solve_triangular_in_place(l.view(), true, true, x.view_mut());
    Ok(x)
}

/// Solves (L L') x = b for the lower factor from `chol_lower`.
pub fn chol_solve(l: &Array2<f64>, b: &Array1<f64>) -> Result<Array1<f64>> {
    let x = chol_solve_mat(l, &b.view().insert_axis(ndarray::Axis(1)).to_owned())?;
    Ok(x.column(0).to_owned())
}

/// Rows and columns c.. x c..d of L^-1 for the lower Cholesky factor from `chol_lower` (the
/// rows above c are zero): solves L[c.., c..] X = I[c.., c..d].
pub(crate) fn inverse_columns(l: &Array2<f64>, c: usize, d: usize) -> Result<Array2<f64>> {
    let k = l.nrows();
    if l.ncols() != k || c > d || d > k {
        return Err(SurError::numerical(
            "inverse of the Cholesky factor",
            "columns out of range",
        ));
    }
    let (m, w) = (k - c, d - c);
    let mut x = Array2::<f64>::zeros((m, w).f());
    for j in 0..w.min(m) {
        x[[j, j]] = 1.0;
    }
    if m == 0 || w == 0 {
        return Ok(x);
    }
    if (0..m).any(|i| l[[c + i, c + i]] == 0.0) {
        return Err(SurError::numerical(
            "inverse of the Cholesky factor",
            "zero on the diagonal",
        ));
    }
    solve_triangular_in_place(l.slice(ndarray::s![c.., c..]), true, false, x.view_mut());
    Ok(x)
}

/// (L L')^-1 from the lower factor from `chol_lower`, full and symmetric.
pub fn chol_inverse(l: &Array2<f64>) -> Result<Array2<f64>> {
    let n = l.nrows();
    // U = L^-1 (lower), then (L L')^-1 = U'U
    let u = inverse_columns(l, 0, n)?;
    let mut out = zeros_advised((n, n).f());
    let flops = (n as f64).powi(3) / 3.0;
    crate::runtime::with_par(flops, |par| {
        Backend::syrk_lower(u.view(), out.view_mut(), false, par)
    });
    mirror(&mut out, true);
    Ok(out)
}

/// `chol_inverse`, consuming the factor.
pub fn chol_inverse_owned(l: Array2<f64>) -> Result<Array2<f64>> {
    chol_inverse(&l)
}

/// The exact 1-norm condition number of an upper-triangular matrix, from its inverse (inf when
/// it is singular).
pub fn triangular_condition(r: &Array2<f64>) -> f64 {
    if r.nrows() == 0 {
        return 1.0;
    }
    match upper_inverse(r) {
        Ok(inv) if inv.iter().all(|v| v.is_finite()) => match one_norm(r) * one_norm(&inv) {
            c if c.is_finite() => c,
            _ => f64::INFINITY,
        },
        _ => f64::INFINITY,
    }
}

/// The exact 1-norm condition number of a symmetric positive definite `a` from its lower
/// Cholesky factor `l`.
#[cfg(test)]
pub fn spd_condition(a: &Array2<f64>, l: &Array2<f64>) -> f64 {
    if a.nrows() == 0 {
        return 1.0;
    }
    match chol_inverse(l) {
        Ok(inv) => one_norm(a) * one_norm(&inv),
        Err(_) => f64::INFINITY,
    }
}

/// ln det of a symmetric positive definite matrix by Cholesky; None when it is not PD.
pub fn ln_det_spd(a: &Array2<f64>) -> Option<f64> {
    let l = chol_lower(to_fortran(a))?;
    Some((0..a.nrows()).map(|i| 2.0 * l[[i, i]].ln()).sum())
}

/// The R factor (m x m, upper triangular) of a rows x m matrix (overwritten).
pub(crate) fn qr_r(mut a: ArrayViewMut2<f64>) -> Array2<f64> {
    let copy = a.to_owned();
    if let Some(r) = Backend::qr_r(a.view_mut()) {
        return r;
    }
    let (rows, m) = copy.dim();
    // R of [A; 0] when there are fewer rows than columns
    let mut f = Array2::<f64>::zeros((rows.max(m), m).f());
    f.slice_mut(ndarray::s![..rows, ..]).assign(&copy);
    let (rr, mm) = f.dim();
    let (mut r, mut tau) = (vec![0.0; mm * mm], vec![0.0; mm]);
    qr::householder_qr(
        f.as_slice_memory_order_mut()
            .expect("fresh column-major array"),
        rr,
        mm,
        &mut r,
        &mut tau,
        &|| false,
    )
    .expect("never interrupted");
    Array2::from_shape_vec((m, m), r).expect("m x m")
}

/// Eigenvalues (ascending) and eigenvectors of a symmetric matrix.
pub(crate) fn sym_eigen(a: ArrayView2<f64>) -> Result<(Array1<f64>, Array2<f64>)> {
    Backend::sym_eigen(a)
}

/// An orthonormal basis (columns) of the null space of the m x n matrix `a` of full row rank
/// m < n: the right singular vectors past the first m.
pub(crate) fn null_space(a: ArrayView2<f64>) -> Result<Array2<f64>> {
    let (m, n) = a.dim();
    let v = Backend::right_singular_vectors(a)?;
    Ok(v.slice(ndarray::s![.., m.min(n)..]).to_owned())
}

/// Copies one triangle of a square matrix onto the other: the lower onto the upper when
/// `from_lower`, else the reverse. In 64 x 64 tiles, so that both the reads and the writes
/// stay within a few pages (element by element, one side runs across every column: for
/// P = 5000 that alone cost about as much as the Gram product's arithmetic).
pub(crate) fn mirror(g: &mut Array2<f64>, from_lower: bool) {
    const B: usize = 64;
    let p = g.nrows();
    for jb in (0..p).step_by(B) {
        for ib in (jb..p).step_by(B) {
            for j in jb..(jb + B).min(p) {
                for i in ib.max(j + 1)..(ib + B).min(p) {
                    if from_lower {
                        g[[j, i]] = g[[i, j]];
                    } else {
                        g[[i, j]] = g[[j, i]];
                    }
                }
            }
        }
    }
}

/// Asks the kernel to back a large, not yet touched buffer with transparent huge pages (Linux,
/// where they are enabled "madvise"): a 200 MB Gram matrix then takes about a hundred page
/// faults on first touch instead of fifty thousand (on the 1,000-equation benchmark the faults
/// of the data pass's fresh buffers had cost more system time than the arithmetic). Advice
/// only: errors are ignored, and nothing changes where huge pages are off.
pub(crate) fn advise_huge_pages<T>(buf: &mut [T]) {
    #[cfg(target_os = "linux")]
    {
        const HUGE: usize = 2 << 20;
        const MADV_HUGEPAGE: std::os::raw::c_int = 14;
        extern "C" {
            fn madvise(
                addr: *mut std::ffi::c_void,
                len: usize,
                advice: std::os::raw::c_int,
            ) -> std::os::raw::c_int;
        }
        let bytes = std::mem::size_of_val(buf);
        if bytes < 2 * HUGE {
            return;
        }
        let start = buf.as_mut_ptr() as usize;
        let first = start.next_multiple_of(HUGE);
        let end = (start + bytes) / HUGE * HUGE;
        if end > first {
            // SAFETY: [first, end) lies inside `buf`, which this thread holds mutably; the
            // advice changes no contents and no mapping a Rust reference relies on.
            unsafe { madvise(first as *mut std::ffi::c_void, end - first, MADV_HUGEPAGE) };
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = buf;
}

/// A P x P column-major array of zeros for a product about to be written, on huge pages
/// where it is large (see `advise_huge_pages`).
pub(crate) fn zeros_for_product(p: usize) -> Array2<f64> {
    zeros_advised((p, p).f())
}

/// An array of zeros of the given shape (and memory order), on huge pages where it is large.
/// For the N x N temporaries of the Omega step as well as the big products: on a
/// 1,000-equation system each is 8 MB, two thousand small page faults when fresh (numpy
/// advises its own allocations of 4 MB and more the same way).
pub(crate) fn zeros_advised<Sh: ShapeBuilder<Dim = ndarray::Ix2>>(shape: Sh) -> Array2<f64> {
    let mut g = Array2::<f64>::zeros(shape);
    if let Some(b) = g.as_slice_memory_order_mut() {
        advise_huge_pages(b);
    }
    g
}

/// A column-major copy.
pub fn to_fortran(a: &Array2<f64>) -> Array2<f64> {
    let mut f = Array2::<f64>::zeros(a.dim().f());
    f.assign(a);
    f
}

/// The 1-norm (largest column sum of absolute values) of a square matrix.
pub(crate) fn one_norm(a: &Array2<f64>) -> f64 {
    a.columns()
        .into_iter()
        .map(|c| c.iter().map(|v| v.abs()).sum::<f64>())
        .fold(0.0, f64::max)
}

/// The error of a triangular solve whose diagonal holds `d` at `i`: a zero (an exactly
/// singular factor) or a value that is not finite (NaN or inf: the factor was computed from
/// such values), named as what it is.
fn diagonal_defect(i: usize, d: f64) -> SurError {
    let what = if d == 0.0 {
        "zero".to_string()
    } else {
        format!("non-finite value ({d})")
    };
    SurError::numerical(
        "triangular solve",
        format!("{what} on the diagonal, at position {i}"),
    )
}

/// The inverse of an upper-triangular matrix (column by column back substitution).
pub fn upper_inverse(r: &Array2<f64>) -> Result<Array2<f64>> {
    let n = r.nrows();
    if r.ncols() != n {
        return Err(SurError::numerical(
            "triangular solve",
            "shapes do not match",
        ));
    }
    if let Some(i) = (0..n).find(|&i| r[[i, i]] == 0.0 || !r[[i, i]].is_finite()) {
        return Err(diagonal_defect(i, r[[i, i]]));
    }
    // column j of R^-1 by back substitution on R x = e_j (rows j+1.. of x are zero), the same
    // operations in the same order as `upper_solve`, without a vector per column
    let mut inv = Array2::<f64>::zeros((n, n));
    for j in 0..n {
        for i in (0..=j).rev() {
            let mut acc = if i == j { 1.0 } else { 0.0 };
            for p in (i + 1)..=j {
                acc -= r[[i, p]] * inv[[p, j]];
            }
            inv[[i, j]] = acc / r[[i, i]];
        }
    }
    Ok(inv)
}

/// Solves R x = b for upper-triangular R by back substitution.
pub fn upper_solve(r: &Array2<f64>, b: &Array1<f64>) -> Result<Array1<f64>> {
    let n = r.nrows();
    if r.ncols() != n || b.len() != n {
        return Err(SurError::numerical(
            "triangular solve",
            "shapes do not match",
        ));
    }
    let mut x = b.clone();
    for i in (0..n).rev() {
        let mut acc = x[i];
        for j in (i + 1)..n {
            acc -= r[[i, j]] * x[j];
        }
        let d = r[[i, i]];
        if d == 0.0 || !d.is_finite() {
            return Err(diagonal_defect(i, d));
        }
        x[i] = acc / d;
    }
    Ok(x)
}

/// Makes a matrix exactly symmetric by averaging it with its transpose.
pub fn symmetrize(a: &mut Array2<f64>) {
    let n = a.nrows();
    for i in 0..n {
        for j in (i + 1)..n {
            let m = 0.5 * (a[[i, j]] + a[[j, i]]);
            a[[i, j]] = m;
            a[[j, i]] = m;
        }
    }
}

/// A compact human-readable number for messages.
pub fn fmt_num(x: f64) -> String {
    let a = x.abs();
    if a != 0.0 && !(1e-3..1e5).contains(&a) {
        format!("{x:.3e}")
    } else {
        let s = format!("{x:.4}");
        let s = s.trim_end_matches('0').trim_end_matches('.');
        s.to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The last-level cache size from cpuid against the kernel's account of it (Linux sysfs,
    /// the largest `size` under /sys/devices/system/cpu/cpu0/cache), where there is one.
    #[test]
    fn the_last_level_cache_size_matches_the_kernel() {
        let ours = last_level_cache_bytes();
        assert!(ours >= 1 << 20);
        let dirs = std::fs::read_dir("/sys/devices/system/cpu/cpu0/cache");
        let mut sysfs = 0usize;
        for d in dirs.into_iter().flatten().flatten() {
            if let Ok(size) = std::fs::read_to_string(d.path().join("size")) {
                if let Some(kb) = size
                    .trim()
                    .strip_suffix('K')
                    .and_then(|v| v.parse::<usize>().ok())
                {
                    sysfs = sysfs.max(kb << 10);
                }
            }
        }
        if sysfs >= 1 << 20 && cfg!(target_arch = "x86_64") {
            assert_eq!(ours, sysfs);
        }
    }

    /// The views faer gets are the arrays themselves (no copy): every element read through the
    /// faer matrix is the ndarray element, for row-major, column-major, sliced, strided and
    /// reversed views, and writes through a mutable one land in the array.
    #[test]
    fn ndarray_views_convert_to_faer_without_copies() {
        let a = Array2::from_shape_fn((7, 5), |(i, j)| (10 * i + j) as f64);
        let f = to_fortran(&a);
        let views = [
            a.view(),
            f.view(),
            a.slice(ndarray::s![1..6;2, ..;2]),
            a.slice(ndarray::s![..;-1, 1..]),
            f.t(),
            a.slice(ndarray::s![3..3, ..]),
        ];
        for v in views {
            let m = faer_ref(v);
            assert_eq!((m.nrows(), m.ncols()), v.dim());
            for ((i, j), x) in v.indexed_iter() {
                assert_eq!(m[(i, j)], *x);
                assert!(std::ptr::eq(&m[(i, j)], x), "({i}, {j}) was copied");
            }
        }
        let mut b = a.clone();
        {
            let mut m = faer_mut(b.slice_mut(ndarray::s![..;2, ..;-1]));
            m[(1, 0)] = -1.0;
        }
        assert_eq!(b[[2, 4]], -1.0);
        assert_eq!(b.iter().filter(|v| **v < 0.0).count(), 1);
    }

    /// A factor from a matrix whose strict upper triangle is zero keeps it zero (the band the
    /// backend may write into is cleared), at orders on both sides of the band.
    #[test]
    fn a_factor_of_a_lower_triangle_keeps_a_zero_upper_triangle() {
        for n in [3usize, 15, 16, 70, 300, 700] {
            let b = Array2::from_shape_fn((n + 5, n), |(i, j)| ((i * 7 + j * 3) % 11) as f64 - 5.0);
            let a = b.t().dot(&b) + Array2::<f64>::eye(n);
            let mut low = to_fortran(&a);
            for j in 0..n {
                for i in 0..j {
                    low[[i, j]] = 0.0;
                }
            }
            let l = chol_lower_of(low, true).unwrap();
            for j in 0..n {
                for i in 0..j {
                    assert_eq!(l[[i, j]], 0.0, "order {n}: ({i}, {j})");
                }
            }
            let back = l.dot(&l.t());
            assert!(back
                .iter()
                .zip(a.iter())
                .all(|(x, y)| (x - y).abs() <= 1e-10 * y.abs().max(1.0)));
        }
    }

    /// Under the `lapack` feature: faer and the vendor LAPACK give the same Gram matrix, product,
    /// Cholesky factor, triangular solutions, R factor (up to the signs of its rows), and
    /// eigenvalues (common practice: both are backward stable, so they agree to rounding).
    #[cfg(feature = "lapack")]
    #[test]
    fn the_two_backends_agree() {
        use super::faer_backend::Faer;
        use super::lapack_backend::Lapack;
        let mut s = 3u64;
        let mut rnd = move || {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        let close = |a: &Array2<f64>, b: &Array2<f64>, what: &str| {
            let big = b.iter().fold(1e-300f64, |m, v| m.max(v.abs()));
            let err = a
                .iter()
                .zip(b.iter())
                .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()));
            assert!(err <= 1e-12 * big, "{what}: {err:.2e} against {big:.2e}");
        };
        for (t, p) in [(50usize, 7usize), (400, 90)] {
            let w = Array2::from_shape_fn((t, p).f(), |_| rnd());
            let (mut g1, mut g2) = (
                Array2::<f64>::zeros((p, p).f()),
                Array2::<f64>::zeros((p, p).f()),
            );
            Faer::syrk_lower(w.view(), g1.view_mut(), false, Par::Seq);
            Lapack::syrk_lower(w.view(), g2.view_mut(), false, Par::Seq);
            let lower = |g: &Array2<f64>| {
                Array2::from_shape_fn((p, p), |(i, j)| if i >= j { g[[i, j]] } else { 0.0 })
            };
            close(&lower(&g1), &lower(&g2), "syrk");
            let b = Array2::from_shape_fn((p, 5), |_| rnd());
            let (mut c1, mut c2) = (Array2::<f64>::zeros((t, 5)), Array2::<f64>::zeros((t, 5)));
            Faer::gemm(1.0, w.view(), b.view(), false, c1.view_mut(), Par::Seq);
            Lapack::gemm(1.0, w.view(), b.view(), false, c2.view_mut(), Par::Seq);
            close(&c1, &c2, "gemm");
            let mut a = lower(&g1);
            for i in 0..p {
                a[[i, i]] += 1.0;
            }
            let (mut l1, mut l2) = (to_fortran(&a), to_fortran(&a));
            assert!(
                Faer::cholesky(l1.view_mut(), Par::Seq)
                    && Lapack::cholesky(l2.view_mut(), Par::Seq)
            );
            close(&lower(&l1), &lower(&l2), "cholesky");
            let l = lower(&l1);
            for (lo, tr) in [(true, false), (true, true), (false, false), (false, true)] {
                let tri = if lo { l.clone() } else { l.t().to_owned() };
                let (mut x1, mut x2) = (b.clone(), b.clone());
                Faer::trsm(tri.view(), lo, tr, x1.view_mut(), Par::Seq);
                Lapack::trsm(tri.view(), lo, tr, x2.view_mut(), Par::Seq);
                close(&x1, &x2, "trsm");
            }
            let (mut q1, mut q2) = (w.clone(), w.clone());
            let r1 = Faer::qr_thin(q1.view_mut()).unwrap();
            let r2 = Lapack::qr_thin(q2.view_mut()).unwrap();
            close(&r1.mapv(f64::abs), &r2.mapv(f64::abs), "R of the thin QR");
            let r3 = Faer::qr_r(w.clone().view_mut()).unwrap();
            close(&r3.mapv(f64::abs), &r2.mapv(f64::abs), "R alone");
            let full = Array2::from_shape_fn((p, p), |(i, j)| a[[i.max(j), i.min(j)]]);
            let (e1, _) = Faer::sym_eigen(full.view()).unwrap();
            let (e2, _) = Lapack::sym_eigen(full.view()).unwrap();
            close(
                &e1.insert_axis(ndarray::Axis(1)),
                &e2.insert_axis(ndarray::Axis(1)),
                "eigenvalues",
            );
        }
    }

    /// The null space of a wide matrix of full row rank: R N = 0 and N'N = I (definitions), for
    /// shapes from one row to a nearly square matrix; and the symmetric eigendecomposition:
    /// A v = lambda v, ascending, orthonormal vectors.
    #[test]
    fn null_space_and_eigenvectors_satisfy_their_definitions() {
        let mut s = 17u64;
        let mut rnd = move || {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        for (m, n) in [(1usize, 2usize), (1, 5), (2, 3), (3, 7), (5, 6), (4, 30)] {
            let r = Array2::from_shape_fn((m, n), |_| rnd());
            let nb = null_space(r.view()).unwrap();
            assert_eq!(nb.dim(), (n, n - m));
            let rn = r.dot(&nb);
            assert!(rn.iter().all(|v| v.abs() < 1e-13), "{m}x{n}: R N = {rn}");
            let ntn = nb.t().dot(&nb);
            for ((i, j), v) in ntn.indexed_iter() {
                assert!(
                    (v - if i == j { 1.0 } else { 0.0 }).abs() < 1e-13,
                    "{m}x{n}: N'N[{i},{j}] = {v}"
                );
            }
        }
        let b = Array2::from_shape_fn((9, 6), |_| rnd());
        let a = b.t().dot(&b);
        let (vals, vecs) = sym_eigen(a.view()).unwrap();
        assert!(vals.windows(2).into_iter().all(|w| w[0] <= w[1]));
        for j in 0..6 {
            let av = a.dot(&vecs.column(j));
            for i in 0..6 {
                assert!((av[i] - vals[j] * vecs[[i, j]]).abs() < 1e-12);
            }
        }
    }
}
