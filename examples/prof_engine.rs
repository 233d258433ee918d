// Times the phases of a fit in Rust alone, medians over repeats: the data pass (`Prepared::new`),
// a two-step FGLS estimate with standard errors on it, one further IFGLS step, and the one-pass
// two-step FGLS route with standard errors. Not part of the tests.
//   cargo run --release --example prof_engine -- N T K_i [repeats]     (default: case (c))
use blocksur::{
    fgls_from_data, CovKind, Divisor, Equation, Estimation, FitOptions, Method, Prepared,
    SystemData,
};
use ndarray::{Array1, Array2};
use std::time::Instant;

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(|a, b| a.total_cmp(b));
    if std::env::var("LOW").is_ok() {
        v[v.len() / 10]
    } else {
        v[v.len() / 2]
    }
}

/// Median wall time of `f` in ms over `reps` calls (after one warm-up call).
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
        .map(|a| a.parse().expect("whole numbers"))
        .collect();
    let (n, t, k) = if args.len() >= 3 {
        (args[0], args[1], args[2])
    } else {
        (50, 5000, 6)
    };
    let reps = args.get(3).copied().unwrap_or(11);
    let mut seed = 1u64;
    let mut rnd = || {
        seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let common: Vec<f64> = (0..t).map(|_| rnd()).collect();
    let xs: Vec<Array2<f64>> = (0..n)
        .map(|_| Array2::from_shape_fn((t, k), |(_, j)| if j == 0 { 1.0 } else { rnd() }))
        .collect();
    let ys: Vec<Array1<f64>> = (0..n)
        .map(|i| Array1::from_shape_fn(t, |r| xs[i].row(r).sum() + common[r] + rnd()))
        .collect();
    let data = SystemData::new(
        ys.iter()
            .zip(&xs)
            .enumerate()
            .map(|(i, (y, x))| Equation::new(format!("e{i}"), y.view(), x.view()))
            .collect(),
    );
    println!(
        "N={n} T={t} K_i={k}: backend {}, isa {}, threads {}",
        blocksur::backend_name(),
        blocksur::isa_name(),
        blocksur::get_threads()
    );
    let fgls = FitOptions {
        method: Method::Fgls,
        ..Default::default()
    };
    let prep_ms = time(reps, || {
        Prepared::new(&data).unwrap();
    });
    let step0_ms = time(reps, || {
        Prepared::new_matrix_free(&data, &|| false).unwrap();
    });
    println!("step 0 (the matrix-free preparation) {step0_ms:.3} ms");
    if std::env::var("ONLY").as_deref() == Ok("onepass") {
        for _ in 0..reps {
            let t0 = Instant::now();
            let (p, e) = fgls_from_data(&data, Divisor::Ml, &|| false).unwrap();
            let t1 = Instant::now();
            p.coef_standard_errors(&e, CovKind::Classical, None)
                .unwrap();
            println!(
                "one-pass fgls {:.1} ms, se {:.1} ms",
                (t1 - t0).as_secs_f64() * 1e3,
                t1.elapsed().as_secs_f64() * 1e3
            );
        }
        return;
    }
    if std::env::var("ONLY").as_deref() == Ok("step0") {
        for _ in 0..reps * 20 {
            Prepared::new_matrix_free(&data, &|| false).unwrap();
        }
        return;
    }
    let prep = Prepared::new(&data).unwrap();
    let est_ms = time(reps, || {
        let e = prep.estimate(&fgls).unwrap();
        prep.coef_standard_errors(&e, CovKind::Classical, None)
            .unwrap();
    });
    let step = |m: usize| FitOptions {
        method: Method::IteratedFgls,
        tol: 0.0,
        max_iter: m,
        ..Default::default()
    };
    let (m1, m2) = (2, 7);
    let i1 = time(reps, || {
        prep.estimate(&step(m1)).unwrap();
    });
    let i2 = time(reps, || {
        prep.estimate(&step(m2)).unwrap();
    });
    let one_pass_ms = time(reps, || {
        let (p, e) = fgls_from_data(&data, Divisor::Ml, &|| false).unwrap();
        p.coef_standard_errors(&e, CovKind::Classical, None)
            .unwrap();
    });
    println!(
        "data pass {prep_ms:.3} ms; fgls + se on it {est_ms:.3} ms; whole {:.3} ms",
        prep_ms + est_ms
    );
    println!(
        "one further ifgls step {:.3} ms",
        (i2 - i1) / (m2 - m1) as f64
    );
    println!("one-pass fgls + se {one_pass_ms:.3} ms");
}
