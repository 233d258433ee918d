//! Many small independent systems at once, spread over threads. One failing system does not
//! stop the others: each gets its own result or error.

use ndarray::Array1;

use crate::error::Result;
use crate::estimate::{CovKind, Estimate, FitOptions};
use crate::prepare::Prepared;
use crate::system::SystemData;

/// What one system of a batch yields.
#[derive(Debug, Clone)]
pub struct BatchFit {
    pub estimate: Estimate,
    /// Classical standard errors of the stacked coefficients.
    pub se: Array1<f64>,
    pub loglik: Option<f64>,
}

fn fit_one(data: &SystemData, opts: &FitOptions) -> Result<BatchFit> {
    let prep = Prepared::new(data)?;
    let estimate = prep.estimate_with(opts, None, Some(data), &|| false)?;
    let se = prep.coef_variances(&estimate, CovKind::Classical, Some(data))?.mapv(|v| v.max(0.0).sqrt());
    let loglik = prep.log_likelihood(&estimate.resid_crossprod);
    Ok(BatchFit { estimate, se, loglik })
}

/// Fits every system with the same options on `threads` threads (at least one; the calling
/// thread is one of them), in order. Systems are handed out one at a time, so uneven costs
/// balance. Only the calling thread asks `cancel` (every 32 systems) whether to stop, so a
/// signal handler tied to it is honoured; systems not started then get `SurError::Interrupted`.
pub fn fit_many(
    systems: &[SystemData],
    opts: &FitOptions,
    threads: usize,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Vec<Result<BatchFit>> {
    use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
    use std::sync::OnceLock;
    let threads = threads.max(1).min(systems.len().max(1));
    let slots: Vec<OnceLock<Result<BatchFit>>> = (0..systems.len()).map(|_| OnceLock::new()).collect();
    let next = AtomicUsize::new(0);
    let stop = AtomicBool::new(false);
    let work = |checks: bool| {
        crate::prepare::IN_WORKER.with(|w| w.set(true));
        let mut done = 0usize;
        loop {
            if checks && done.is_multiple_of(32) && cancel() {
                stop.store(true, Ordering::Relaxed);
            }
            if stop.load(Ordering::Relaxed) {
                return;
            }
            let i = next.fetch_add(1, Ordering::Relaxed);
            if i >= systems.len() {
                return;
            }
            let _ = slots[i].set(fit_one(&systems[i], opts));
            done += 1;
        }
    };
    let nested = crate::prepare::IN_WORKER.with(|w| w.get());
    std::thread::scope(|scope| {
        for _ in 1..threads {
            scope.spawn(|| work(false));
        }
        work(true);
    });
    crate::prepare::IN_WORKER.with(|w| w.set(nested));
    slots.into_iter().map(|s| s.into_inner().unwrap_or(Err(crate::SurError::Interrupted))).collect()
}
