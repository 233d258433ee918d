//! Many small independent systems at once, spread over threads. One failing system does not
//! stop the others: each gets its own result or error.
//!
//! Each system first goes to the small-system path (`small`: reusable buffers, own kernels);
//! whatever that path declines (large systems, shrinkage, anything near a singularity limit,
//! and every input error) runs through the general `Prepared` path, which gives the same
//! numbers to rounding or the typed error.

use ndarray::{s, Array1, Array2, ArrayView1, ArrayView2};

pub(crate) mod small;

use crate::data::{Equation, SystemData};
use crate::error::Result;
use crate::estimate::{CovKind, Estimation, FitOptions};
use crate::prepare::Prepared;

/// What one system of a batch yields.
#[derive(Debug, Clone)]
pub struct BatchFit {
    /// Stacked coefficients and their classical standard errors.
    pub coef: Array1<f64>,
    pub se: Array1<f64>,
    /// The Omega of the final step (for OLS: from the OLS residuals).
    pub omega: Array2<f64>,
    pub n_iter: usize,
    pub converged: bool,
    /// Gaussian log-likelihood at the final residuals (minus infinity when S is singular).
    pub loglik: f64,
}

/// The systems of a batch.
pub trait Systems: Sync {
    fn count(&self) -> usize;
    /// System g's equations as views (cleared and refilled), for the small path; false when
    /// its names or shapes need the general path's checks.
    fn views<'s>(
        &'s self,
        g: usize,
        ys: &mut Vec<ArrayView1<'s, f64>>,
        xs: &mut Vec<ArrayView2<'s, f64>>,
    ) -> bool;
    /// System g with its names, for the general path.
    fn system(&self, g: usize) -> SystemData<'_>;
}

impl<'a> Systems for [SystemData<'a>] {
    fn count(&self) -> usize {
        self.len()
    }
    fn views<'s>(
        &'s self,
        g: usize,
        ys: &mut Vec<ArrayView1<'s, f64>>,
        xs: &mut Vec<ArrayView2<'s, f64>>,
    ) -> bool {
        ys.clear();
        xs.clear();
        for eq in &self[g].equations {
            ys.push(eq.y.view());
            xs.push(eq.x.view());
        }
        self[g].validate_shapes(true).is_ok()
    }
    fn system(&self, g: usize) -> SystemData<'_> {
        SystemData::new(
            self[g]
                .equations
                .iter()
                .map(|e| Equation {
                    name: e.name.clone(),
                    y: e.y.view(),
                    x: e.x.view(),
                    regressors: e.regressors.clone(),
                })
                .collect(),
        )
    }
}

/// Systems whose rows are stacked: equation i of every system in `ys[i]` and `xs[i]`, system g
/// on rows bounds[g]..bounds[g + 1]. Names are shared by all systems.
pub struct Stacked<'a> {
    ys: Vec<ArrayView1<'a, f64>>,
    xs: Vec<ArrayView2<'a, f64>>,
    bounds: Vec<usize>,
    names: Vec<String>,
    regressors: Vec<Vec<String>>,
    names_ok: bool,
}

impl<'a> Stacked<'a> {
    /// Panics unless the arrays, names and bounds agree in shape (the bindings check first).
    pub fn new(
        ys: Vec<ArrayView1<'a, f64>>,
        xs: Vec<ArrayView2<'a, f64>>,
        bounds: Vec<usize>,
        names: Vec<String>,
        regressors: Vec<Vec<String>>,
    ) -> Self {
        let rows = ys.first().map_or(0, |y| y.len());
        assert!(ys.len() == xs.len() && names.len() == ys.len() && regressors.len() == ys.len());
        assert!(ys.iter().all(|y| y.len() == rows) && xs.iter().all(|x| x.nrows() == rows));
        assert!(
            !bounds.is_empty()
                && bounds.windows(2).all(|w| w[0] <= w[1])
                && bounds[bounds.len() - 1] <= rows
        );
        // Names and column counts are the same in every system: check them once, on an
        // empty-row copy of the layout (the row-count checks are per system, in `views`).
        let probe = SystemData::new(
            (0..ys.len())
                .map(|i| {
                    Equation::new(
                        names[i].clone(),
                        ys[i].slice(s![..0]),
                        xs[i].slice(s![..0, ..]),
                    )
                    .with_regressors(regressors[i].clone())
                })
                .collect(),
        );
        let names_ok = probe.validate_shapes(false).is_ok();
        Stacked {
            ys,
            xs,
            bounds,
            names,
            regressors,
            names_ok,
        }
    }
}

