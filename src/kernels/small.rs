//! Dense kernels for matrices of a few dozen rows at most, in caller-owned column-major
//! buffers and without any call overhead: the Cholesky factor, its solve and the inverse of
//! the factor. The small-system path of a batch (`batch::small`) runs thousands of 9 x 9
//! factorisations a second through them; everything larger goes to the backend.

use super::simd::{axpy, dot};

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

/// In-place lower Cholesky factor of a column-major n x n buffer (lower triangle read; upper
/// zeroed), left-looking by columns. False when a pivot is not positive (not positive definite).
pub(crate) fn small_chol(a: &mut [f64], n: usize) -> bool {
    // each column (rows j..n) minus its products with the columns before it, then scaled by
    // its pivot
    for j in 0..n {
        for l in 0..j {
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
    for j in 0..n {
        a[j * n..j * n + j].fill(0.0);
    }
    true
}

/// U = L^-1 (lower, column-major, n x n, into `u`) of a lower-triangular column-major L,
/// column by column.
/// Forward substitution on L x = e_j by columns of L (contiguous), x[..j] = 0.
pub(crate) fn small_lower_inverse(l: &[f64], n: usize, u: &mut [f64]) {
    u[..n * n].fill(0.0);
    for j in 0..n {
        let col = &mut u[j * n..(j + 1) * n];
        col[j] = 1.0;
        for p in j..n {
            let lcol = &l[p * n..(p + 1) * n];
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
