//! The optional backend (cargo feature `lapack`): a vendor BLAS/LAPACK through cblas/lapack
//! calls and ndarray-linalg (built here against the system OpenBLAS). The vendor library runs
//! its own threads; the `Par` argument is ignored.

use faer::Par;
use ndarray::{Array1, Array2, ArrayView2, ArrayViewMut2, ShapeBuilder};
use std::ffi::c_char;

use super::Dense;
use crate::error::{Result, SurError};

// Link the BLAS/LAPACK implementation (the system OpenBLAS).
extern crate blas_src;
extern crate openblas_src;

pub(crate) struct Lapack;

/// A column-major copy of `a` when it is not column-major with unit row stride.
fn fortran(a: ArrayView2<'_, f64>) -> std::borrow::Cow<'_, [f64]> {
    let column_major = a.t().is_standard_layout();
    match a.to_slice_memory_order().filter(|_| column_major) {
        Some(s) => std::borrow::Cow::Borrowed(s),
        None => {
            let mut f = Array2::<f64>::zeros(a.dim().f());
            f.assign(&a);
            std::borrow::Cow::Owned(f.into_raw_vec_and_offset().0)
        }
    }
}

/// Runs `f` on a column-major copy of the mutable view (written back after), or on the view
/// itself when it is column-major and contiguous; `f` gets the buffer and its leading dimension.
fn with_fortran<R>(mut a: ArrayViewMut2<f64>, f: impl FnOnce(&mut [f64], usize) -> R) -> R {
    let rows = a.nrows().max(1);
    if a.t().is_standard_layout() {
        if let Some(s) = a.as_slice_memory_order_mut() {
            return f(s, rows);
        }
    }
    let mut copy = Array2::<f64>::zeros(a.dim().f());
    copy.assign(&a);
    let out = f(
        copy.as_slice_memory_order_mut()
            .expect("fresh column-major array"),
        rows,
    );
    a.assign(&copy);
    out
}

impl Dense for Lapack {
    const NAME: &'static str = "lapack";

    fn syrk_lower(a: ArrayView2<f64>, c: ArrayViewMut2<f64>, accumulate: bool, _par: Par) {
        let (t, p) = a.dim();
        if p == 0 {
            return;
        }
        let ab = fortran(a);
        with_fortran(c, |cb, ldc| {
            if t == 0 {
                if !accumulate {
                    cb.fill(0.0);
                }
                return;
            }
            // SAFETY: `ab` is t x p column-major (leading dimension t), `cb` p x p with ldc.
            unsafe {
                cblas_sys::cblas_dsyrk(
                    cblas_sys::CBLAS_LAYOUT::CblasColMajor,
                    cblas_sys::CBLAS_UPLO::CblasLower,
                    cblas_sys::CBLAS_TRANSPOSE::CblasTrans,
                    p as i32,
                    t as i32,
                    1.0,
                    ab.as_ptr(),
                    t as i32,
                    if accumulate { 1.0 } else { 0.0 },
                    cb.as_mut_ptr(),
                    ldc as i32,
                )
            };
        });
    }

    fn gemm(
        alpha: f64,
        a: ArrayView2<f64>,
        b: ArrayView2<f64>,
        accumulate: bool,
        mut c: ArrayViewMut2<f64>,
        _par: Par,
    ) {
        ndarray::linalg::general_mat_mul(alpha, &a, &b, if accumulate { 1.0 } else { 0.0 }, &mut c);
    }

    fn cholesky(a: ArrayViewMut2<f64>, _par: Par) -> bool {
        let n = a.nrows() as i32;
        if n == 0 {
            return true;
        }
        with_fortran(a, |buf, ld| {
            let mut info = 0;
            // SAFETY: `buf` is n x n column-major with leading dimension ld.
            unsafe {
                lapack_sys::dpotrf_(
                    &(b'L' as c_char),
                    &n,
                    buf.as_mut_ptr(),
                    &(ld as i32),
                    &mut info,
                )
            };
            info == 0
        })
    }

    fn trsm(t: ArrayView2<f64>, lower: bool, transpose: bool, b: ArrayViewMut2<f64>, _par: Par) {
        let n = t.nrows();
        let m = b.ncols();
        if n == 0 || m == 0 {
            return;
        }
        let tb = fortran(t);
        with_fortran(b, |bb, ldb| {
            use cblas_sys::*;
            // SAFETY: `tb` is n x n column-major, `bb` n x m column-major with ldb.
            unsafe {
                cblas_dtrsm(
                    CBLAS_LAYOUT::CblasColMajor,
                    CBLAS_SIDE::CblasLeft,
                    if lower {
                        CBLAS_UPLO::CblasLower
                    } else {
                        CBLAS_UPLO::CblasUpper
                    },
                    if transpose {
                        CBLAS_TRANSPOSE::CblasTrans
                    } else {
                        CBLAS_TRANSPOSE::CblasNoTrans
                    },
                    CBLAS_DIAG::CblasNonUnit,
                    n as i32,
                    m as i32,
                    1.0,
                    tb.as_ptr(),
                    n as i32,
                    bb.as_mut_ptr(),
                    ldb as i32,
                )
            };
        });
    }

    fn qr_thin(a: ArrayViewMut2<f64>) -> Option<Array2<f64>> {
        let (t, m) = a.dim();
        Some(with_fortran(a, |buf, ld| {
            let (ti, mi, ldi) = (t as i32, m as i32, ld as i32);
            let mut tau = vec![0.0f64; m];
            let (mut info, mut query, mut q2, minus1) = (0, 0.0f64, 0.0f64, -1);
            // SAFETY: `buf` is t x m column-major (leading dimension ld); workspaces sized by
            // LAPACK's own queries.
            unsafe {
                lapack_sys::dgeqrf_(
                    &ti,
                    &mi,
                    buf.as_mut_ptr(),
                    &ldi,
                    tau.as_mut_ptr(),
                    &mut query,
                    &minus1,
                    &mut info,
                );
                lapack_sys::dorgqr_(
                    &ti,
                    &mi,
                    &mi,
                    buf.as_mut_ptr(),
                    &ldi,
                    tau.as_ptr(),
                    &mut q2,
                    &minus1,
                    &mut info,
                );
                let lwork = query.max(q2).max(m as f64) as usize;
                let mut work = vec![0.0f64; lwork];
                lapack_sys::dgeqrf_(
                    &ti,
                    &mi,
                    buf.as_mut_ptr(),
                    &ldi,
                    tau.as_mut_ptr(),
                    work.as_mut_ptr(),
                    &(lwork as i32),
                    &mut info,
                );
                let r = Array2::from_shape_fn(
                    (m, m),
                    |(i, j)| if i <= j { buf[j * ld + i] } else { 0.0 },
                );
                lapack_sys::dorgqr_(
                    &ti,
                    &mi,
                    &mi,
                    buf.as_mut_ptr(),
                    &ldi,
                    tau.as_ptr(),
                    work.as_mut_ptr(),
                    &(lwork as i32),
                    &mut info,
                );
                r
            }
        }))
    }

    fn qr_r(a: ArrayViewMut2<f64>) -> Option<Array2<f64>> {
        let (rows, m) = a.dim();
        if rows == 0 || m == 0 {
            return Some(Array2::zeros((m, m)));
        }
        Some(with_fortran(a, |buf, ld| {
            let (ri, mi, ldi) = (rows as i32, m as i32, ld as i32);
            let mut tau = vec![0.0f64; rows.min(m)];
            let (mut info, mut query, minus1) = (0, 0.0f64, -1);
            // SAFETY: `buf` is rows x m column-major; workspace sized by LAPACK's query.
            unsafe {
                lapack_sys::dgeqrf_(
                    &ri,
                    &mi,
                    buf.as_mut_ptr(),
                    &ldi,
                    tau.as_mut_ptr(),
                    &mut query,
                    &minus1,
                    &mut info,
                );
                let lwork = (query as usize).max(m);
                let mut work = vec![0.0f64; lwork];
                lapack_sys::dgeqrf_(
                    &ri,
                    &mi,
                    buf.as_mut_ptr(),
                    &ldi,
                    tau.as_mut_ptr(),
                    work.as_mut_ptr(),
                    &(lwork as i32),
                    &mut info,
                );
            }
            Array2::from_shape_fn((m, m), |(i, j)| {
                if i <= j && i < rows {
                    buf[j * ld + i]
                } else {
                    0.0
                }
            })
        }))
    }

    fn sym_eigen(a: ArrayView2<f64>) -> Result<(Array1<f64>, Array2<f64>)> {
        use ndarray_linalg::{Eigh, UPLO};
        let (vals, vecs) = a
            .to_owned()
            .eigh(UPLO::Lower)
            .map_err(|e| SurError::numerical("symmetric eigenvalues", e))?;
        Ok(super::sorted_eigen(vals, vecs))
    }

    fn right_singular_vectors(a: ArrayView2<f64>) -> Result<Array2<f64>> {
        use ndarray_linalg::SVD;
        let (_, _, vt) = a
            .to_owned()
            .svd(false, true)
            .map_err(|e| SurError::numerical("singular value decomposition", e))?;
        let vt = vt.ok_or_else(|| {
            SurError::numerical("singular value decomposition", "no right singular vectors")
        })?;
        Ok(vt.t().to_owned())
    }
}
