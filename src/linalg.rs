//! Dense kernels: the Gram matrix by BLAS syrk, triangular inverses, and the inverse of the
//! cross-equation covariance with a diagnosis when it is singular.

use ndarray::{Array1, Array2, ArrayView2, ShapeBuilder};
use ndarray_linalg::{Eigh, UPLO};

use crate::error::{Result, SurError};

/// W'W for a column-major (Fortran-order) T x P matrix, by BLAS syrk (T P^2 flops, half of a
/// general product), returned full and symmetric.
pub fn gram(w: ArrayView2<f64>) -> Array2<f64> {
    gram_blocked(w, &|| false).expect("gram without cancellation cannot be interrupted")
}

/// W'W by dot products of the columns of a column-major T x P buffer, skipping the pairs
/// (i, j), i >= j, that `skip` names (they stay zero), returned full and symmetric.
pub(crate) fn gram_dots(buf: &[f64], t: usize, p: usize, skip: impl Fn(usize, usize) -> bool) -> Array2<f64> {
    let mut g = Array2::<f64>::zeros((p, p).f());
    let col = |j: usize| &buf[j * t..(j + 1) * t];
    for j in 0..p {
        let cj = col(j);
        let mut i = j;
        while i < p {
            if skip(i, j) {
                i += 1;
                continue;
            }
            // four columns against column j in one pass over the rows (a group may include
            // pairs `skip` names: computed, then left at zero)
            if i + 4 <= p {
                let v = dotn([col(i), col(i + 1), col(i + 2), col(i + 3)], cj);
                for (d, vd) in v.iter().enumerate() {
                    if !skip(i + d, j) {
                        g[[i + d, j]] = *vd;
                        g[[j, i + d]] = *vd;
                    }
                }
                i += 4;
            } else {
                let v = dot(col(i), cj);
                g[[i, j]] = v;
                g[[j, i]] = v;
                i += 1;
            }
        }
    }
    g
}

/// Largest T P^2 whose Gram matrix is formed by dot products rather than BLAS syrk.
pub(crate) const SMALL_GRAM: f64 = 1.0e6;

