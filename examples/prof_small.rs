// Times the data pass on a small system (the per-call overhead case). Not part of the tests.
// `--prepare-only` / `--estimate-only` loop the data pass / an FGLS estimate alone (for `perf record`).
use blocksur::{Equation, Prepared, SystemData};
use ndarray::{Array1, Array2};
use std::time::Instant;

fn main() {
    let (n, t, k) = (5usize, 200usize, 4usize);
    let mut seed = 1u64;
    let mut rnd = || {
        seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let xs: Vec<Array2<f64>> = (0..n).map(|_| Array2::from_shape_fn((t, k), |(_, j)| if j == 0 { 1.0 } else { rnd() })).collect();
    let ys: Vec<Array1<f64>> = (0..n).map(|_| Array1::from_shape_fn(t, |_| rnd())).collect();
    let data = SystemData::new(ys.iter().zip(&xs).enumerate().map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view())).collect());
    for _ in 0..200 {
        Prepared::new(&data).unwrap();
    }
    let reps = 5000;
    // the fastest of 50 batches of 100 calls: on a shared machine the minimum is the stable
    // figure (others' load only ever adds)
    let mut best = f64::INFINITY;
    for _ in 0..50 {
        let t0 = Instant::now();
        for _ in 0..100 {
            Prepared::new(&data).unwrap();
        }
        best = best.min(t0.elapsed().as_secs_f64() * 1e6 / 100.0);
    }
    println!("prepare: {best:.1} us (fastest batch of 100)");
    let prep = Prepared::new(&data).unwrap();
    let fgls = blocksur::FitOptions::default();
    let mut best = f64::INFINITY;
    for _ in 0..50 {
        let t0 = Instant::now();
        for _ in 0..100 {
            prep.estimate(&fgls).unwrap();
        }
        best = best.min(t0.elapsed().as_secs_f64() * 1e6 / 100.0);
    }
    println!("estimate (fgls): {best:.1} us (fastest batch of 100)");
    if std::env::args().any(|a| a == "--estimate-only") {
        for _ in 0..20 * reps {
            prep.estimate(&fgls).unwrap();
        }
        return;
    }
    if std::env::args().any(|a| a == "--prepare-only") {
        // for `perf record`: the data pass alone, long enough to sample
        for _ in 0..20 * reps {
            Prepared::new(&data).unwrap();
        }
        return;
    }
    let t0 = Instant::now();
    for _ in 0..reps {
        data.validate().unwrap();
    }
    println!("validate: {:.1} us", t0.elapsed().as_secs_f64() * 1e6 / reps as f64);
    let t0 = Instant::now();
    for _ in 0..reps {
        for x in &xs {
            let a = x.to_owned();
            let _ = ndarray_linalg::QRInto::qr_into(a).unwrap();
        }
    }
    println!("5 QRs: {:.1} us", t0.elapsed().as_secs_f64() * 1e6 / reps as f64);
    let w = Array2::from_shape_fn(ndarray::ShapeBuilder::f((t, n * k + n)), |_| rnd());
    let t0 = Instant::now();
    for _ in 0..reps {
        let _ = blocksur::linalg::gram(w.view());
    }
    println!("gram: {:.1} us", t0.elapsed().as_secs_f64() * 1e6 / reps as f64);
    let r = Array2::from_shape_fn((k, k), |(i, j)| if j >= i { 1.0 + (i + j) as f64 } else { 0.0 });
    let t0 = Instant::now();
    for _ in 0..reps {
        let _ = blocksur::linalg::triangular_condition(&r);
    }
    println!("trcon: {:.2} us", t0.elapsed().as_secs_f64() * 1e6 / reps as f64);
    let t0 = Instant::now();
    for _ in 0..reps {
        for x in &xs {
            let _ = blocksur::linalg::thin_qr(blocksur::linalg::to_fortran(x)).unwrap();
        }
    }
    println!("5 thin QRs: {:.1} us", t0.elapsed().as_secs_f64() * 1e6 / reps as f64);
}

#[allow(dead_code)]
fn more() {}
