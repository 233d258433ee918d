// Times the pieces of the data pass on a mid-size system (case (c) of the benchmarks:
// N=50, T=5000, K_i=6): step 0 alone, the Gram product alone, and the whole preparation.
// Not part of the tests: `cargo run --release --example prof_gram`.
use blocksur::{Equation, Prepared, SystemData};
use ndarray::{Array1, Array2, ShapeBuilder};
use std::time::Instant;

/// The 10th percentile: robust to other load on a shared machine.
fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    v[v.len() / 10]
}

fn time(reps: usize, mut f: impl FnMut()) -> f64 {
    f();
    median(
        (0..reps)
            .map(|_| {
                let t0 = Instant::now();
                f();
                t0.elapsed().as_secs_f64() * 1e3
            })
            .collect(),
    )
}

fn main() {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| a.parse().unwrap())
        .collect();
    let (n, t, k) = if args.len() == 3 {
        (args[0], args[1], args[2])
    } else {
        (50, 5000, 6)
    };
    let mut seed = 1u64;
    let mut rnd = || {
        seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let xs: Vec<Array2<f64>> = (0..n)
        .map(|_| Array2::from_shape_fn((t, k), |(_, j)| if j == 0 { 1.0 } else { rnd() }))
        .collect();
    let ys: Vec<Array1<f64>> = (0..n)
        .map(|_| Array1::from_shape_fn(t, |_| rnd()))
        .collect();
    let data = SystemData::new(
        ys.iter()
            .zip(&xs)
            .enumerate()
            .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
            .collect(),
    );
    let p = n * (k + 1);
    let w = Array2::from_shape_fn((t, p).f(), |_| rnd());
    let reps: usize = std::env::var("REPS").ok().and_then(|r| r.parse().ok()).unwrap_or(21);
    if std::env::var("ONLY").as_deref() == Ok("ifgls") {
        let prepared = Prepared::new(&data).unwrap();
        let o = blocksur::FitOptions { method: blocksur::Method::IteratedFgls, tol: 0.0, max_iter: 12, ..Default::default() };
        let e = time(reps, || {
            prepared.estimate(&o).unwrap();
        });
        println!("ifgls (12 steps) {e:.3} ms");
        return;
    }
    if std::env::var("ONLY").as_deref() == Ok("fgls") {
        // the two halves of a two-step FGLS fit: the data pass, then the GLS step on it
        let g = time(reps, || {
            blocksur::linalg::gram(w.view());
        });
        let prep = time(reps, || {
            Prepared::new(&data).unwrap();
        });
        let prepared = Prepared::new(&data).unwrap();
        let o = blocksur::FitOptions { method: blocksur::Method::Fgls, ..Default::default() };
        let e = time(reps, || {
            prepared.estimate(&o).unwrap();
        });
        println!("N={n} T={t} K_i={k}: gram {g:.1} ms, prepare {prep:.1} ms, fgls estimate {e:.1} ms");
        return;
    }
    if std::env::var("ONLY").as_deref() == Ok("step0") {
        let mf = time(reps, || {
            Prepared::new_matrix_free(&data, &|| false).unwrap();
        });
        println!("step 0 (matrix-free prepare) {mf:.2} ms");
        return;
    }
    let g = time(reps, || {
        blocksur::linalg::gram(w.view());
    });
    let gs = time(reps, || {
        blocksur::linalg::gram_syrk(w.view(), &|| false).unwrap();
    });
    let d = &blocksur::linalg::gram(w.view()) - &blocksur::linalg::gram_syrk(w.view(), &|| false).unwrap();
    let rel = d.iter().fold(0.0f64, |m, v| m.max(v.abs())) / t as f64;
    println!("gram (packed kernel) {g:.2} ms, BLAS syrk {gs:.2} ms ({:.2}x); max difference / T {rel:.1e}", gs / g);
    let prep = time(reps, || {
        Prepared::new(&data).unwrap();
    });
    let mf = time(reps, || {
        Prepared::new_matrix_free(&data, &|| false).unwrap();
    });
    println!("N={n} T={t} K_i={k} P={p}: gram {g:.2} ms, step 0 (matrix-free prepare) {mf:.2} ms, prepare {prep:.2} ms ({:.2}x gram)", prep / g);
    // one further IFGLS iteration: (12 steps - 2 steps) / 10, on the prepared system
    let prepared = Prepared::new(&data).unwrap();
    let steps = |m: usize| blocksur::FitOptions { method: blocksur::Method::IteratedFgls, tol: 0.0, max_iter: m, ..Default::default() };
    let (o2, o12) = (steps(2), steps(12));
    let t2 = time(reps, || {
        prepared.estimate(&o2).unwrap();
    });
    let t12 = time(reps, || {
        prepared.estimate(&o12).unwrap();
    });
    let kk = n * k;
    let m = {
        let a = Array2::from_shape_fn((kk, kk), |_| rnd());
        let mut m = a.t().dot(&a);
        for i in 0..kk {
            m[[i, i]] += kk as f64;
        }
        blocksur::linalg::to_fortran(&m)
    };
    let chol = time(reps, || {
        blocksur::linalg::chol_lower(m.clone()).unwrap();
    });
    let per = (t12 - t2) / 10.0;
    println!("IFGLS: one further iteration {per:.3} ms ({:.1}% of gram); Cholesky of the K={kk} GLS matrix {chol:.3} ms", 100.0 * per / g);
}
