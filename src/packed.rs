//! Symmetric matrices (and their lower Cholesky factors) in LAPACK's rectangular full packed
//! storage (RFP, TRANSR = 'N', UPLO = 'L'): n(n + 1)/2 values, half of the square array, yet
//! formed, factored and solved by level-3 routines (sfrk, pftrf, pftrs, pftri), which call the
//! BLAS's syrk, gemm, trsm and potrf on the two halves.
//!
//! The one-pass FGLS route keeps its K x K GLS matrix here: on 1,000 equations (K = 4000) that
//! is 64 MB of fresh memory instead of 128 MB, and the fit's peak (222 MB) falls below the
//! floor's own (numpy's W'W with W stacked: 297 MB).
//!
//! Layout (LAPACK's documentation of dtfttr), with h = n / 2 for even n and h = (n + 1) / 2 for
//! odd n: the stored array has `ld` rows (n + 1 for even n, n for odd) and h columns. Its column
//! c holds two runs: the lower part of the matrix's column c (rows c..n), and row
//! h + c (even n; h + c - 1 for odd n) of the trailing triangle, columns h.. (that triangle is
//! stored transposed). `segments_mut` hands out exactly these runs.

use ndarray::{Array1, Array2, ArrayView2, ShapeBuilder};
use std::ffi::c_char;

use crate::error::{Result, SurError};

const TRANSR: c_char = b'N' as c_char;
const UPLO: c_char = b'L' as c_char;

/// A symmetric n x n matrix's lower triangle, or its lower Cholesky factor, in RFP storage.
#[derive(Debug, Clone)]
pub struct PackedLower {
    n: usize,
    buf: Vec<f64>,
}