impl<'a> Systems for Stacked<'a> {
    fn count(&self) -> usize {
        self.bounds.len() - 1
    }
    fn views<'s>(
        &'s self,
        g: usize,
        ys: &mut Vec<ArrayView1<'s, f64>>,
        xs: &mut Vec<ArrayView2<'s, f64>>,
    ) -> bool {
        let (a, b) = (self.bounds[g], self.bounds[g + 1]);
        ys.clear();
        xs.clear();
        for (y, x) in self.ys.iter().zip(&self.xs) {
            ys.push(y.slice(s![a..b]));
            xs.push(x.slice(s![a..b, ..]));
        }
        self.names_ok
    }
    fn system(&self, g: usize) -> SystemData<'_> {
        let (a, b) = (self.bounds[g], self.bounds[g + 1]);
        SystemData::new(
            (0..self.ys.len())
                .map(|i| {
                    Equation::named(
                        self.names[i].clone(),
                        self.ys[i].slice(s![a..b]),
                        self.xs[i].slice(s![a..b, ..]),
                        self.regressors[i].clone(),
                    )
                })
                .collect(),
        )
    }
}

/// The general path for one system.
pub(crate) fn fit_general(data: &SystemData, opts: &FitOptions) -> Result<BatchFit> {
    let prep = Prepared::new(data)?;
    let est = prep.estimate_with(opts, None, Some(data), &|| false)?;
    let se = prep
        .coef_variances(&est, CovKind::Classical, Some(data))?
        .mapv(|v| v.max(0.0).sqrt());
    let loglik = prep
        .log_likelihood(est.resid_crossprod())
        .unwrap_or(f64::NEG_INFINITY);
    Ok(BatchFit {
        coef: est.coef,
        se,
        omega: est.omega,
        n_iter: est.n_iter,
        converged: est.converged,
        loglik,
    })
}

/// Fits every system of a slice with the same options: see `fit_batch`.
pub fn fit_many(
    systems: &[SystemData],
    opts: &FitOptions,
    threads: usize,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Vec<Result<BatchFit>> {
    fit_batch(systems, opts, threads, cancel)
}

/// Fits every system with the same options on up to `threads` threads of blocksur's pool (and
/// no more than its thread limit), in order. Systems are handed out one at a time, so uneven
/// costs balance; each worker keeps its own buffers, and each system's own steps run
/// sequentially. `cancel` is asked every 32 systems of a worker; systems not started when it
/// says stop get `SurError::Interrupted`.
pub fn fit_batch<S: Systems + ?Sized>(
    systems: &S,
    opts: &FitOptions,
    threads: usize,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Vec<Result<BatchFit>> {
    use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
    use std::sync::OnceLock;
    let count = systems.count();
    let workers = threads
        .max(1)
        .min(crate::runtime::get_threads())
        .min(count.max(1));
    let slots: Vec<OnceLock<Result<BatchFit>>> = (0..count).map(|_| OnceLock::new()).collect();
    let next = AtomicUsize::new(0);
    let stop = AtomicBool::new(false);
    let work = || {
        crate::runtime::sequential(|| {
            let mut ws = small::Work::default();
            let (mut ys, mut xs) = (Vec::new(), Vec::new());
            let mut done = 0usize;
            loop {
                if done.is_multiple_of(32) && cancel() {
                    stop.store(true, Ordering::Relaxed);
                }
                if stop.load(Ordering::Relaxed) {
                    return;
                }
                let g = next.fetch_add(1, Ordering::Relaxed);
                if g >= count {
                    return;
                }
                let small = if systems.views(g, &mut ys, &mut xs) {
                    small::fit(&ys, &xs, opts, &mut ws)
                } else {
                    None
                };
                let out = match small {
                    Some(f) => Ok(f),
                    None => fit_general(&systems.system(g), opts),
                };
                let _ = slots[g].set(out);
                done += 1;
            }
        })
    };
    if workers <= 1 {
        work();
    } else {
        crate::runtime::install(|| {
            rayon::scope(|scope| {
                for _ in 1..workers {
                    scope.spawn(|_| work());
                }
                work();
            })
        });
    }
    slots
        .into_iter()
        .map(|s| s.into_inner().unwrap_or(Err(crate::SurError::Interrupted)))
        .collect()
}
