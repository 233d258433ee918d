// Times the GLS matrix of case (d) (K = 4000 from T = 2000 rows) formed and factored in square
// storage (BLAS syrk, LAPACK potrf) and in packed storage (LAPACK sfrk, pftrf), as the one-pass
// FGLS route does; seven rounds, each line one round (milliseconds). Not part of the tests:
// `cargo run --release --example prof_rfp`.
use ndarray::{Array2, ShapeBuilder};
use std::ffi::c_char;
use std::time::Instant;

#[global_allocator]
static GLOBAL: blocksur::alloc::BigPageAlloc = blocksur::alloc::BigPageAlloc;

fn main() {
    let k: usize = 4000;
    let t: usize = 2000;
    let mut seed = 1u64;
    let mut rnd = || {
        seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let w = Array2::from_shape_fn((t, k).f(), |_| rnd());
    let (kk, tt) = (k as i32, t as i32);
    let mut full_t = vec![];
    let mut rfp_t = vec![];
    for _ in 0..7 {
        let t0 = Instant::now();
        let mut g = vec![0.0f64; k * k];
        unsafe {
            cblas_sys::cblas_dsyrk(cblas_sys::CBLAS_LAYOUT::CblasColMajor, cblas_sys::CBLAS_UPLO::CblasLower,
                cblas_sys::CBLAS_TRANSPOSE::CblasTrans, kk, tt, 1.0, w.as_ptr(), tt, 0.0, g.as_mut_ptr(), kk);
            for i in 0..k { g[i * k + i] += k as f64; }
            let t1 = t0.elapsed().as_secs_f64();
            let mut info = 0;
            lapack_sys::dpotrf_(&(b'L' as c_char), &kk, g.as_mut_ptr(), &kk, &mut info);
            assert_eq!(info, 0);
            full_t.push((t1, t0.elapsed().as_secs_f64()));
        }
        drop(g);
        let t0 = Instant::now();
        let mut r = vec![0.0f64; k * (k + 1) / 2];
        unsafe {
            let (one, zero) = (1.0f64, 0.0f64);
            lapack_sys::dsfrk_(&(b'N' as c_char), &(b'L' as c_char), &(b'T' as c_char), &kk, &tt, &one, w.as_ptr(), &tt, &zero, r.as_mut_ptr());
            // diagonal: A[i,i]: i < k/2: RFP[(i+1) + i*(k+1)]; else j=i-k/2: RFP[j + j*(k+1)]
            let h = k / 2;
            for i in 0..k { let idx = if i < h { (i + 1) + i * (k + 1) } else { (i - h) + (i - h) * (k + 1) }; r[idx] += k as f64; }
            let t1 = t0.elapsed().as_secs_f64();
            let mut info = 0;
            lapack_sys::dpftrf_(&(b'N' as c_char), &(b'L' as c_char), &kk, r.as_mut_ptr(), &mut info);
            assert_eq!(info, 0);
            rfp_t.push((t1, t0.elapsed().as_secs_f64()));
        }
    }
    for (a, b) in full_t.iter().zip(&rfp_t) {
        println!("full syrk {:6.1} chol {:6.1} | rfp sfrk {:6.1} chol {:6.1}", a.0 * 1e3, (a.1 - a.0) * 1e3, b.0 * 1e3, (b.1 - b.0) * 1e3);
    }
}
