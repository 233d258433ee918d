//! Where blocksur's parallel work runs: a rayon thread pool that blocksur owns, the user's
//! thread limit, and cancellation.
//!
//! The pool is built on first use with the limit in force (`set_threads`, else the
//! `RAYON_NUM_THREADS` environment variable read at that first use, else the cores this process
//! may use) and rebuilt when the limit changes or the process id does: a child made by
//! `fork()` has none of its parent's pool threads (only the forking thread survives a fork), so
//! it builds its own instead of handing work to threads that do not exist. rayon's global pool
//! is never used (it does not survive a fork either).
//!
//! No lock is held across work: the pool's slot is locked only to clone or replace its handle.
//! Threads of the pool are idle (parked) between jobs; rayon spins a little before parking.
//! When the pool cannot be built (threads cannot be started, e.g. under a low RLIMIT_AS), work
//! runs on the calling thread, one step after the other.

use std::cell::Cell;
use std::sync::atomic::{AtomicBool, AtomicPtr, AtomicUsize, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::time::Duration;

use faer::Par;

use crate::error::{Result, SurError};

/// The largest thread limit `set_threads` accepts.
pub const MAX_THREAD_LIMIT: usize = 1024;

/// The user's limit (0: not set; then `RAYON_NUM_THREADS` or the cores, at first use).
static LIMIT: AtomicUsize = AtomicUsize::new(0);

/// Sets the number of threads blocksur's parallel steps may use (1 ..= 1024). The pool is
/// rebuilt at the next parallel step; work already running finishes on the pool it started on.
pub fn set_threads(n: usize) -> Result<()> {
    if n == 0 || n > MAX_THREAD_LIMIT {
        return Err(SurError::InvalidOption(format!(
            "threads must be between 1 and {MAX_THREAD_LIMIT}, got {n}"
        )));
    }
    LIMIT.store(n, Ordering::Relaxed);
    Ok(())
}

/// The thread limit in force: set by `set_threads`, else `RAYON_NUM_THREADS` (a positive
/// integer) as read at the first call, else the cores this process may use.
pub fn get_threads() -> usize {
    match LIMIT.load(Ordering::Relaxed) {
        0 => {
            let n = default_threads();
            // the first reader fixes it (a concurrent `set_threads` wins)
            let _ = LIMIT.compare_exchange(0, n, Ordering::Relaxed, Ordering::Relaxed);
            LIMIT.load(Ordering::Relaxed)
        }
        n => n,
    }
}

fn default_threads() -> usize {
    let env = std::env::var("RAYON_NUM_THREADS")
        .ok()
        .and_then(|v| v.trim().parse::<usize>().ok());
    match env {
        Some(n) if n > 0 => n.min(MAX_THREAD_LIMIT),
        _ => std::thread::available_parallelism()
            .map(|c| c.get())
            .unwrap_or(1),
    }
}

/// The pool of one process, with the limit it was built for.
struct Slot {
    pid: u32,
    pool: Mutex<Option<(usize, Arc<rayon::ThreadPool>)>>,
}

/// The slot of the current process. A forked child finds its parent's slot (copied with the
/// memory, its threads gone, its lock possibly held by a thread that no longer exists) and
/// puts a fresh one in its place; the parent's is left alone (never dropped: dropping it would
/// signal threads that are not there).
static SLOT: AtomicPtr<Slot> = AtomicPtr::new(std::ptr::null_mut());

fn slot() -> &'static Slot {
    let pid = std::process::id();
    loop {
        let cur = SLOT.load(Ordering::Acquire);
        // SAFETY: a slot, once published, is never freed (see above).
        if let Some(s) = unsafe { cur.as_ref() } {
            if s.pid == pid {
                return s;
            }
        }
        let fresh = Box::into_raw(Box::new(Slot {
            pid,
            pool: Mutex::new(None),
        }));
        match SLOT.compare_exchange(cur, fresh, Ordering::AcqRel, Ordering::Acquire) {
            // SAFETY: just published, never freed.
            Ok(_) => return unsafe { &*fresh },
            // another thread of this process got there first
            // SAFETY: `fresh` was never published.
            Err(_) => drop(unsafe { Box::from_raw(fresh) }),
        }
    }
}

thread_local! {
    /// Set on the threads of blocksur's pools.
    static IN_POOL: Cell<bool> = const { Cell::new(false) };
    /// Set while a thread fits one system of a batch: its steps run sequentially (the batch
    /// is parallel over systems).
    static SEQUENTIAL: Cell<bool> = const { Cell::new(false) };
}