/// W'W accumulated over row blocks sized so that each block takes a fraction of a second; between
/// blocks `cancel` is asked whether to stop (it returns Err(Interrupted) when it says yes).
pub fn gram_blocked(w: ArrayView2<f64>, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Array2<f64>> {
    gram_of(w, cancel)
}

fn gram_of(w: ArrayView2<f64>, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Array2<f64>> {
    let (t, p) = w.dim();
    if t == 0 || p == 0 {
        return Ok(Array2::<f64>::zeros((p, p).f()));
    }
    let owned;
    let w = if w.t().is_standard_layout() {
        w
    } else {
        owned = to_fortran(&w.to_owned());
        owned.view()
    };
    // Small: plain dot products. A BLAS call would wake its thread pool, which costs more than
    // the product itself at this size (and the pairwise dot keeps the rounding of long sums).
    if (t as f64) * (p as f64) * (p as f64) <= SMALL_GRAM {
        if let Some(buf) = w.as_slice_memory_order().filter(|b| b.len() == t * p) {
            return Ok(gram_dots(buf, t, p, |_, _| false));
        }
    }
    // Wide products go to BLAS syrk, which threads well at that size (P = 5000: 0.6 s against
    // 0.7 s for the packed kernel, `examples/prof_gram`); below, the packed kernel, which
    // uses both cores where this OpenBLAS's syrk does not (P = 350: 9 ms against 11-16 ms).
    if let Some(kernel) = crate::gram::Kernel::best().filter(|_| p < PACKED_GRAM_MAX_P) {
        if let Some(buf) = w.as_slice_memory_order().filter(|b| b.len() == t * p) {
            let flops = (t as f64) * (p as f64) * (p as f64);
            let threads = if flops < PARALLEL_GRAM { 1 } else { crate::prepare::work_threads(flops) };
            return crate::gram::gram_packed(kernel, buf, t, p, threads, cancel);
        }
    }
    syrk_blocks(w, cancel)
}

/// Gram matrices of at least this many columns go to BLAS syrk.
const PACKED_GRAM_MAX_P: usize = 2000;

/// Below this T P^2 one thread forms the Gram matrix (starting a second costs more than it saves).
const PARALLEL_GRAM: f64 = 4.0e6;

/// W'W by BLAS syrk over row blocks (column-major `w`), asking `cancel` between blocks: the
/// path for CPUs without AVX2/FMA, and the comparison the benchmarks make.
pub fn gram_syrk(w: ArrayView2<f64>, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Array2<f64>> {
    syrk_blocks(w, cancel)
}

/// Rows per block of a T x p rank-k update split so that `cancel` is asked between blocks:
/// about 2e9 flops per block (a fraction of a second), blocks of equal size.
pub(crate) fn syrk_block_rows(t: usize, p: usize) -> usize {
    let rows = ((2e9 / (p as f64 * p as f64).max(1.0)) as usize).clamp(256, t.max(256));
    t.div_ceil(t.div_ceil(rows).max(1)).max(1)
}

/// `gram_syrk`: the upper triangle by syrk, mirrored.
fn syrk_blocks(w: ArrayView2<f64>, cancel: &(dyn Fn() -> bool + Sync)) -> Result<Array2<f64>> {
    let (t, p) = w.dim();
    let mut g = zeros_for_product(p);
    if t == 0 || p == 0 {
        return Ok(g);
    }
    let owned;
    let w = if w.t().is_standard_layout() {
        w
    } else {
        owned = to_fortran(&w.to_owned());
        owned.view()
    };
    let rows = syrk_block_rows(t, p);
    let mut start = 0;
    while start < t {
        let end = (start + rows).min(t);
        if cancel() {
            return Err(SurError::Interrupted);
        }
        // SAFETY: `w` is column-major with leading dimension t; rows start..end of it form a
        // (end - start) x p block with the same leading dimension. `g` is p x p column-major.
        unsafe {
            cblas_sys::cblas_dsyrk(
                cblas_sys::CBLAS_LAYOUT::CblasColMajor,
                cblas_sys::CBLAS_UPLO::CblasUpper,
                cblas_sys::CBLAS_TRANSPOSE::CblasTrans,
                p as i32,
                (end - start) as i32,
                1.0,
                w.as_ptr().add(start),
                t as i32,
                1.0,
                g.as_mut_ptr(),
                p as i32,
            );
        }
        start = end;
    }
    mirror(&mut g, false);
    Ok(g)
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
            fn madvise(addr: *mut std::ffi::c_void, len: usize, advice: std::os::raw::c_int) -> std::os::raw::c_int;
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

/// Estimate of the 1-norm condition number of an upper-triangular matrix (LAPACK trcon).
pub fn triangular_condition(r: &Array2<f64>) -> f64 {
    let n = r.nrows() as i32;
    if n == 0 {
        return 1.0;
    }
    if (n as usize) <= SMALL_DENSE {
        // small: the exact 1-norm condition number, from the inverse
        let norm1 = |m: &Array2<f64>| m.columns().into_iter().map(|c| c.iter().map(|v| v.abs()).sum::<f64>()).fold(0.0, f64::max);
        return match upper_inverse(r) {
            Ok(inv) if inv.iter().all(|v| v.is_finite()) => norm1(r) * norm1(&inv),
            _ => f64::INFINITY,
        };
    }
    let f = to_fortran(r);
    let (mut rcond, mut info) = (0.0, 0);
    let mut work = vec![0.0; 3 * n as usize];
    let mut iwork = vec![0i32; n as usize];
    // SAFETY: `f` is n x n column-major; work sizes as LAPACK documents (3n, n).
    unsafe {
        lapack_sys::dtrcon_(
            &(b'1' as std::ffi::c_char),
            &(b'U' as std::ffi::c_char),
            &(b'N' as std::ffi::c_char),
            &n,
            f.as_ptr(),
            &n,
            &mut rcond,
            work.as_mut_ptr(),
            iwork.as_mut_ptr(),
            &mut info,
        )
    };
    if info != 0 || rcond <= 0.0 {
        f64::INFINITY
    } else {
        1.0 / rcond
    }
}

/// The 1-norm (largest column sum of absolute values) of a square matrix.
pub(crate) fn one_norm(a: &Array2<f64>) -> f64 {
    a.columns().into_iter().map(|c| c.iter().map(|v| v.abs()).sum::<f64>()).fold(0.0, f64::max)
}

/// Estimate of the 1-norm condition number of a symmetric positive definite matrix `a`, from its
/// lower Cholesky factor `l` (LAPACK pocon).
pub fn spd_condition(a: &Array2<f64>, l: &Array2<f64>) -> f64 {
    let n = a.nrows() as i32;
    if n == 0 {
        return 1.0;
    }
    let anorm = one_norm(a);
    if (n as usize) <= SMALL_DENSE {
        // small: the exact 1-norm condition number, from the inverse
        return match chol_inverse(l) {
            Ok(inv) => anorm * one_norm(&inv),
            Err(_) => f64::INFINITY,
        };
    }
    let (mut rcond, mut info) = (0.0, 0);
    let mut work = vec![0.0; 3 * n as usize];
    let mut iwork = vec![0i32; n as usize];
    // SAFETY: `l` is n x n column-major (from chol_lower); work sizes as LAPACK documents.
    unsafe {
        lapack_sys::dpocon_(
            &(b'L' as std::ffi::c_char),
            &n,
            l.as_ptr(),
            &n,
            &anorm,
            &mut rcond,
            work.as_mut_ptr(),
            iwork.as_mut_ptr(),
            &mut info,
        )
    };
    if info != 0 || rcond <= 0.0 {
        f64::INFINITY
    } else {
        1.0 / rcond
    }
}

/// y = A x for a symmetric n x n A given by its lower triangle, column-major (the upper
/// triangle is not read).
pub(crate) fn sym_lower_matvec(a: &[f64], n: usize, x: &[f64], y: &mut [f64]) {
    y[..n].fill(0.0);
    for j in 0..n {
        let col = &a[j * n + j..(j + 1) * n]; // rows j.. of column j
        axpy(&mut y[j..n], col, x[j]);
        y[j] += dot(&col[1..], &x[j + 1..n]);
    }
}

/// Solves L L' x = b in place for a lower-triangular L, column-major (as from `chol_lower`).
pub(crate) fn chol_solve_in_place(l: &[f64], n: usize, b: &mut [f64]) {
    for j in 0..n {
        b[j] /= l[j * n + j];
        let v = b[j];
        axpy(&mut b[j + 1..n], &l[j * n + j + 1..(j + 1) * n], -v);
    }
    for j in (0..n).rev() {
        let s = dot(&l[j * n + j + 1..(j + 1) * n], &b[j + 1..n]);
        b[j] = (b[j] - s) / l[j * n + j];
    }
}

/// Up to this order the Cholesky factor, its solves and inverse, and the condition numbers are
/// computed here rather than by LAPACK: for a handful of rows a LAPACK call costs more in
/// overhead (and OpenBLAS thread wake-ups) than in arithmetic.
const SMALL_DENSE: usize = 64;

/// In-place lower Cholesky factor of a column-major n x n buffer (lower triangle read; upper
/// zeroed), left-looking by columns. False when a pivot is not positive (not positive definite).
pub(crate) fn small_chol(a: &mut [f64], n: usize) -> bool {
    if !chol_columns(a, n, 0, n) {
        return false;
    }
    for j in 0..n {
        a[j * n..j * n + j].fill(0.0);
    }
    true
}

/// Columns j0..j1 of the lower Cholesky factor of the n x n column-major `a`, in place, given
/// that the contributions of the columns before j0 have already been subtracted: each column
/// (rows j..n) minus its products with the columns j0..j before it, then scaled by its pivot.
/// False when a pivot is not positive.
fn chol_columns(a: &mut [f64], n: usize, j0: usize, j1: usize) -> bool {
    for j in j0..j1 {
        for l in j0..j {
            let ljl = a[l * n + j];
            if ljl != 0.0 {
                let (left, right) = a.split_at_mut(j * n);
                axpy(&mut right[j..n], &left[l * n + j..l * n + n], -ljl);
            }
        }
        let d = a[j * n + j];
        if !(d > 0.0 && d.is_finite()) {
            return false;
        }
        let dj = d.sqrt();
        a[j * n + j] = dj;
        let inv = 1.0 / dj;
        for v in &mut a[j * n + j + 1..(j + 1) * n] {
            *v *= inv;
        }
    }
    true
}

/// Largest order factored by `blocked_chol` rather than LAPACK potrf. OpenBLAS's potrf wakes
/// its thread pool for every order above 64, and below about 600 that costs more than the
/// second thread saves (K = 300: 0.31 ms here against 0.39-0.83 ms for potrf on two threads,
/// K = 400: 0.66 against 0.72; at 512 potrf is ahead, `examples/prof_chol`).
const BLOCKED_CHOL_MAX: usize = 448;

/// Columns per block of `blocked_chol`.
const CHOL_NB: usize = 24;

/// Lower Cholesky factor in place of the n x n column-major `a` (lower triangle read; the
/// strictly upper part is left undefined), on the calling thread: right-looking in blocks of
/// CHOL_NB columns, each diagonal block by columns, the panel below it by a triangular solve,
/// and the trailing lower triangle updated by matrixmultiply's single-threaded dgemm, block
/// column by block column. False when a pivot is not positive (not positive definite).
pub(crate) fn blocked_chol(a: &mut [f64], n: usize) -> bool {
    assert!(a.len() >= n * n);
    let mut j0 = 0;
    while j0 < n {
        let j1 = (j0 + CHOL_NB).min(n);
        // the block's columns, rows j0..n: the diagonal block and the panel below it
        if !chol_columns(a, n, j0, j1) {
            return false;
        }
        if j1 < n {
            // trailing lower triangle: A22 -= L21 L21', one block column of A22 at a time
            // (its rows from the block's first down), so nothing above the diagonal blocks
            // is computed
            let kb = j1 - j0;
            let mut c0 = j1;
            while c0 < n {
                let c1 = (c0 + CHOL_NB).min(n);
                let (m, w) = (n - c0, c1 - c0);
                let base = a.as_mut_ptr();
                // SAFETY: A = rows c0..n of columns j0..j1 (m x kb, strides 1 and n); B =
                // (rows c0..c1 of columns j0..j1)' (kb x w, strides n and 1); C = rows c0..n
                // of columns c0..c1 (m x w, strides 1 and n). All inside the n x n buffer;
                // C does not overlap A or B (its columns are c0 >= j1).
                unsafe {
                    matrixmultiply::dgemm(
                        m,
                        kb,
                        w,
                        -1.0,
                        base.add(j0 * n + c0),
                        1,
                        n as isize,
                        base.add(j0 * n + c0),
                        n as isize,
                        1,
                        1.0,
                        base.add(c0 * n + c0),
                        1,
                        n as isize,
                    );
                }
                c0 = c1;
            }
        }
        j0 = j1;
    }
    true
}

/// U = L^-1 (lower, column-major, n x n, into `u`) of a lower-triangular column-major L,
/// column by column.
pub(crate) fn small_lower_inverse(l: &[f64], n: usize, u: &mut [f64]) {
    lower_inverse_columns(l, n, 0, n, n, u);
}

/// Columns 0..w of the inverse of the m x m lower triangle L[c.., c..] of the column-major
/// `l` (leading dimension `ld`), into the m x w column-major `x`: forward substitution on
/// L x = e_j by columns of L (contiguous), x[..j] = 0. For small orders, where a BLAS trsm
/// costs more in call overhead than the work.
pub(crate) fn lower_inverse_columns(l: &[f64], ld: usize, c: usize, m: usize, w: usize, x: &mut [f64]) {
    x[..m * w].fill(0.0);
    for j in 0..w {
        let col = &mut x[j * m..(j + 1) * m];
        col[j] = 1.0;
        for p in j..m {
            let lcol = &l[(c + p) * ld + c..(c + p) * ld + c + m];
            let v = col[p] / lcol[p];
            col[p] = v;
            if v != 0.0 {
                for (xi, li) in col[p + 1..].iter_mut().zip(&lcol[p + 1..]) {
                    *xi -= li * v;
                }
            }
        }
    }
}

/// Lower Cholesky factor of a symmetric positive definite matrix (only its lower triangle is
/// read), in place by LAPACK potrf. Returns None when the matrix is not positive definite.
pub fn chol_lower(a: Array2<f64>) -> Option<Array2<f64>> {
    chol_lower_of(a, false)
}

/// `chol_lower`, told whether the strict upper triangle of `a` already holds zeros (the GLS
/// matrix, whose lower triangle alone is written into a zeroed buffer): then that half is
/// neither written nor, where the buffer is fresh, faulted in (64 MB of a 4000-coefficient
/// system).
pub fn chol_lower_of(mut a: Array2<f64>, upper_is_zero: bool) -> Option<Array2<f64>> {
    let n = a.nrows() as i32;
    if n == 0 {
        return Some(a);
    }
    if !a.t().is_standard_layout() {
        a = a.reversed_axes().as_standard_layout().reversed_axes().to_owned();
    }
    if (n as usize) <= SMALL_DENSE {
        let buf = a.as_slice_memory_order_mut().expect("column-major");
        if !small_chol(buf, n as usize) {
            return None;
        }
        return Some(a);
    }
    if (n as usize) <= BLOCKED_CHOL_MAX {
        let buf = a.as_slice_memory_order_mut().expect("column-major");
        if !blocked_chol(buf, n as usize) {
            return None;
        }
    } else {
        let mut info = 0;
        // SAFETY: `a` is an n x n column-major buffer.
        unsafe { lapack_sys::dpotrf_(&(b'L' as std::ffi::c_char), &n, a.as_mut_ptr(), &n, &mut info) };
        if info != 0 {
            return None;
        }
        if upper_is_zero {
            // potrf with 'L' references no entry above the diagonal
            debug_assert!((1..a.ncols()).all(|j| (0..j).step_by(97).all(|i| a[[i, j]] == 0.0)));
            return Some(a);
        }
    }
    for j in 0..a.ncols() {
        for i in 0..j {
            a[[i, j]] = 0.0;
        }
    }
    Some(a)
}

/// Solves (L L') x = b for the lower factor from `chol_lower` (LAPACK potrs).
pub fn chol_solve(l: &Array2<f64>, b: &Array1<f64>) -> Result<Array1<f64>> {
    debug_assert!(l.t().is_standard_layout());
    let n = l.nrows() as i32;
    let mut x = b.to_owned();
    if n == 0 {
        return Ok(x);
    }
    if (n as usize) <= SMALL_DENSE {
        if let (Some(lb), Some(xb)) = (l.as_slice_memory_order(), x.as_slice_mut()) {
            chol_solve_in_place(lb, n as usize, xb);
            return Ok(x);
        }
    }
    let mut info = 0;
    // SAFETY: `l` is n x n column-major; `x` holds n contiguous values.
    unsafe { lapack_sys::dpotrs_(&(b'L' as std::ffi::c_char), &n, &1, l.as_ptr(), &n, x.as_mut_ptr(), &n, &mut info) };
    if info != 0 {
        return Err(SurError::numerical("Cholesky solve", format!("LAPACK info {info}")));
    }
    Ok(x)
}

/// (L L')^-1 from the lower factor from `chol_lower` (LAPACK potri), full and symmetric.
pub fn chol_inverse(l: &Array2<f64>) -> Result<Array2<f64>> {
    chol_inverse_owned(l.to_owned())
}

/// `chol_inverse` in the factor's own buffer.
pub fn chol_inverse_owned(l: Array2<f64>) -> Result<Array2<f64>> {
    debug_assert!(l.t().is_standard_layout());
    let mut a = l;
    let n = a.nrows() as i32;
    if n == 0 {
        return Ok(a);
    }
    if (n as usize) <= SMALL_DENSE {
        let n = n as usize;
        let mut u = vec![0.0f64; n * n];
        // U is formed from L before `a` (L's own buffer) is overwritten
        if let Some(lb) = a.as_slice_memory_order() {
            small_lower_inverse(lb, n, &mut u);
            // (L L')^-1 = U'U, U = L^-1 lower: entry (i, j) sums over rows r >= max(i, j)
            for j in 0..n {
                for i in j..n {
                    let v = dot(&u[j * n + i..(j + 1) * n], &u[i * n + i..(i + 1) * n]);
                    a[[i, j]] = v;
                    a[[j, i]] = v;
                }
            }
            return Ok(a);
        }
    }
    let mut info = 0;
    // SAFETY: `a` is an n x n column-major buffer.
    unsafe { lapack_sys::dpotri_(&(b'L' as std::ffi::c_char), &n, a.as_mut_ptr(), &n, &mut info) };
    if info != 0 {
        return Err(SurError::numerical("inverse from the Cholesky factor", format!("LAPACK info {info}")));
    }
    // upper from lower, in cache-sized blocks (row-wise writes into a column-major 1000 x 1000
    // matrix touched a new page at every entry)
    mirror(&mut a, true);
    Ok(a)
}

/// The error of a triangular solve whose diagonal holds `d` at `i`: a zero (an exactly
/// singular factor) or a value that is not finite (NaN or inf: the factor was computed from
/// such values), named as what it is.
fn diagonal_defect(i: usize, d: f64) -> SurError {
    let what = if d == 0.0 { "zero".to_string() } else { format!("non-finite value ({d})") };
    SurError::numerical("triangular solve", format!("{what} on the diagonal, at position {i}"))
}

/// The inverse of an upper-triangular matrix (column by column back substitution).
pub fn upper_inverse(r: &Array2<f64>) -> Result<Array2<f64>> {
    let n = r.nrows();
    if r.ncols() != n {
        return Err(SurError::numerical("triangular solve", "shapes do not match"));
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
        return Err(SurError::numerical("triangular solve", "shapes do not match"));
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
pub fn invert_omega(omega: &Array2<f64>, names: &[String], n_obs: usize, scales: &[f64]) -> Result<(Array2<f64>, f64)> {
    let n = omega.nrows();
    let diag: Vec<f64> = (0..n).map(|i| omega[[i, i]]).collect();
    for (i, &d) in diag.iter().enumerate() {
        let floor = scales.get(i).copied().unwrap_or(0.0) * 1e-13;
        if d.is_infinite() || (d.is_finite() && !scales.get(i).copied().unwrap_or(1.0).is_finite()) {
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
            chol_lower(corr).ok_or_else(|| SurError::numerical("Cholesky of Omega", "not positive definite"))?
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
    let (vals, vecs) = corr.eigh(UPLO::Lower).map_err(|e| SurError::numerical("eigenvalues of Omega", e))?;
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
    let involved: Vec<String> = (0..n).filter(|&i| v[i].abs() >= 0.05 * vmax).map(|i| names[i].clone()).collect();
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

/// ln det of a symmetric positive definite matrix by Cholesky; None when it is not PD.
pub fn ln_det_spd(a: &Array2<f64>) -> Option<f64> {
    let l = chol_lower(to_fortran(a))?;
    Some((0..a.nrows()).map(|i| 2.0 * l[[i, i]].ln()).sum())
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

/// Thin QR of a tall T x m matrix by Householder reflections: Q (T x m, orthonormal columns,
/// column-major) and upper-triangular R (m x m) with A = Q R.
pub fn thin_qr(a: Array2<f64>) -> Result<(Array2<f64>, Array2<f64>)> {
    let (t, m) = a.dim();
    let mut a = if a.t().is_standard_layout() { a } else { to_fortran(&a) };
    let r = thin_qr_in_place(a.as_slice_memory_order_mut().expect("column-major and contiguous"), t, m, &|| false)?;
    Ok((a, r))
}

/// Thin QR in place: `buf` holds a column-major T x m matrix A (leading dimension T); on return
/// it holds Q (orthonormal columns) and R (m x m, upper triangular) is returned, A = Q R.
/// Narrow blocks (the regressors of one equation) use the unblocked Householder algorithm of
/// LAPACK's geqr2/org2r written out, which has no per-call overhead or workspace; wide ones go
/// to LAPACK's blocked geqrf/orgqr. On the written-out path `stop` is asked before each column
/// (so that a very long column can be interrupted) and a yes returns `SurError::Interrupted`.
pub fn thin_qr_in_place(buf: &mut [f64], t: usize, m: usize, stop: &dyn Fn() -> bool) -> Result<Array2<f64>> {
    assert_eq!(buf.len(), t * m, "thin_qr_in_place: buffer is not T x m");
    if t < m {
        return Err(SurError::numerical("QR", format!("{t} rows for {m} columns")));
    }
    if m > 24 {
        return lapack_qr_in_place(buf, t, m);
    }
    let mut r = vec![0.0f64; m * m];
    let mut tau = vec![0.0f64; m];
    householder_qr(buf, t, m, &mut r, &mut tau, stop)?;
    Ok(Array2::from_shape_vec((m, m), r).expect("m x m"))
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
pub(crate) fn cholqr2_in_place(buf: &mut [f64], t: usize, m: usize, stop: &dyn Fn() -> bool) -> Result<Option<Array2<f64>>> {
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
    if !small_chol(&mut g1, m) {
        return Ok(None);
    }
    // R_1 of the scaled block is L' (upper): its condition decides
    let r1s = Array2::from_shape_fn((m, m), |(i, j)| g1[i * m + j]);
    let cond = triangular_condition(&r1s);
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
    if !(g2.iter().all(|v| v.is_finite()) && small_chol(&mut g2, m)) {
        return Err(SurError::numerical("CholeskyQR2", "the second Gram matrix is not positive definite"));
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
        sub_combination_with(col, &c[..j], |i| &done[i * t + r0..i * t + r1]);
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
                part[p..p + 4].copy_from_slice(&dotn([col(i), col(i + 1), col(i + 2), col(i + 3)], v));
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
            total.iter_mut().zip(&levels[level * pairs..(level + 1) * pairs]).for_each(|(a, b)| *a += b);
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

/// The written-out Householder QR of `thin_qr_in_place`, with caller-owned space: `buf` holds
/// the column-major T x m matrix (T >= m) and gets Q; `r` (m x m, row-major, every entry
/// written) gets R; `tau` (m) is workspace. Small systems call it with buffers they reuse.
pub(crate) fn householder_qr(
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
        let norm = if ss.is_finite() && ss > 1e-290 { ss.sqrt() } else { scaled_norm(x) };
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
            reflect_columns(&mut right[..(m - j - 1) * t], t, j, v, tj);
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
            reflect_columns(&mut right[..(m - j - 1) * t], t, j, &colj[j + 1..], tj);
        }
        for e in colj[j + 1..].iter_mut() {
            *e *= -tj;
        }
        colj[j] = 1.0 - tj;
        colj[..j].fill(0.0);
    }
    Ok(())
}

/// col <- (I - tau v v') col for the reflector v = [1; tail].
#[inline]
fn reflect(col: &mut [f64], tail: &[f64], tau: f64) {
    let (head, rest) = col.split_first_mut().expect("non-empty column");
    let d = tau * (*head + dot(tail, rest));
    *head -= d;
    axpy(rest, tail, -d);
}

/// `reflect` on rows j.. of each column of the column-major block `cols` (T rows each), up
/// to four columns per two passes over the rows (the reflector is read once per group).
fn reflect_columns(cols: &mut [f64], t: usize, j: usize, tail: &[f64], tau: f64) {
    let mut groups = cols.chunks_mut(4 * t);
    for group in &mut groups {
        let n = group.len() / t;
        let mut it = group.chunks_exact_mut(t).map(|c| &mut c[j..]);
        match n {
            4 => reflect_group::<4>(std::array::from_fn(|_| it.next().expect("four columns")), tail, tau),
            3 => reflect_group::<3>(std::array::from_fn(|_| it.next().expect("three columns")), tail, tau),
            2 => reflect_group::<2>(std::array::from_fn(|_| it.next().expect("two columns")), tail, tau),
            _ => {
                for c in it {
                    reflect(c, tail, tau);
                }
            }
        }
    }
}

/// `reflect` on N columns at once.
fn reflect_group<const N: usize>(mut cs: [&mut [f64]; N], tail: &[f64], tau: f64) {
    let s = dotn::<N>(std::array::from_fn(|i| &cs[i][1..]), tail);
    let mut d = [0.0f64; N];
    for ((dc, c), sc) in d.iter_mut().zip(cs.iter_mut()).zip(s) {
        *dc = tau * (c[0] + sc);
        c[0] -= *dc;
    }
    let rows = cs.map(|c| &mut c[1..]);
    #[cfg(target_arch = "x86_64")]
    if fma_available() {
        // SAFETY: the CPU has AVX2 and FMA (checked once, at run time).
        return unsafe { sub_outer_fma(rows, tail, d) };
    }
    sub_outer(rows, tail, d, |a, x, y| a * x + y);
}

/// cols[c] -= d[c] v for N columns in one pass over the rows.
#[inline(always)]
fn sub_outer<const N: usize>(mut cols: [&mut [f64]; N], v: &[f64], d: [f64; N], madd: impl Fn(f64, f64, f64) -> f64) {
    let w = d.map(|x| -x);
    let n = v.len();
    assert!(cols.iter().all(|c| c.len() >= n));
    for (i, x) in v.iter().enumerate() {
        for (c, wc) in cols.iter_mut().zip(&w) {
            // SAFETY: i < n <= every column's length (checked above).
            let e = unsafe { c.get_unchecked_mut(i) };
            *e = madd(*wc, *x, *e);
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn sub_outer_fma<const N: usize>(mut cols: [&mut [f64]; N], v: &[f64], d: [f64; N]) {
    use std::arch::x86_64::*;
    let n = v.len();
    assert!(cols.iter().all(|c| c.len() >= n));
    let w = d.map(|x| _mm256_set1_pd(-x));
    let mut i = 0;
    while i + 4 <= n {
        // SAFETY: i + 3 < n <= every column's length (checked above).
        unsafe {
            let x = _mm256_loadu_pd(v.as_ptr().add(i));
            for (c, wc) in cols.iter_mut().zip(&w) {
                let p = c.as_mut_ptr().add(i);
                _mm256_storeu_pd(p, _mm256_fmadd_pd(*wc, x, _mm256_loadu_pd(p)));
            }
        }
        i += 4;
    }
    for (c, dc) in cols.iter_mut().zip(&d) {
        for r in i..n {
            c[r] = (-dc).mul_add(v[r], c[r]);
        }
    }
}

/// y += alpha x (fused multiply-adds, 4 wide, where the CPU has them).
#[inline]
pub(crate) fn axpy(y: &mut [f64], x: &[f64], alpha: f64) {
    #[cfg(target_arch = "x86_64")]
    if fma_available() {
        // SAFETY: the CPU has AVX2 and FMA (checked once, at run time).
        return unsafe { axpy_fma(y, x, alpha) };
    }
    for (o, p) in y.iter_mut().zip(x) {
        *o += alpha * p;
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn axpy_fma(y: &mut [f64], x: &[f64], alpha: f64) {
    for (o, p) in y.iter_mut().zip(x) {
        *o = alpha.mul_add(*p, *o);
    }
}

/// out[j] = q_j'v for the columns q_j of the column-major T x out.len() block `q`, four
/// columns per pass over the rows (v is read once per four columns), each by the pairwise
/// scheme of `dot`.
pub(crate) fn dots(q: &[f64], t: usize, v: &[f64], out: &mut [f64]) {
    let v = &v[..t];
    let col = |j: usize| &q[j * t..(j + 1) * t];
    let mut j = 0;
    while j + 4 <= out.len() {
        out[j..j + 4].copy_from_slice(&dotn([col(j), col(j + 1), col(j + 2), col(j + 3)], v));
        j += 4;
    }
    for (jj, o) in out.iter_mut().enumerate().skip(j) {
        *o = dot(col(jj), v);
    }
}

/// N dot products with one vector, each by the pairwise scheme of `dot`.
fn dotn<const N: usize>(c: [&[f64]; N], v: &[f64]) -> [f64; N] {
    let n = v.len();
    if n > 1024 {
        let h = (n / 2) & !7;
        let a = dotn(c.map(|x| &x[..h]), &v[..h]);
        let b = dotn(c.map(|x| &x[h..n]), &v[h..n]);
        return std::array::from_fn(|i| a[i] + b[i]);
    }
    #[cfg(target_arch = "x86_64")]
    if fma_available() {
        // SAFETY: the CPU has AVX2 and FMA (checked once, at run time).
        return unsafe { dotn_fma(c, v) };
    }
    c.map(|x| dot_block_portable(x, v))
}

/// N dot products with one vector, each in eight partial sums (two 4-wide registers).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn dotn_fma<const N: usize>(c: [&[f64]; N], v: &[f64]) -> [f64; N] {
    use std::arch::x86_64::*;
    let n = v.len();
    assert!(c.iter().all(|x| x.len() >= n));
    let mut acc = [[_mm256_setzero_pd(); 2]; N];
    let mut i = 0;
    while i + 8 <= n {
        // SAFETY: i + 7 < n, within v and every column (length checked above).
        unsafe {
            let v0 = _mm256_loadu_pd(v.as_ptr().add(i));
            let v1 = _mm256_loadu_pd(v.as_ptr().add(i + 4));
            for (a, x) in acc.iter_mut().zip(&c) {
                a[0] = _mm256_fmadd_pd(_mm256_loadu_pd(x.as_ptr().add(i)), v0, a[0]);
                a[1] = _mm256_fmadd_pd(_mm256_loadu_pd(x.as_ptr().add(i + 4)), v1, a[1]);
            }
        }
        i += 8;
    }
    let mut out = [0.0f64; N];
    for ((o, a), x) in out.iter_mut().zip(&acc).zip(&c) {
        let mut lanes = [0.0f64; 4];
        // SAFETY: four doubles into a four-double array.
        unsafe { _mm256_storeu_pd(lanes.as_mut_ptr(), _mm256_add_pd(a[0], a[1])) };
        let mut s = (lanes[0] + lanes[2]) + (lanes[1] + lanes[3]);
        for r in i..n {
            s = x[r].mul_add(v[r], s);
        }
        *o = s;
    }
    out
}

/// v -= sum_j c_j q_j for the columns q_j of the column-major T x c.len() block `q`, four
/// columns per pass over the rows.
pub(crate) fn sub_combination(v: &mut [f64], q: &[f64], t: usize, c: &[f64]) {
    sub_combination_with(&mut v[..t], c, |j| &q[j * t..(j + 1) * t]);
}

/// v -= sum_j c_j col(j) over the length of v (each column at least that long), four
/// columns per pass.
pub(crate) fn sub_combination_with<'a>(v: &mut [f64], c: &[f64], cols: impl Fn(usize) -> &'a [f64]) {
    let t = v.len();
    let col = |j: usize| &cols(j)[..t];
    let mut j = 0;
    while j + 4 <= c.len() {
        let (cols, w) = ([col(j), col(j + 1), col(j + 2), col(j + 3)], [-c[j], -c[j + 1], -c[j + 2], -c[j + 3]]);
        #[cfg(target_arch = "x86_64")]
        if fma_available() {
            // SAFETY: the CPU has AVX2 and FMA (checked once, at run time).
            unsafe { combination4_fma(v, cols, w) };
            j += 4;
            continue;
        }
        combination4(v, cols, w, |a, x, y| a * x + y);
        j += 4;
    }
    for jj in j..c.len() {
        axpy(v, col(jj), -c[jj]);
    }
}

#[inline(always)]
fn combination4(v: &mut [f64], c: [&[f64]; 4], w: [f64; 4], madd: impl Fn(f64, f64, f64) -> f64) {
    for ((((o, a), b), d), e) in v.iter_mut().zip(c[0]).zip(c[1]).zip(c[2]).zip(c[3]) {
        *o = madd(w[3], *e, madd(w[2], *d, madd(w[1], *b, madd(w[0], *a, *o))));
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn combination4_fma(v: &mut [f64], c: [&[f64]; 4], w: [f64; 4]) {
    combination4(v, c, w, f64::mul_add)
}

/// Dot product: pairwise over halves down to blocks of 1024, each block summed in eight
/// independent partial sums (vector registers; a single running sum is a chain of dependent
/// additions). The rounding error grows with log2(n), not n: over 10^7 rows a running sum
/// would cost several digits.
pub fn dot(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    if n > 1024 {
        let h = (n / 2) & !7;
        return dot(&a[..h], &b[..h]) + dot(&a[h..n], &b[h..n]);
    }
    dot_block(&a[..n], &b[..n])
}

#[inline]
fn dot_block(a: &[f64], b: &[f64]) -> f64 {
    #[cfg(target_arch = "x86_64")]
    if fma_available() {
        // SAFETY: the CPU has AVX2 and FMA (checked once, at run time).
        return unsafe { dot_block_fma(a, b) };
    }
    dot_block_portable(a, b)
}

/// Whether this CPU has AVX2 and FMA (asked once; the standard library caches the answer).
#[cfg(target_arch = "x86_64")]
#[inline]
fn fma_available() -> bool {
    std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma")
}

fn dot_block_portable(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0f64; 8];
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        for l in 0..8 {
            acc[l] += x[l] * y[l];
        }
    }
    let mut s = ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7]));
    for (x, y) in ra.iter().zip(rb) {
        s += x * y;
    }
    s
}

/// `dot_block` with fused multiply-adds into sixteen partial sums (four 4-wide registers):
/// twice the portable version's throughput, and each term rounded once instead of twice.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_block_fma(a: &[f64], b: &[f64]) -> f64 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    let mut acc = [_mm256_setzero_pd(); 4];
    let mut i = 0;
    while i + 16 <= n {
        for (l, s) in acc.iter_mut().enumerate() {
            // SAFETY: i + 4 l + 3 < n, within both slices.
            let (x, y) = unsafe { (_mm256_loadu_pd(pa.add(i + 4 * l)), _mm256_loadu_pd(pb.add(i + 4 * l))) };
            *s = _mm256_fmadd_pd(x, y, *s);
        }
        i += 16;
    }
    while i + 4 <= n {
        // SAFETY: i + 3 < n.
        let (x, y) = unsafe { (_mm256_loadu_pd(pa.add(i)), _mm256_loadu_pd(pb.add(i))) };
        acc[0] = _mm256_fmadd_pd(x, y, acc[0]);
        i += 4;
    }
    let sum = _mm256_add_pd(_mm256_add_pd(acc[0], acc[2]), _mm256_add_pd(acc[1], acc[3]));
    let mut lanes = [0.0f64; 4];
    // SAFETY: four doubles into a four-double array.
    unsafe { _mm256_storeu_pd(lanes.as_mut_ptr(), sum) };
    let mut s = (lanes[0] + lanes[2]) + (lanes[1] + lanes[3]);
    while i < n {
        s = a[i].mul_add(b[i], s);
        i += 1;
    }
    s
}

/// e = y - X b, each element in doubled working precision (Ogita, Rump and Oishi's Dot2:
/// error-free products and sums, the errors summed alongside), so the cancellation between
/// y and the fitted values costs no digits. Uses hardware FMA where the CPU has it, Dekker's
/// product otherwise; the two give the same result up to the final rounding.
pub(crate) fn residual_dot2(x: ArrayView2<f64>, y: ndarray::ArrayView1<f64>, b: &[f64], e: &mut [f64]) {
    #[cfg(target_arch = "x86_64")]
    if fma_available() {
        // SAFETY: the CPU has AVX2 and FMA (checked once, at run time).
        return unsafe { residual_dot2_fma(x, y, b, e) };
    }
    residual_dot2_with(x, y, b, e, two_prod_dekker)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn residual_dot2_fma(x: ArrayView2<f64>, y: ndarray::ArrayView1<f64>, b: &[f64], e: &mut [f64]) {
    residual_dot2_with(x, y, b, e, |p, q| {
        let h = p * q;
        (h, p.mul_add(q, -h))
    })
}

/// a b = p + err exactly, by Veltkamp splitting (no FMA needed).
#[inline(always)]
fn two_prod_dekker(a: f64, b: f64) -> (f64, f64) {
    const SPLIT: f64 = 134217729.0; // 2^27 + 1
    let p = a * b;
    let split = |v: f64| {
        let c = SPLIT * v;
        let hi = c - (c - v);
        (hi, v - hi)
    };
    let ((ah, al), (bh, bl)) = (split(a), split(b));
    (p, ((ah * bh - p) + ah * bl + al * bh) + al * bl)
}

#[inline(always)]
fn residual_dot2_with(
    x: ArrayView2<f64>,
    y: ndarray::ArrayView1<f64>,
    b: &[f64],
    e: &mut [f64],
    two_prod: impl Fn(f64, f64) -> (f64, f64),
) {
    // Per row a running sum and its accumulated error (Knuth's two-sum of each exact product
    // p + ep). Rows go in blocks of 256, column by column: within a block every row's sum is
    // independent of the others, so the updates vectorise (row by row, each step would wait
    // on the previous one). Row-major or strided columns are first copied into a block.
    const B: usize = 256;
    let k = b.len();
    let t = e.len();
    if k == 0 {
        for (d, v) in e.iter_mut().zip(y.iter()) {
            *d = *v;
        }
        return;
    }
    let rows = x.as_slice().filter(|_| x.is_standard_layout());
    let colmajor = x.as_slice_memory_order().filter(|_| x.t().is_standard_layout() && x.nrows() == t);
    // a column block for row-major or strided X, from a per-thread buffer (the small-system
    // path calls this once per equation of every system)
    thread_local! {
        static BLOCK: std::cell::Cell<Vec<f64>> = const { std::cell::Cell::new(Vec::new()) };
    }
    let mut cols = BLOCK.with(|cell| cell.take());
    if colmajor.is_none() && cols.len() < k * B.min(t) {
        cols.resize(k * B.min(t), 0.0);
    }
    dot2_blocks(x, y, b, e, &two_prod, rows, colmajor, &mut cols);
    BLOCK.with(|cell| cell.replace(cols));
}

/// The blocks of `residual_dot2_with`.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn dot2_blocks(
    x: ArrayView2<f64>,
    y: ndarray::ArrayView1<f64>,
    b: &[f64],
    e: &mut [f64],
    two_prod: &impl Fn(f64, f64) -> (f64, f64),
    rows: Option<&[f64]>,
    colmajor: Option<&[f64]>,
    cols: &mut [f64],
) {
    const B: usize = 256;
    let k = b.len();
    let t = e.len();
    let mut start = 0;
    while start < t {
        let end = (start + B).min(t);
        let n = end - start;
        let mut sum = [0.0f64; B];
        let mut err = [0.0f64; B];
        for (d, v) in sum[..n].iter_mut().zip(y.slice(ndarray::s![start..end]).iter()) {
            *d = *v;
        }
        if colmajor.is_none() {
            match rows {
                Some(rs) => {
                    assert!(cols.len() >= k * n);
                    // SAFETY: column j of the block is cols[j * n..(j + 1) * n] (length checked).
                    unsafe { scatter_rows(&rs[start * k..end * k], k, cols.as_mut_ptr(), n) };
                }
                None => {
                    for j in 0..k {
                        let dst = &mut cols[j * n..(j + 1) * n];
                        for (d, v) in dst.iter_mut().zip(x.slice(ndarray::s![start..end, j]).iter()) {
                            *d = *v;
                        }
                    }
                }
            }
        }
        for (j, bj) in b.iter().enumerate() {
            let col: &[f64] = match colmajor {
                Some(cm) => &cm[j * t + start..j * t + end],
                None => &cols[j * n..(j + 1) * n],
            };
            let nb = -*bj;
            for ((sv, rv), xv) in sum[..n].iter_mut().zip(err[..n].iter_mut()).zip(col) {
                let (p, ep) = two_prod(nb, *xv);
                let s0 = *sv;
                let tt = s0 + p;
                let z = tt - s0;
                *rv += ((s0 - (tt - z)) + (p - z)) + ep;
                *sv = tt;
            }
        }
        for ((d, sv), rv) in e[start..end].iter_mut().zip(&sum[..n]).zip(&err[..n]) {
            *d = sv + rv;
        }
        start = end;
    }
}

/// Writes the rows of the row-major r x k block `rows` into k columns: column j starts at
/// `dst + j * ld`. Narrow blocks (k <= 8) go row by row with k fixed at compile time (k
/// output streams, one pass over the input); wider ones column by column.
///
/// # Safety
/// `dst` must be valid for writes at `j * ld + i` for every j < k and i < r = rows.len() / k.
pub(crate) unsafe fn scatter_rows(rows: &[f64], k: usize, dst: *mut f64, ld: usize) {
    #[inline(always)]
    unsafe fn fixed<const K: usize>(rows: &[f64], dst: *mut f64, ld: usize) {
        for (i, row) in rows.chunks_exact(K).enumerate() {
            for j in 0..K {
                // SAFETY: within the caller's promise (i < r, j < k).
                unsafe { *dst.add(j * ld + i) = row[j] };
            }
        }
    }
    // SAFETY (every arm): the caller's promise, with K = k.
    unsafe {
        match k {
            0 => {}
            1 => std::ptr::copy_nonoverlapping(rows.as_ptr(), dst, rows.len()),
            2 => fixed::<2>(rows, dst, ld),
            3 => fixed::<3>(rows, dst, ld),
            4 => fixed::<4>(rows, dst, ld),
            5 => fixed::<5>(rows, dst, ld),
            6 => fixed::<6>(rows, dst, ld),
            7 => fixed::<7>(rows, dst, ld),
            8 => fixed::<8>(rows, dst, ld),
            _ => {
                for j in 0..k {
                    for (i, row) in rows.chunks_exact(k).enumerate() {
                        *dst.add(j * ld + i) = row[j];
                    }
                }
            }
        }
    }
}

/// Sum of squared deviations from `mean`, in eight partial sums.
pub(crate) fn centred_squares(x: &[f64], mean: f64) -> f64 {
    let mut acc = [0.0f64; 8];
    let c = x.chunks_exact(8);
    let rest: f64 = c.remainder().iter().map(|v| (v - mean) * (v - mean)).sum();
    for ch in c {
        for l in 0..8 {
            let d = ch[l] - mean;
            acc[l] += d * d;
        }
    }
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + rest
}

/// Sum of a slice in eight partial sums (a single running sum is a chain of dependent
/// additions, four cycles each).
pub(crate) fn sum(x: &[f64]) -> f64 {
    let mut acc = [0.0f64; 8];
    let c = x.chunks_exact(8);
    let rest: f64 = c.remainder().iter().sum();
    for ch in c {
        for l in 0..8 {
            acc[l] += ch[l];
        }
    }
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + rest
}

/// 2-norm scaled by the largest magnitude, for columns whose plain sum of squares would
/// overflow or underflow.
pub fn scaled_norm(x: &[f64]) -> f64 {
    let m = x.iter().fold(0.0f64, |a, b| a.max(b.abs()));
    if m == 0.0 || !m.is_finite() {
        return m;
    }
    let inv = 1.0 / m;
    let mut ss = 0.0;
    for c in x.chunks(1024) {
        ss += c.iter().map(|e| (e * inv) * (e * inv)).sum::<f64>();
    }
    m * ss.sqrt()
}

fn lapack_qr_in_place(buf: &mut [f64], t: usize, m: usize) -> Result<Array2<f64>> {
    let (ti, mi) = (t as i32, m as i32);
    let mut tau = vec![0.0f64; m];
    let mut info = 0;
    let mut query = 0.0f64;
    let minus1 = -1;
    // SAFETY: `buf` is a t x m column-major buffer with leading dimension t; `tau` has m slots;
    // the workspace is sized by LAPACK's own query (lwork = -1).
    unsafe {
        lapack_sys::dgeqrf_(&ti, &mi, buf.as_mut_ptr(), &ti, tau.as_mut_ptr(), &mut query, &minus1, &mut info);
        let mut q2 = 0.0f64;
        lapack_sys::dorgqr_(&ti, &mi, &mi, buf.as_mut_ptr(), &ti, tau.as_ptr(), &mut q2, &minus1, &mut info);
        let lwork = query.max(q2).max(m as f64) as usize;
        let mut work = vec![0.0f64; lwork];
        let lw = lwork as i32;
        lapack_sys::dgeqrf_(&ti, &mi, buf.as_mut_ptr(), &ti, tau.as_mut_ptr(), work.as_mut_ptr(), &lw, &mut info);
        if info != 0 {
            return Err(SurError::numerical("QR", format!("LAPACK dgeqrf info {info}")));
        }
        let mut r = Array2::<f64>::zeros((m, m));
        for j in 0..m {
            for i in 0..=j {
                r[[i, j]] = buf[j * t + i];
            }
        }
        lapack_sys::dorgqr_(&ti, &mi, &mi, buf.as_mut_ptr(), &ti, tau.as_ptr(), work.as_mut_ptr(), &lw, &mut info);
        if info != 0 {
            return Err(SurError::numerical("QR", format!("LAPACK dorgqr info {info}")));
        }
        Ok(r)
    }
}
