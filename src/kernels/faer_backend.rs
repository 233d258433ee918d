//! The default backend: faer (pure Rust; AVX2 / AVX-512 / NEON kernels chosen at run time,
//! parallel through rayon on blocksur's own pool).

use dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::linalg::matmul::triangular::BlockStructure;
use faer::{Accum, Par};
use ndarray::{Array1, Array2, ArrayView2, ArrayViewMut2, ShapeBuilder};

use super::{faer_mut, faer_ref, Dense};
use crate::error::{Result, SurError};

pub(crate) struct Faer;

/// Workspace for one call (faer's functions say how much they need).
fn workspace(req: StackReq) -> MemBuffer {
    MemBuffer::new(req)
}

impl Dense for Faer {
    const NAME: &'static str = "faer";

    fn syrk_lower(a: ArrayView2<f64>, c: ArrayViewMut2<f64>, accumulate: bool, par: Par) {
        let a = faer_ref(a);
        faer::linalg::matmul::triangular::matmul(
            faer_mut(c),
            BlockStructure::TriangularLower,
            if accumulate {
                Accum::Add
            } else {
                Accum::Replace
            },
            a.transpose(),
            BlockStructure::Rectangular,
            a,
            BlockStructure::Rectangular,
            1.0,
            par,
        );
    }

    fn gemm(
        alpha: f64,
        a: ArrayView2<f64>,
        b: ArrayView2<f64>,
        accumulate: bool,
        c: ArrayViewMut2<f64>,
        par: Par,
    ) {
        faer::linalg::matmul::matmul(
            faer_mut(c),
            if accumulate {
                Accum::Add
            } else {
                Accum::Replace
            },
            faer_ref(a),
            faer_ref(b),
            alpha,
            par,
        );
    }

    fn cholesky(a: ArrayViewMut2<f64>, par: Par) -> bool {
        let n = a.nrows();
        let req = faer::linalg::cholesky::llt::factor::cholesky_in_place_scratch::<f64>(
            n,
            par,
            Default::default(),
        );
        let mut mem = workspace(req);
        let a = faer_mut(a);
        let ok = faer::linalg::cholesky::llt::factor::cholesky_in_place(
            a,
            Default::default(),
            par,
            MemStack::new(&mut mem),
            Default::default(),
        )
        .is_ok();
        ok
    }

    fn trsm(t: ArrayView2<f64>, lower: bool, transpose: bool, b: ArrayViewMut2<f64>, par: Par) {
        use faer::linalg::triangular_solve::{
            solve_lower_triangular_in_place, solve_upper_triangular_in_place,
        };
        let t = faer_ref(t);
        let b = faer_mut(b);
        match (lower, transpose) {
            (true, false) => solve_lower_triangular_in_place(t, b, par),
            (true, true) => solve_upper_triangular_in_place(t.transpose(), b, par),
            (false, false) => solve_upper_triangular_in_place(t, b, par),
            (false, true) => solve_lower_triangular_in_place(t.transpose(), b, par),
        }
    }

    fn qr_thin(mut a: ArrayViewMut2<f64>) -> Option<Array2<f64>> {
        let (rows, m) = a.dim();
        let bs = faer::linalg::qr::no_pivoting::factor::recommended_block_size::<f64>(rows, m);
        let mut h = faer::Mat::<f64>::zeros(bs, m.min(rows));
        let par = crate::runtime::par((rows * m * m) as f64);
        let req = faer::linalg::qr::no_pivoting::factor::qr_in_place_scratch::<f64>(rows, m, bs, par, Default::default()).or(
            faer::linalg::householder::apply_block_householder_sequence_on_the_left_in_place_scratch::<f64>(rows, bs, m),
        );
        let mut mem = workspace(req);
        let info = faer::linalg::qr::no_pivoting::factor::qr_in_place(
            faer_mut(a.view_mut()),
            h.as_mut(),
            par,
            MemStack::new(&mut mem),
            Default::default(),
        );
        if info.rank < m.min(rows) {
            return None;
        }
        let r = Array2::from_shape_fn(
            (m, m),
            |(i, j)| if i <= j && i < rows { a[[i, j]] } else { 0.0 },
        );
        // Q = H [I; 0], formed beside the reflectors and copied over them
        let mut q = Array2::<f64>::zeros((rows, m).f());
        for j in 0..m.min(rows) {
            q[[j, j]] = 1.0;
        }
        faer::linalg::householder::apply_block_householder_sequence_on_the_left_in_place_with_conj(
            faer_ref(a.view()),
            h.as_ref(),
            faer::Conj::No,
            faer_mut(q.view_mut()),
            par,
            MemStack::new(&mut mem),
        );
        a.assign(&q);
        Some(r)
    }

