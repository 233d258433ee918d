//! A small persistent pool of worker threads for the parallel regions of the data pass (step 0
//! and the Gram kernel).
//!
//! A fresh thread per region (std::thread::scope) costs a clone, a stack whose pages the C
//! library hands back at the thread's exit (a TLB shootdown on the other cores of the process)
//! and, on a virtual machine, the wake-up of a virtual CPU that went idle; a fit opened two
//! such regions. Workers here stay: after a job each spins for SPIN_AFTER_JOB (the next region
//! of the same fit, or the next fit of a loop, usually starts within it), then parks.
//!
//! One caller at a time owns the pool; a second caller that finds it taken (another Python
//! thread fitting at the same time) runs its region on fresh scoped threads, as before.

use std::any::Any;
use std::cell::Cell;
use std::panic::{catch_unwind, resume_unwind, AssertUnwindSafe};
use std::sync::atomic::{AtomicU8, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, OnceLock};
use std::time::{Duration, Instant};

/// How long a worker spins for its next job before it parks.
const SPIN_AFTER_JOB: Duration = Duration::from_millis(1);

const IDLE: u8 = 0;
const SLEEPING: u8 = 1;
const HAS_JOB: u8 = 2;

/// One parallel region: the work `f(i)` for i = 1..threads (the caller runs f(0)), the count
/// of workers not finished, and the first panic of a worker.
struct Region {
    f: *const (dyn Fn(usize) + Sync + 'static),
    remaining: AtomicUsize,
    panic: Mutex<Option<Box<dyn Any + Send>>>,
    /// The caller, unparked by the last worker to finish.
    caller: std::thread::Thread,
}

/// A job handed to a worker: its region (on the caller's stack) and its index.
struct Job {
    region: *const Region,
    index: usize,
}

// SAFETY: a Job is sent to one worker, which uses the region only until it decrements
// `remaining`; the caller keeps the region (and the closure it points to) alive until
// `remaining` is zero, and the closure is Sync.
unsafe impl Send for Job {}

struct Worker {
    state: AtomicU8,
    job: Mutex<Option<Job>>,
    thread: std::thread::Thread,
}

struct Pool {
    /// The process that started the workers: a child made by fork() has none of them.
    pid: u32,
    /// Held by the caller that owns the pool for the length of a region.
    busy: Mutex<()>,
    /// Workers started (they are never stopped), in `workers[..count]`.
    count: AtomicUsize,
    workers: [OnceLock<Arc<Worker>>; MAX_WORKERS],
    /// Kernel thread ids of the workers (0 until one has started), for `is_idle_worker`.
    tids: [AtomicUsize; MAX_WORKERS],
}

const MAX_WORKERS: usize = 16;

fn pool() -> &'static Pool {
    static POOL: OnceLock<Pool> = OnceLock::new();
    POOL.get_or_init(|| Pool {
        pid: std::process::id(),
        busy: Mutex::new(()),
        count: AtomicUsize::new(0),
        workers: std::array::from_fn(|_| OnceLock::new()),
        tids: std::array::from_fn(|_| AtomicUsize::new(0)),
    })
}

thread_local! {
    static IS_POOL_WORKER: Cell<bool> = const { Cell::new(false) };
}

/// This thread's kernel id, from /proc/thread-self (0 where it cannot be read).
fn kernel_tid() -> usize {
    std::fs::read_link("/proc/thread-self")
        .ok()
        .and_then(|p| p.file_name().and_then(|n| n.to_str()).and_then(|s| s.parse().ok()))
        .unwrap_or(0)
}