/// The pool for the limit in force, built if needed; None when its threads cannot be started.
fn pool() -> Option<Arc<rayon::ThreadPool>> {
    let threads = get_threads();
    let slot = slot();
    let mut guard = slot.pool.lock().unwrap_or_else(|p| p.into_inner());
    if let Some((n, p)) = guard.as_ref() {
        if *n == threads {
            return Some(Arc::clone(p));
        }
    }
    let built = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .thread_name(|i| format!("blocksur-{i}"))
        .start_handler(|_| IN_POOL.with(|c| c.set(true)))
        .build()
        .ok()
        .map(Arc::new);
    // the old pool (if any) ends when the work still using it lets go of it
    *guard = built.as_ref().map(|p| (threads, Arc::clone(p)));
    built
}

/// Whether the calling thread is one of blocksur's pool threads.
pub(crate) fn in_pool() -> bool {
    IN_POOL.with(|c| c.get())
}

/// Below this many flops a step runs on one thread: handing it to others costs more.
pub(crate) const PARALLEL_MIN_FLOPS: f64 = 4.0e6;

/// The parallelism for a dense step of about `flops` operations on the calling thread: the
/// pool's threads when the caller is one of them and the step is large, else sequential.
pub(crate) fn par(flops: f64) -> Par {
    if flops < PARALLEL_MIN_FLOPS || SEQUENTIAL.with(|c| c.get()) || !in_pool() {
        return Par::Seq;
    }
    match rayon::current_num_threads() {
        0 | 1 => Par::Seq,
        n => Par::rayon(n),
    }
}

/// Runs `f` with the parallelism for a step of about `flops` operations: inside blocksur's
/// pool when it is large and the caller is not already there (the caller then waits for it).
pub(crate) fn with_par<R: Send>(flops: f64, f: impl FnOnce(Par) -> R + Send) -> R {
    if flops < PARALLEL_MIN_FLOPS || SEQUENTIAL.with(|c| c.get()) || get_threads() <= 1 {
        return f(Par::Seq);
    }
    if in_pool() {
        return f(par(flops));
    }
    match pool() {
        Some(p) => p.install(|| f(par(flops))),
        None => f(Par::Seq),
    }
}

/// Whether parallel steps may use more than the calling thread here (not inside a system of a
/// batch, and a limit above one).
pub(crate) fn parallel_allowed() -> bool {
    !SEQUENTIAL.with(|c| c.get()) && get_threads() > 1
}

/// Runs `f` inside blocksur's pool (on the calling thread when it cannot be built or the
/// caller is already in it): for rayon's parallel iterators.
pub(crate) fn install<R: Send>(f: impl FnOnce() -> R + Send) -> R {
    if in_pool() {
        return f();
    }
    match pool() {
        Some(p) => p.install(f),
        None => f(),
    }
}

/// Runs `f` with this thread's dense steps sequential (a system of a batch).
pub(crate) fn sequential<R>(f: impl FnOnce() -> R) -> R {
    let before = SEQUENTIAL.with(|c| c.replace(true));
    let out = f();
    SEQUENTIAL.with(|c| c.set(before));
    out
}

/// A stop request shared by the caller and the work: the work asks `requested()` at its
/// checkpoints (counted, for progress reports), the caller sets it.
#[derive(Default)]
pub struct Cancel {
    flag: AtomicBool,
    checks: AtomicUsize,
}

impl Cancel {
    /// Whether a stop was asked for (counts the checkpoint).
    pub fn requested(&self) -> bool {
        self.checks.fetch_add(1, Ordering::Relaxed);
        self.flag.load(Ordering::Relaxed)
    }

    pub fn set(&self) {
        self.flag.store(true, Ordering::Relaxed);
    }

    /// Checkpoints passed so far.
    pub fn checks(&self) -> usize {
        self.checks.load(Ordering::Relaxed)
    }
}

/// How often the caller of `run_polled` polls while the work runs.
pub(crate) const POLL_EVERY: Duration = Duration::from_millis(5);