/// One contiguous run of stored values: entries (i, j0 + t) of the matrix for `Row`, entries
/// (i0 + t, j) for `Column` (t = 0..len), all on or below the diagonal.
pub enum Segment<'a> {
    Row { i: usize, j0: usize, vals: &'a mut [f64] },
    Column { j: usize, i0: usize, vals: &'a mut [f64] },
}

impl PackedLower {
    fn dims(n: usize) -> (usize, usize) {
        // (leading dimension, stored columns)
        if n.is_multiple_of(2) {
            (n + 1, n / 2)
        } else {
            (n, n.div_ceil(2))
        }
    }

    pub fn order(&self) -> usize {
        self.n
    }

    /// Position of entry (i, j), i >= j, in the stored array.
    pub fn index(n: usize, i: usize, j: usize) -> usize {
        debug_assert!(i >= j && i < n);
        let (ld, h) = Self::dims(n);
        if j < h {
            if n.is_multiple_of(2) {
                i + 1 + j * ld
            } else {
                i + j * ld
            }
        } else if n.is_multiple_of(2) {
            (j - h) + (i - h) * ld
        } else {
            (j - h) + (i - h + 1) * ld
        }
    }

    /// The lower triangle of W'W for a column-major T x n matrix W, by LAPACK sfrk over row
    /// blocks of about 2e9 flops, asking `cancel` between them.
    pub fn gram(w: ArrayView2<f64>, cancel: &(dyn Fn() -> bool + Sync)) -> Result<PackedLower> {
        let (t, n) = w.dim();
        let owned;
        let w = if w.t().is_standard_layout() {
            w
        } else {
            owned = crate::linalg::to_fortran(&w.to_owned());
            owned.view()
        };
        let len = n * (n + 1) / 2;
        let mut buf = Vec::<f64>::with_capacity(len);
        if t == 0 {
            buf.resize(len, 0.0);
            return Ok(PackedLower { n, buf });
        }
        let rows = crate::linalg::syrk_block_rows(t, n);
        let (nn, ldw) = (n as i32, t as i32);
        let mut start = 0;
        while start < t {
            let end = (start + rows).min(t);
            if cancel() {
                return Err(SurError::Interrupted);
            }
            let kk = (end - start) as i32;
            let (alpha, beta) = (1.0f64, if start == 0 { 0.0f64 } else { 1.0 });
            // SAFETY: rows start..end of the column-major `w` (leading dimension t) form a
            // kk x n block; `buf` has room for n(n + 1)/2 values, which sfrk writes in full when
            // beta is zero (the first block) and reads and updates after that.
            unsafe {
                lapack_sys::dsfrk_(
                    &TRANSR,
                    &UPLO,
                    &(b'T' as c_char),
                    &nn,
                    &kk,
                    &alpha,
                    w.as_ptr().add(start),
                    &ldw,
                    &beta,
                    buf.as_mut_ptr(),
                );
            }
            start = end;
        }
        // SAFETY: the first sfrk call (beta = 0) wrote all len values.
        unsafe { buf.set_len(len) };
        Ok(PackedLower { n, buf })
    }

    /// Every stored value once, as runs along a row or down a column of the matrix.
    pub fn segments_mut(&mut self, mut f: impl FnMut(Segment<'_>)) {
        let n = self.n;
        let (ld, h) = Self::dims(n);
        for (c, col) in self.buf.chunks_mut(ld).enumerate().take(h) {
            Self::column_segments(n, c, col, &mut f);
        }
    }

    /// The runs of stored column c (`col`, ld values): the trailing triangle's row (stored
    /// first in this column), then column c of the leading part.
    fn column_segments(n: usize, c: usize, col: &mut [f64], f: &mut impl FnMut(Segment<'_>)) {
        let h = Self::dims(n).1;
        let even = n.is_multiple_of(2);
        let split = if even { c + 1 } else { c };
        let (top, rest) = col.split_at_mut(split);
        if !top.is_empty() {
            f(Segment::Row { i: if even { h + c } else { h + c - 1 }, j0: h, vals: top });
        }
        f(Segment::Column { j: c, i0: c, vals: rest });
    }

    /// `segments_mut` with the stored columns shared out over `threads` threads (the same runs,
    /// each visited once, in no particular order across threads).
    pub fn segments_par_mut(&mut self, threads: usize, f: &(dyn Fn(Segment<'_>) + Sync)) {
        let n = self.n;
        let (ld, h) = Self::dims(n);
        let threads = threads.clamp(1, h.max(1));
        if threads == 1 {
            return self.segments_mut(f);
        }
        // every stored column holds ld values: equal shares of whole columns
        let per = h.div_ceil(threads);
        // (first column, its values): each taken once, by the thread of that index
        type Share<'a> = std::sync::Mutex<Option<(usize, &'a mut [f64])>>;
        let parts: Vec<Share<'_>> = self.buf[..ld * h]
            .chunks_mut(ld * per)
            .enumerate()
            .map(|(p, chunk)| std::sync::Mutex::new(Some((p * per, chunk))))
            .collect();
        crate::pool::run(parts.len(), &|p| {
            let Some((first, chunk)) = parts[p].lock().unwrap_or_else(|e| e.into_inner()).take() else { return };
            let mut f = f;
            for (dc, col) in chunk.chunks_mut(ld).enumerate() {
                Self::column_segments(n, first + dc, col, &mut f);
            }
        });
    }

    /// The Cholesky factor in place (LAPACK pftrf); None when the matrix is not numerically
    /// positive definite.
    pub fn factor(mut self) -> Option<PackedLower> {
        let mut info = 0;
        let nn = self.n as i32;
        // SAFETY: `buf` holds the n(n + 1)/2 values of an RFP matrix of order n.
        unsafe { lapack_sys::dpftrf_(&TRANSR, &UPLO, &nn, self.buf.as_mut_ptr(), &mut info) };
        (info == 0).then_some(self)
    }

    /// Solves (L L') X = B for this factor (LAPACK pftrs); B is n x m.
    pub fn solve_mat(&self, b: &Array2<f64>) -> Result<Array2<f64>> {
        let (n, m) = b.dim();
        if n != self.n {
            return Err(SurError::numerical("Cholesky solve", "dimension mismatch"));
        }
        let mut x = Array2::<f64>::zeros((n, m).f());
        x.assign(b);
        if n == 0 || m == 0 {
            return Ok(x);
        }
        let (nn, mm) = (n as i32, m as i32);
        let mut info = 0;
        // SAFETY: `x` is n x m column-major with leading dimension n; `buf` is the factor.
        unsafe { lapack_sys::dpftrs_(&TRANSR, &UPLO, &nn, &mm, self.buf.as_ptr(), x.as_mut_ptr(), &nn, &mut info) };
        if info != 0 {
            return Err(SurError::numerical("Cholesky solve", format!("LAPACK info {info}")));
        }
        Ok(x)
    }

    /// Solves (L L') x = b for this factor.
    pub fn solve(&self, b: &Array1<f64>) -> Result<Array1<f64>> {
        let x = self.solve_mat(&b.view().insert_axis(ndarray::Axis(1)).to_owned())?;
        Ok(x.column(0).to_owned())
    }

    /// The lower triangle as a full n x n column-major array, zeros above the diagonal (the
    /// form `linalg::chol_lower` returns).
    pub fn to_full(&self) -> Result<Array2<f64>> {
        let n = self.n;
        let mut a = crate::linalg::zeros_advised((n, n).f());
        if n == 0 {
            return Ok(a);
        }
        let nn = n as i32;
        let mut info = 0;
        // SAFETY: `a` is n x n column-major; tfttr writes its lower triangle only.
        unsafe { lapack_sys::dtfttr_(&TRANSR, &UPLO, &nn, self.buf.as_ptr(), a.as_mut_ptr(), &nn, &mut info) };
        if info != 0 {
            return Err(SurError::numerical("unpacking the Cholesky factor", format!("LAPACK info {info}")));
        }
        Ok(a)
    }

    /// Offsets of the three blocks of the stored factor L = [L11 0; L21 L22] (L11 h x h), all
    /// with the leading dimension `ld`: L11 and L21 as they are, L22 as its transpose (upper).
    fn blocks(&self) -> (usize, usize, usize, usize, usize) {
        let n = self.n;
        let (ld, h) = Self::dims(n);
        if n.is_multiple_of(2) {
            (ld, h, 1, h + 1, 0)
        } else {
            (ld, h, 0, h, ld)
        }
    }

    /// Rows and columns c.. x c..d of L^-1 for this factor (the rows above c are zero): solves
    /// L[c.., c..] X = I[c.., c..d] blockwise, by BLAS trsm on L11 and on L22 (stored
    /// transposed) and one gemm with L21, in the packed array itself.
    pub fn inverse_columns(&self, c: usize, d: usize) -> Result<Array2<f64>> {
        let n = self.n;
        if c > d || d > n {
            return Err(SurError::numerical("inverse of the Cholesky factor", "columns out of range"));
        }
        let (m, w) = (n - c, d - c);
        let mut x = identity_panel(m, w);
        if m == 0 || w == 0 {
            return Ok(x);
        }
        if (c..n).any(|i| self.buf[Self::index(n, i, i)] == 0.0) {
            return Err(SurError::numerical("inverse of the Cholesky factor", "zero on the diagonal"));
        }
        let (ld, h, o11, o21, o22) = self.blocks();
        use cblas_sys::{CBLAS_DIAG::CblasNonUnit, CBLAS_LAYOUT::CblasColMajor, CBLAS_SIDE::CblasLeft};
        use cblas_sys::{CBLAS_TRANSPOSE::*, CBLAS_UPLO::*};
        let p = self.buf.as_ptr();
        let xp = x.as_mut_ptr();
        // SAFETY: every block pointer below stays inside `buf` (offsets and extents from the RFP
        // layout of order n, leading dimension ld); `x` is m x w column-major, leading dimension m,
        // and its rows m1.. start at xp + m1.
        unsafe {
            if c >= h {
                let a = c - h;
                cblas_sys::cblas_dtrsm(
                    CblasColMajor, CblasLeft, CblasUpper, CblasTrans, CblasNonUnit,
                    m as i32, w as i32, 1.0, p.add(o22 + a + a * ld), ld as i32, xp, m as i32,
                );
            } else {
                let (m1, m2) = (h - c, n - h);
                cblas_sys::cblas_dtrsm(
                    CblasColMajor, CblasLeft, CblasLower, CblasNoTrans, CblasNonUnit,
                    m1 as i32, w as i32, 1.0, p.add(o11 + c + c * ld), ld as i32, xp, m as i32,
                );
                if m2 > 0 {
                    // X2 = L22^-1 (E2 - L21[:, c..h] X1)
                    cblas_sys::cblas_dgemm(
                        CblasColMajor, CblasNoTrans, CblasNoTrans,
                        m2 as i32, w as i32, m1 as i32, -1.0, p.add(o21 + c * ld), ld as i32,
                        xp, m as i32, 1.0, xp.add(m1), m as i32,
                    );
                    cblas_sys::cblas_dtrsm(
                        CblasColMajor, CblasLeft, CblasUpper, CblasTrans, CblasNonUnit,
                        m2 as i32, w as i32, 1.0, p.add(o22), ld as i32, xp.add(m1), m as i32,
                    );
                }
            }
        }
        Ok(x)
    }

    /// (L L')^-1 for this factor (LAPACK pftri), full and symmetric.
    pub fn inverse(&self) -> Result<Array2<f64>> {
        let mut inv = self.clone();
        let nn = self.n as i32;
        let mut info = 0;
        if self.n > 0 {
            // SAFETY: `inv.buf` is an RFP factor of order n.
            unsafe { lapack_sys::dpftri_(&TRANSR, &UPLO, &nn, inv.buf.as_mut_ptr(), &mut info) };
        }
        if info != 0 {
            return Err(SurError::numerical("inverse of the GLS matrix", format!("LAPACK info {info}")));
        }
        let mut a = inv.to_full()?;
        drop(inv);
        crate::linalg::mirror(&mut a, true);
        Ok(a)
    }
}

/// The first w columns of the m x m identity, column-major: the right-hand side of a panel of a
/// triangular inverse.
pub(crate) fn identity_panel(m: usize, w: usize) -> Array2<f64> {
    let mut x = Array2::<f64>::zeros((m, w).f());
    for j in 0..w.min(m) {
        x[[j, j]] = 1.0;
    }
    x
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    fn spd(n: usize, seed: u64) -> Array2<f64> {
        let mut s = seed;
        let mut rnd = || {
            s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        let b = Array2::from_shape_fn((n + 3, n).f(), |_| rnd());
        let mut a = b.t().dot(&b);
        for i in 0..n {
            a[[i, i]] += 0.5;
        }
        a
    }

    #[test]
    fn packed_layout_factor_and_solves_match_the_square_forms() {
        // Reference: LAPACK's own conversion (dtrttf) for the layout; the square Cholesky
        // factor (potrf), its solve and inverse for the arithmetic. Orders of both parities.
        for &n in &[1usize, 2, 5, 6, 7, 10, 33] {
            let a = spd(n, n as u64);
            let mut a_f = Array2::<f64>::zeros((n, n).f());
            a_f.assign(&a);
            let mut rfp = vec![0.0; n * (n + 1) / 2];
            let (nn, mut info) = (n as i32, 0);
            unsafe { lapack_sys::dtrttf_(&TRANSR, &UPLO, &nn, a_f.as_ptr(), &nn, rfp.as_mut_ptr(), &mut info) };
            assert_eq!(info, 0);
            for j in 0..n {
                for i in j..n {
                    assert_eq!(rfp[PackedLower::index(n, i, j)], a[[i, j]], "n={n} ({i},{j})");
                }
            }
            // segments cover every stored value exactly once, with the right entries
            let mut p = PackedLower { n, buf: rfp.clone() };
            let mut seen = 0;
            p.segments_mut(|seg| match seg {
                Segment::Row { i, j0, vals } => {
                    for (t, v) in vals.iter().enumerate() {
                        assert!(i >= j0 + t);
                        assert_eq!(*v, a[[i, j0 + t]], "n={n} row {i}");
                    }
                    seen += vals.len();
                }
                Segment::Column { j, i0, vals } => {
                    for (t, v) in vals.iter().enumerate() {
                        assert_eq!(*v, a[[i0 + t, j]], "n={n} col {j}");
                    }
                    seen += vals.len();
                }
            });
            assert_eq!(seen, n * (n + 1) / 2);
            // the threaded version: every stored value mapped once, to f(i, j) at entry (i, j)
            for threads in [1usize, 2, 3, 8] {
                let mut q = PackedLower { n, buf: rfp.clone() };
                q.segments_par_mut(threads, &|seg| match seg {
                    Segment::Row { i, j0, vals } => vals.iter_mut().enumerate().for_each(|(t, v)| *v += (i * 1000 + j0 + t) as f64),
                    Segment::Column { j, i0, vals } => vals.iter_mut().enumerate().for_each(|(t, v)| *v += ((i0 + t) * 1000 + j) as f64),
                });
                for j in 0..n {
                    for i in j..n {
                        assert_eq!(q.buf[PackedLower::index(n, i, j)], a[[i, j]] + (i * 1000 + j) as f64, "n={n} threads={threads} ({i},{j})");
                    }
                }
            }
            // Gram by sfrk against the product
            let w = Array2::from_shape_fn((n + 4, n).f(), |(t, j)| ((t * 7 + j * 3) % 11) as f64 - 5.0 + 0.1 * j as f64);
            let g = PackedLower::gram(w.view(), &|| false).unwrap();
            let full = g.to_full().unwrap();
            let wtw = w.t().dot(&w);
            for j in 0..n {
                for i in j..n {
                    assert_relative_eq!(full[[i, j]], wtw[[i, j]], epsilon = 1e-12, max_relative = 1e-13);
                }
            }
            // factor, solve, inverse
            let l = crate::linalg::chol_lower(a.clone()).unwrap();
            let pl = PackedLower { n, buf: rfp }.factor().unwrap();
            let lf = pl.to_full().unwrap();
            for j in 0..n {
                for i in 0..n {
                    assert_relative_eq!(lf[[i, j]], l[[i, j]], epsilon = 1e-13, max_relative = 1e-12);
                }
            }
            let b = Array1::from_shape_fn(n, |i| (i as f64).sin() + 1.0);
            let x = pl.solve(&b).unwrap();
            let r = a.dot(&x) - &b;
            assert!(r.iter().all(|v| v.abs() < 1e-10), "n={n}");
            let inv = pl.inverse().unwrap();
            let eye = a.dot(&inv);
            for i in 0..n {
                for j in 0..n {
                    assert_relative_eq!(eye[[i, j]], if i == j { 1.0 } else { 0.0 }, epsilon = 1e-9);
                }
            }
        }
        // panels of L^-1 against the inverse of the square factor, by forward substitution
        for &n in &[5usize, 6, 9, 12] {
            let a = spd(n, 100 + n as u64);
            let mut a_f = Array2::<f64>::zeros((n, n).f());
            a_f.assign(&a);
            let mut rfp = vec![0.0; n * (n + 1) / 2];
            let (nn, mut info) = (n as i32, 0);
            unsafe { lapack_sys::dtrttf_(&TRANSR, &UPLO, &nn, a_f.as_ptr(), &nn, rfp.as_mut_ptr(), &mut info) };
            let pl = PackedLower { n, buf: rfp }.factor().unwrap();
            let l = pl.to_full().unwrap();
            let mut linv = Array2::<f64>::zeros((n, n));
            for col in 0..n {
                for i in 0..n {
                    let mut v = if i == col { 1.0 } else { 0.0 };
                    for r in 0..i {
                        v -= l[[i, r]] * linv[[r, col]];
                    }
                    linv[[i, col]] = v / l[[i, i]];
                }
            }
            for c in 0..n {
                for d in c..=n {
                    let x = pl.inverse_columns(c, d).unwrap();
                    assert_eq!(x.dim(), (n - c, d - c));
                    for i in 0..n - c {
                        for j in 0..d - c {
                            assert_relative_eq!(x[[i, j]], linv[[c + i, c + j]], epsilon = 1e-12, max_relative = 1e-10);
                        }
                    }
                }
            }
        }
        // not positive definite: refused
        let mut bad = Array2::<f64>::eye(6);
        bad[[3, 3]] = -1.0;
        let mut bf = vec![0.0; 21];
        let (nn, mut info) = (6i32, 0);
        let bad_f = bad.reversed_axes();
        unsafe { lapack_sys::dtrttf_(&TRANSR, &UPLO, &nn, bad_f.as_ptr(), &nn, bf.as_mut_ptr(), &mut info) };
        assert!(PackedLower { n: 6, buf: bf }.factor().is_none());
    }
}
