// Times the Cholesky factorisation of a K x K GLS-sized matrix (case (d): K = 4000) by LAPACK
// potrf against the BLAS level-3 pieces it is made of. Not part of the tests:
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
    let reps = 5;
    let tp = best(reps, || {
        blocksur::linalg::chol_lower(a.clone()).unwrap();
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
    println!("K={n}: potrf {:.3} s ({pf:.1} GFlop/s); dgemm {h}x{h}x{h} {:.4} s ({gf:.1} GFlop/s); copy {:.3} s", tp, tg, tc);
}