/// Runs `work` on blocksur's pool while the calling thread polls: every POLL_EVERY it calls
/// `poll` with the checkpoints the work has passed, and when `poll` says stop it sets the
/// work's `Cancel` (the work then returns at its next checkpoint). For callers whose stop
/// requests can only be seen on their own thread (Python runs signal handlers on the main
/// thread only). Work of fewer than `inline_flops` operations, or when the pool cannot be
/// built, runs on the calling thread, which then polls at the work's checkpoints itself.
pub fn run_polled<R: Send>(
    flops: f64,
    poll: &(dyn Fn(usize) -> bool + Sync),
    work: impl FnOnce(&(dyn Fn() -> bool + Sync)) -> R + Send,
) -> R {
    let cancel = Cancel::default();
    let pool = if flops < INLINE_MAX_FLOPS || in_pool() {
        None
    } else {
        pool()
    };
    let Some(pool) = pool else {
        let direct = || {
            let stop = cancel.requested() || poll(cancel.checks());
            if stop {
                cancel.set();
            }
            stop
        };
        return work(&direct);
    };
    let done = (Mutex::new(false), Condvar::new());
    let mut out = None;
    {
        let (cancel, done, out) = (&cancel, &done, &mut out);
        pool.in_place_scope(|scope| {
            scope.spawn(move |_| {
                // signals the caller however the work ends (a panic reaches it through the scope)
                let _finished = Finished(done);
                *out = Some(work(&|| cancel.requested()));
            });
            let mut finished = done.0.lock().unwrap_or_else(|p| p.into_inner());
            while !*finished {
                let (g, _) = done
                    .1
                    .wait_timeout(finished, POLL_EVERY)
                    .unwrap_or_else(|p| p.into_inner());
                finished = g;
                if !*finished && poll(cancel.checks()) {
                    cancel.set();
                }
            }
        });
    }
    out.expect("the work either returned or its panic was resumed")
}

/// Below this many operations `run_polled` runs the work on the calling thread: handing a
/// small fit to the pool (a wake-up of a parked thread) costs more than the fit.
pub(crate) const INLINE_MAX_FLOPS: f64 = 2.0e6;

struct Finished<'a>(&'a (Mutex<bool>, Condvar));

impl Drop for Finished<'_> {
    fn drop(&mut self) {
        *self.0 .0.lock().unwrap_or_else(|p| p.into_inner()) = true;
        self.0 .1.notify_all();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_limit_is_checked_and_the_pool_follows_it() {
        assert!(set_threads(0).is_err());
        assert!(set_threads(MAX_THREAD_LIMIT + 1).is_err());
        let before = get_threads();
        for n in [1usize, 3] {
            set_threads(n).unwrap();
            assert_eq!(get_threads(), n);
            // the pool's threads: as many as the limit, and known as blocksur's
            let (threads, inside) = install(|| (rayon::current_num_threads(), in_pool()));
            assert_eq!((threads, inside), (n, true), "limit {n}");
        }
        set_threads(before).unwrap();
    }

    #[test]
    fn polled_work_is_cancelled_by_the_poller_and_reports_its_checkpoints() {
        // the work runs until the caller's poll (on the calling thread) says stop, which it
        // does once the work has passed 1,000 checkpoints
        let seen = AtomicUsize::new(0);
        let poll = |checks: usize| {
            seen.fetch_max(checks, Ordering::Relaxed);
            checks >= 1000
        };
        let caller = std::thread::current().id();
        let (stopped, on_caller) = run_polled(1e12, &poll, |cancel| {
            let on_caller = std::thread::current().id() == caller;
            let mut n = 0usize;
            while !cancel() {
                n += 1;
                std::thread::sleep(Duration::from_micros(20));
            }
            (n, on_caller)
        });
        assert!(stopped >= 999, "stopped after {stopped} checkpoints");
        assert!(seen.load(Ordering::Relaxed) >= 1000);
        // large work runs on the pool (unless this machine cannot start threads)
        assert!(!on_caller || get_threads() == 1);
        // small work runs on the calling thread, which polls at its checkpoints itself
        let inline = run_polled(1.0, &|_| true, |cancel| {
            (cancel(), std::thread::current().id() == caller)
        });
        assert_eq!(inline, (true, true));
    }

    #[test]
    fn a_panic_in_polled_work_reaches_the_caller() {
        let caught = std::panic::catch_unwind(|| {
            run_polled(1e12, &|_| false, |_| -> usize { panic!("boom") })
        });
        assert!(caught.is_err());
        // and the pool still works
        assert_eq!(run_polled(1e12, &|_| false, |_| 7), 7);
    }
}
