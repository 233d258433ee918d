// Times many small independent systems (N=3, T=60, K_i=3) through the batch, on 1 and 2
// threads, with the CPU time of the process. Not part of the tests:
// `cargo run --release --example prof_many`.
use blocksur::{Equation, FitOptions, SystemData};
use ndarray::{Array1, Array2};
use std::time::Instant;

fn cpu_seconds() -> f64 {
    let stat = std::fs::read_to_string("/proc/self/stat").unwrap();
    let fields: Vec<&str> = stat
        .rsplit(')')
        .next()
        .unwrap()
        .split_whitespace()
        .collect();
    (fields[11].parse::<f64>().unwrap() + fields[12].parse::<f64>().unwrap()) / 100.0
}

fn main() {
    let (g, n, t, k) = (10_000usize, 3usize, 60usize, 3usize);
    let mut seed = 7u64;
    let mut rnd = || {
        seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let xs: Vec<Array2<f64>> = (0..g * n)
        .map(|_| Array2::from_shape_fn((t, k), |(_, j)| if j == 0 { 1.0 } else { rnd() }))
        .collect();
    let ys: Vec<Array1<f64>> = (0..g * n)
        .map(|_| Array1::from_shape_fn(t, |_| rnd()))
        .collect();
    let systems: Vec<SystemData> = (0..g)
        .map(|s| {
            SystemData::new(
                (0..n)
                    .map(|i| {
                        Equation::new(format!("e{i}"), ys[s * n + i].view(), xs[s * n + i].view())
                    })
                    .collect(),
            )
        })
        .collect();
    let opts = FitOptions::default();
    for threads in [1usize, 2, 1, 2] {
        let (c0, t0) = (cpu_seconds(), Instant::now());
        let out = blocksur::batch::fit_many(&systems, &opts, threads, &|| false);
        let wall = t0.elapsed().as_secs_f64();
        let cpu = cpu_seconds() - c0;
        let failed = out.iter().filter(|r| r.is_err()).count();
        println!(
            "threads {threads}: {:.1} us/system, cpu/wall {:.2}, failed {failed}",
            wall * 1e6 / g as f64,
            cpu / wall
        );
    }
}
