// Times the Cholesky factorisation of a K x K GLS-sized matrix (case (d): K = 4000; case (c):
// K = 300) by `linalg::chol_lower` and by LAPACK potrf, against dgemm on the same BLAS. Not part of the tests:
// `cargo run --release --example prof_chol [K]`.
use ndarray::{Array2, ShapeBuilder};
use std::time::Instant;

fn best(reps: usize, mut f: impl FnMut()) -> f64 {
    (0..reps)
        .map(|_| {
            let t0 = Instant::now();
            f();
            t0.elapsed().as_secs_f64()
        })
        .fold(f64::INFINITY, f64::min)
}

fn main() {
    let n: usize = std::env::args().nth(1).map(|a| a.parse().unwrap()).unwrap_or(4000);
    let mut seed = 1u64;
    let mut rnd = || {
        seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let b = Array2::from_shape_fn((n, n).f(), |_| rnd());
    let mut a = blocksur::linalg::gram(b.view());
    for i in 0..n {
        a[[i, i]] += n as f64;
    }
    let reps = if n <= 1000 { 50 } else { 5 };
    let tp = best(reps, || {
        blocksur::linalg::chol_lower(a.clone()).unwrap();
    });
    let tl = best(reps, || {
        let mut c = a.clone();
        let (nn, mut info) = (n as i32, 0);
        // SAFETY: c is an n x n column-major buffer.
        unsafe { lapack_sys::dpotrf_(&(b'L' as std::ffi::c_char), &nn, c.as_mut_ptr(), &nn, &mut info) };
        assert_eq!(info, 0);
    });
    let tc = best(reps, || {
        let _ = a.clone();
    });
    let h = n / 2;
    let x = Array2::from_shape_fn((h, h).f(), |_| rnd());
    let y = Array2::from_shape_fn((h, h).f(), |_| rnd());
    let mut z = Array2::<f64>::zeros((h, h).f());
    let tg = best(reps, || {
        ndarray::linalg::general_mat_mul(-1.0, &x, &y.t(), 1.0, &mut z);
    });
    let gf = 2.0 * (h as f64).powi(3) / tg / 1e9;
    let pf = (n as f64).powi(3) / 3.0 / (tp - tc) / 1e9;
    let lf = (n as f64).powi(3) / 3.0 / (tl - tc) / 1e9;
    println!("K={n}: chol_lower {:.3} ms ({pf:.1} GFlop/s), LAPACK potrf {:.3} ms ({lf:.1} GFlop/s); dgemm {h}x{h}x{h} {:.4} s ({gf:.1} GFlop/s); copy {:.3} s", tp * 1e3, tl * 1e3, tg, tc);
}