fn worker_loop(w: Arc<Worker>, slot: usize) {
    IS_POOL_WORKER.with(|c| c.set(true));
    pool().tids[slot].store(kernel_tid(), Ordering::Release);
    loop {
        // wait for a job: spin for a while, then park
        let deadline = Instant::now() + SPIN_AFTER_JOB;
        let mut spins = 0u32;
        while w.state.load(Ordering::Acquire) != HAS_JOB {
            spins = spins.wrapping_add(1);
            if !spins.is_multiple_of(512) {
                std::hint::spin_loop();
                continue;
            }
            // an idle worker leaves its core to any other thread that wants it
            std::thread::yield_now();
            if Instant::now() >= deadline {
                if w.state.compare_exchange(IDLE, SLEEPING, Ordering::AcqRel, Ordering::Acquire).is_ok() {
                    // only a caller moves SLEEPING on (to HAS_JOB, then unparks)
                    while w.state.load(Ordering::Acquire) == SLEEPING {
                        std::thread::park();
                    }
                }
                break;
            }
        }
        let job = w.job.lock().unwrap_or_else(|p| p.into_inner()).take();
        let Some(job) = job else {
            // cannot happen (a caller stores the job before HAS_JOB); do not spin on it
            w.state.store(IDLE, Ordering::Release);
            continue;
        };
        // SAFETY: see `Job`: the region outlives this use.
        let region = unsafe { &*job.region };
        let f = unsafe { &*region.f };
        if let Err(p) = catch_unwind(AssertUnwindSafe(|| f(job.index))) {
            let mut slot = region.panic.lock().unwrap_or_else(|p| p.into_inner());
            if slot.is_none() {
                *slot = Some(p);
            }
        }
        // idle before the region is seen finished: the next region may hand out a job at once;
        // the region is not touched after the count goes down (the caller may return at once)
        w.state.store(IDLE, Ordering::Release);
        let caller = region.caller.clone();
        if region.remaining.fetch_sub(1, Ordering::AcqRel) == 1 {
            caller.unpark();
        }
    }
}