    fn qr_r(a: ArrayViewMut2<f64>) -> Option<Array2<f64>> {
        let (rows, m) = a.dim();
        let k = rows.min(m);
        if k == 0 {
            return Some(Array2::zeros((m, m)));
        }
        let bs = faer::linalg::qr::no_pivoting::factor::recommended_block_size::<f64>(rows, m);
        let mut h = faer::Mat::<f64>::zeros(bs, k);
        let par = crate::runtime::par((rows * m * m) as f64);
        let req = faer::linalg::qr::no_pivoting::factor::qr_in_place_scratch::<f64>(
            rows,
            m,
            bs,
            par,
            Default::default(),
        );
        let mut mem = workspace(req);
        let mut a = a;
        let info = faer::linalg::qr::no_pivoting::factor::qr_in_place(
            faer_mut(a.view_mut()),
            h.as_mut(),
            par,
            MemStack::new(&mut mem),
            Default::default(),
        );
        (info.rank == k).then(|| {
            Array2::from_shape_fn(
                (m, m),
                |(i, j)| if i <= j && i < rows { a[[i, j]] } else { 0.0 },
            )
        })
    }

    fn sym_eigen(a: ArrayView2<f64>) -> Result<(Array1<f64>, Array2<f64>)> {
        let n = a.nrows();
        let par = Par::Seq;
        let req = faer::linalg::evd::self_adjoint_evd_scratch::<f64>(
            n,
            faer::linalg::evd::ComputeEigenvectors::Yes,
            par,
            Default::default(),
        );
        let mut mem = workspace(req);
        let mut s = faer::diag::Diag::<f64>::zeros(n);
        let mut u = Array2::<f64>::zeros((n, n).f());
        faer::linalg::evd::self_adjoint_evd(
            faer_ref(a),
            s.as_mut(),
            Some(faer_mut(u.view_mut())),
            par,
            MemStack::new(&mut mem),
            Default::default(),
        )
        .map_err(|e| SurError::numerical("symmetric eigenvalues", format!("{e:?}")))?;
        let vals = Array1::from_iter((0..n).map(|i| s[i]));
        Ok(super::sorted_eigen(vals, u))
    }

    fn right_singular_vectors(a: ArrayView2<f64>) -> Result<Array2<f64>> {
        let (m, n) = a.dim();
        let par = Par::Seq;
        use faer::linalg::svd::ComputeSvdVectors;
        let req = faer::linalg::svd::svd_scratch::<f64>(
            m,
            n,
            ComputeSvdVectors::No,
            ComputeSvdVectors::Full,
            par,
            Default::default(),
        );
        let mut mem = workspace(req);
        let mut s = faer::diag::Diag::<f64>::zeros(m.min(n));
        let mut v = Array2::<f64>::zeros((n, n).f());
        faer::linalg::svd::svd(
            faer_ref(a),
            s.as_mut(),
            None,
            Some(faer_mut(v.view_mut())),
            par,
            MemStack::new(&mut mem),
            Default::default(),
        )
        .map_err(|e| SurError::numerical("singular value decomposition", format!("{e:?}")))?;
        Ok(v)
    }
}