/// Runs f(0), .., f(threads - 1) at the same time, f(0) on the calling thread, and returns when
/// all have returned. A panic in any of them reaches the caller once all have finished.
pub(crate) fn run(threads: usize, f: &(dyn Fn(usize) + Sync)) {
    if threads <= 1 {
        f(0);
        return;
    }
    let p = pool();
    let own = p.pid == std::process::id() && !IS_POOL_WORKER.with(|c| c.get()) && threads - 1 <= MAX_WORKERS;
    let guard = if own { p.busy.try_lock().ok() } else { None };
    let Some(_guard) = guard else {
        // the pool is in use, this is one of its workers, or a child process forked from the
        // one that started them: fresh scoped threads
        // (joined here, so that a panic reaches the caller with its own payload, as from the pool)
        let mut panic: Option<Box<dyn Any + Send>> = None;
        std::thread::scope(|sc| {
            let handles: Vec<_> = (1..threads).map(|i| sc.spawn(move || f(i))).collect();
            let mine = catch_unwind(AssertUnwindSafe(|| f(0)));
            for h in handles {
                if let Err(e) = h.join() {
                    panic.get_or_insert(e);
                }
            }
            if let Err(e) = mine {
                panic = Some(e);
            }
        });
        if let Some(e) = panic {
            resume_unwind(e);
        }
        return;
    };
    // start the workers still missing (only the owner of the pool does)
    while p.count.load(Ordering::Acquire) < threads - 1 {
        let slot = p.count.load(Ordering::Acquire);
        let (tx, rx) = std::sync::mpsc::channel::<Arc<Worker>>();
        let spawned = std::thread::Builder::new().name(format!("blocksur-{slot}")).spawn(move || {
            if let Ok(w) = rx.recv() {
                worker_loop(w, slot);
            }
        });
        let Ok(handle) = spawned else { break };
        let w = Arc::new(Worker { state: AtomicU8::new(IDLE), job: Mutex::new(None), thread: handle.thread().clone() });
        if p.workers[slot].set(w.clone()).is_err() || tx.send(w).is_err() {
            break;
        }
        p.count.store(slot + 1, Ordering::Release);
    }
    let n_workers = p.count.load(Ordering::Acquire).min(threads - 1);
    let workers: Vec<&Arc<Worker>> = (0..n_workers).filter_map(|i| p.workers[i].get()).collect();
    // SAFETY: the lifetime is erased only for the Job pointers; this function does not return
    // (nor unwind) before every worker has finished with `f` (the wait below).
    let fp: *const (dyn Fn(usize) + Sync + '_) = f;
    let fp: *const (dyn Fn(usize) + Sync + 'static) = unsafe { std::mem::transmute(fp) };
    let region =
        Region { f: fp, remaining: AtomicUsize::new(workers.len()), panic: Mutex::new(None), caller: std::thread::current() };
    for (i, w) in workers.iter().enumerate() {
        *w.job.lock().unwrap_or_else(|e| e.into_inner()) = Some(Job { region: &region, index: i + 1 });
        if w.state.swap(HAS_JOB, Ordering::AcqRel) == SLEEPING {
            w.thread.unpark();
        }
    }
    // shares for which no worker could be started run on the caller after its own
    let mine = catch_unwind(AssertUnwindSafe(|| {
        f(0);
        (workers.len() + 1..threads).for_each(f);
    }));
    // a worker that lost its core may take a while: spin briefly, then sleep until the last
    // one unparks this thread (a wait that yields would hand the core to any other runnable
    // thread for a time slice, and keep the caller runnable while it has nothing to do)
    let mut spins = 0u32;
    while region.remaining.load(Ordering::Acquire) != 0 {
        if spins < 1 << 12 {
            std::hint::spin_loop();
            spins += 1;
        } else {
            std::thread::park();
        }
    }
    if let Err(e) = mine {
        resume_unwind(e);
    }
    let theirs = region.panic.lock().unwrap_or_else(|p| p.into_inner()).take();
    if let Some(e) = theirs {
        resume_unwind(e);
    }
}

/// True when `tid` is a worker of the pool waiting for a job (spinning or parked): such a
/// thread gives its core to the next region at once, so it is not other load.
pub(crate) fn is_idle_worker(tid: usize) -> bool {
    let p = pool();
    let n = p.count.load(Ordering::Acquire);
    (0..n.min(MAX_WORKERS)).any(|i| {
        p.tids[i].load(Ordering::Acquire) == tid
            && p.workers[i].get().is_some_and(|w| w.state.load(Ordering::Acquire) != HAS_JOB)
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_share_runs_once_and_workers_are_reused() {
        for threads in [1, 2, 3, 8] {
            for _ in 0..50 {
                let hits: Vec<AtomicUsize> = (0..threads).map(|_| AtomicUsize::new(0)).collect();
                run(threads, &|i| {
                    hits[i].fetch_add(1, Ordering::Relaxed);
                });
                assert!(hits.iter().all(|h| h.load(Ordering::Relaxed) == 1));
            }
        }
        // after the regions above, at most 7 workers exist (8 threads at most)
        assert!(pool().count.load(Ordering::Acquire) <= 7);
    }

    #[test]
    fn a_region_after_the_workers_parked_still_runs() {
        let sum = AtomicUsize::new(0);
        run(2, &|i| {
            sum.fetch_add(i + 1, Ordering::Relaxed);
        });
        std::thread::sleep(SPIN_AFTER_JOB * 20);
        run(2, &|i| {
            sum.fetch_add(i + 1, Ordering::Relaxed);
        });
        assert_eq!(sum.load(Ordering::Relaxed), 6);
    }

    #[test]
    fn a_worker_panic_reaches_the_caller_and_the_pool_survives() {
        let out = catch_unwind(|| {
            run(2, &|i| {
                if i == 1 {
                    panic!("share 1 fails (expected in this test)");
                }
            })
        });
        let msg = out.expect_err("the panic must reach the caller");
        assert_eq!(msg.downcast_ref::<&str>().copied(), Some("share 1 fails (expected in this test)"));
        let n = AtomicUsize::new(0);
        run(2, &|_| {
            n.fetch_add(1, Ordering::Relaxed);
        });
        assert_eq!(n.load(Ordering::Relaxed), 2);
    }

    #[test]
    fn a_panic_on_the_scoped_fallback_keeps_its_payload() {
        // the pool's owner runs a region that holds the pool while another caller panics
        let release = std::sync::atomic::AtomicBool::new(false);
        std::thread::scope(|sc| {
            let holder = sc.spawn(|| {
                run(2, &|_| {
                    while !release.load(Ordering::Acquire) {
                        std::thread::yield_now();
                    }
                })
            });
            // wait until the holder owns the pool (or give up after a while: the test then
            // exercises the pool instead, with the same expectation)
            let t0 = Instant::now();
            while pool().busy.try_lock().is_ok() && t0.elapsed() < Duration::from_secs(2) {
                std::thread::yield_now();
            }
            let out = catch_unwind(|| {
                run(2, &|i| {
                    if i == 1 {
                        panic!("fallback share fails (expected in this test)");
                    }
                })
            });
            release.store(true, Ordering::Release);
            holder.join().unwrap();
            let msg = out.expect_err("the panic must reach the caller");
            assert_eq!(msg.downcast_ref::<&str>().copied(), Some("fallback share fails (expected in this test)"));
        });
    }

    #[test]
    fn concurrent_callers_all_finish() {
        let total = AtomicUsize::new(0);
        std::thread::scope(|sc| {
            for _ in 0..4 {
                sc.spawn(|| {
                    for _ in 0..200 {
                        run(2, &|_| {
                            total.fetch_add(1, Ordering::Relaxed);
                        });
                    }
                });
            }
        });
        assert_eq!(total.load(Ordering::Relaxed), 4 * 200 * 2);
    }
}
