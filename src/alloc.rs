//! A global allocator that puts large buffers on whole transparent huge pages.
//!
//! Why: a fit on a large system allocates a handful of big temporaries (the basis W, K x K and
//! N x N products, packed panels). Through the C allocator, those of up to 32 MB come from its
//! heap, whose freed pages it hands back to the kernel and which then fault in again 4 kB at a
//! time (`zeros` clears them with memset); larger ones are mapped fresh at addresses that are not
//! 2 MB aligned, so part of each stays on small pages. On 1,000 equations a two-step fit took
//! 6,000-8,900 page faults; with this allocator about 1,150 (most of them the interpreter's own)
//! plus one per 2 MB of fresh memory.
//!
//! What: allocations of `BIG` bytes or more are mapped directly, 2 MB aligned, rounded up to
//! whole 2 MB pages and advised `MADV_HUGEPAGE`: each 2 MB is then one fault, and a zeroed
//! allocation from a fresh mapping needs no memset (fresh anonymous memory reads as zero).
//! Freed mappings are kept for reuse, up to `CACHE_MAX` bytes in all (the most recently freed
//! kept, the oldest unmapped): a fit that allocates the buffers its predecessor freed gets them
//! back without any fault, as the C allocator's heap would give them back (mapping every
//! buffer afresh had made step 0 on 50 equations half again as slow, its 14 MB basis faulted
//! and zeroed by the kernel on every call). Anything larger than `CACHE_MAX` is unmapped when
//! freed. The cache is taken with `try_lock` only: a thread that finds it busy maps or unmaps
//! directly, so the allocator never waits (nor deadlocks in a child forked while the lock was
//! held). Smaller allocations go to the system allocator unchanged. Where huge pages are off
//! the mappings still work and only the advice has no effect; off Linux everything goes to the
//! system allocator.
//!
//! The Python extension registers it (`lib.rs`, with the `python` feature), and so do the
//! crate's own tests; a Rust program that links the core keeps its own allocator unless it
//! registers this one.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::Mutex;

/// Allocations of this many bytes or more get their own huge-page mapping.
pub const BIG: usize = 2 << 20;
const HUGE: usize = 2 << 20;
/// Bytes of freed mappings kept for reuse (about what the C allocator keeps at the top of its
/// heap before it trims).
pub const CACHE_MAX: usize = 32 << 20;
const SLOTS: usize = 32;

/// Freed mappings: (address, length, age stamp); length 0 marks a free slot.
struct Cache {
    slots: [(usize, usize, u64); SLOTS],
    total: usize,
    clock: u64,
}

static CACHE: Mutex<Cache> = Mutex::new(Cache { slots: [(0, 0, 0); SLOTS], total: 0, clock: 0 });

/// A cached mapping of at least `len` bytes (the best fit; the spare 2 MB pages beyond `len`
/// unmapped), or None.
fn take_cached(len: usize) -> Option<*mut u8> {
    let mut c = CACHE.try_lock().ok()?;
    let mut best: Option<usize> = None;
    for (i, s) in c.slots.iter().enumerate() {
        if s.1 >= len && best.is_none_or(|b| s.1 < c.slots[b].1) {
            best = Some(i);
        }
    }
    let i = best?;
    let (addr, have, _) = c.slots[i];
    c.slots[i] = (0, 0, 0);
    c.total -= have;
    drop(c);
    if have > len {
        // SAFETY: [addr + len, addr + have) is the unused tail of a mapping we own.
        unsafe { unmap_range(addr + len, have - len) };
    }
    Some(addr as *mut u8)
}

/// Keeps a freed mapping for reuse if it fits the cache (evicting the oldest ones); false when
/// the caller must unmap it.
fn keep_cached(addr: usize, len: usize) -> bool {
    if len > CACHE_MAX {
        return false;
    }
    let Ok(mut c) = CACHE.try_lock() else { return false };
    let mut evicted = [(0usize, 0usize); SLOTS];
    let mut n_ev = 0;
    while c.total + len > CACHE_MAX || c.slots.iter().all(|s| s.1 != 0) {
        let oldest = (0..SLOTS).filter(|&i| c.slots[i].1 != 0).min_by_key(|&i| c.slots[i].2);
        let Some(o) = oldest else { break };
        let (a, l, _) = c.slots[o];
        c.slots[o] = (0, 0, 0);
        c.total -= l;
        evicted[n_ev] = (a, l);
        n_ev += 1;
    }
    c.clock += 1;
    let stamp = c.clock;
    let free = c.slots.iter().position(|s| s.1 == 0).expect("a slot was freed above");
    c.slots[free] = (addr, len, stamp);
    c.total += len;
    drop(c);
    for &(a, l) in &evicted[..n_ev] {
        // SAFETY: an evicted mapping is no longer reachable from the cache.
        unsafe { unmap_range(a, l) };
    }
    true
}

/// See the module documentation.
pub struct BigPageAlloc;

#[cfg(target_os = "linux")]
mod sys {
    use std::ffi::c_void;
    use std::os::raw::{c_int, c_long};
    extern "C" {
        pub fn mmap(addr: *mut c_void, len: usize, prot: c_int, flags: c_int, fd: c_int, off: c_long) -> *mut c_void;
        pub fn munmap(addr: *mut c_void, len: usize) -> c_int;
        pub fn madvise(addr: *mut c_void, len: usize, advice: c_int) -> c_int;
    }
    pub const PROT_READ: c_int = 1;
    pub const PROT_WRITE: c_int = 2;
    pub const MAP_PRIVATE: c_int = 2;
    pub const MAP_ANONYMOUS: c_int = 0x20;
    pub const MADV_HUGEPAGE: c_int = 14;
    pub const MAP_FAILED: *mut c_void = !0usize as *mut c_void;
}

/// Whether an allocation of this layout is mapped by us (and must be unmapped by us).
#[inline]
fn is_big(layout: &Layout) -> bool {
    cfg!(target_os = "linux") && layout.size() >= BIG && layout.align() <= HUGE
}

/// Length of the mapping that serves `size` bytes.
#[inline]
fn mapped_len(size: usize) -> usize {
    size.div_ceil(HUGE) * HUGE
}

#[cfg(target_os = "linux")]
unsafe fn map_big(size: usize) -> *mut u8 {
    use std::ffi::c_void;
    let len = mapped_len(size);
    let Some(total) = len.checked_add(HUGE) else { return std::ptr::null_mut() };
    let p = sys::mmap(
        std::ptr::null_mut(),
        total,
        sys::PROT_READ | sys::PROT_WRITE,
        sys::MAP_PRIVATE | sys::MAP_ANONYMOUS,
        -1,
        0,
    );
    if p == sys::MAP_FAILED || p.is_null() {
        return std::ptr::null_mut();
    }
    let start = p as usize;
    let aligned = start.next_multiple_of(HUGE);
    // trim the unaligned head and the spare tail: [aligned, aligned + len) stays mapped
    if aligned > start {
        sys::munmap(p, aligned - start);
    }
    let tail = start + total - (aligned + len);
    if tail > 0 {
        sys::munmap((aligned + len) as *mut c_void, tail);
    }
    // advice only: where huge pages are off this fails and nothing else changes
    sys::madvise(aligned as *mut c_void, len, sys::MADV_HUGEPAGE);
    aligned as *mut u8
}

#[cfg(not(target_os = "linux"))]
unsafe fn map_big(_size: usize) -> *mut u8 {
    unreachable!("is_big is false off Linux")
}

#[cfg(target_os = "linux")]
unsafe fn unmap_range(addr: usize, len: usize) {
    sys::munmap(addr as *mut std::ffi::c_void, len);
}

#[cfg(not(target_os = "linux"))]
unsafe fn unmap_range(_addr: usize, _len: usize) {
    unreachable!("is_big is false off Linux")
}

/// A mapping for `size` bytes: a cached one (`dirty` true) or a fresh one.
unsafe fn get_big(size: usize) -> (*mut u8, bool) {
    match take_cached(mapped_len(size)) {
        Some(p) => (p, true),
        None => (map_big(size), false),
    }
}

unsafe fn put_big(ptr: *mut u8, size: usize) {
    let len = mapped_len(size);
    if !keep_cached(ptr as usize, len) {
        unmap_range(ptr as usize, len);
    }
}

// SAFETY: every pointer handed out is either the system allocator's (small layouts, returned to
// it) or the start of a private mapping of at least `layout.size()` bytes aligned to 2 MB (and so
// to any alignment up to 2 MB) that no live allocation uses: fresh, or taken out of the cache
// (under its lock) when its previous allocation had been freed. A freed mapping goes either into
// the cache or back to the kernel, never both. `is_big` depends only on the layout, which Rust
// passes back unchanged to `dealloc` and `realloc`.
unsafe impl GlobalAlloc for BigPageAlloc {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        if is_big(&layout) {
            get_big(layout.size()).0
        } else {
            System.alloc(layout)
        }
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        if is_big(&layout) {
            let (p, dirty) = get_big(layout.size());
            if dirty {
                std::ptr::write_bytes(p, 0, layout.size());
            } // fresh anonymous memory is zero
            p
        } else {
            System.alloc_zeroed(layout)
        }
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        if is_big(&layout) {
            put_big(ptr, layout.size())
        } else {
            System.dealloc(ptr, layout)
        }
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        let new_layout = Layout::from_size_align_unchecked(new_size, layout.align());
        match (is_big(&layout), is_big(&new_layout)) {
            (false, false) => System.realloc(ptr, layout, new_size),
            (true, true) if mapped_len(new_size) == mapped_len(layout.size()) => ptr,
            _ => {
                let new = self.alloc(new_layout);
                if !new.is_null() {
                    std::ptr::copy_nonoverlapping(ptr, new, layout.size().min(new_size));
                    self.dealloc(ptr, layout);
                }
                new
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn big_buffers_are_aligned_zeroed_and_survive_growth() {
        // Common practice, no outside source: what any allocator must do, checked on sizes
        // either side of the threshold and across it by realloc.
        for &n in &[BIG / 8 - 1, BIG / 8, BIG / 8 + 1, 3 * BIG / 8 + 5] {
            let v = vec![0.0f64; n];
            assert!(v.iter().all(|&x| x == 0.0));
            if n * 8 >= BIG && cfg!(target_os = "linux") {
                assert_eq!(v.as_ptr() as usize % HUGE, 0, "{n} values not on a 2 MB boundary");
            }
        }
        let mut v: Vec<u64> = (0..1000).collect();
        for round in 0..4 {
            v.extend((0..(BIG / 8)).map(|i| i as u64 + round));
            assert_eq!(v[999], 999);
            assert_eq!(v[1000], 0);
        }
        v.truncate(10);
        v.shrink_to_fit();
        assert_eq!(v, (0..10).collect::<Vec<u64>>());
        // a zeroed buffer that may be a freed dirty one from the cache reads as zero
        for round in 0..3 {
            let mut d = vec![0u8; 3 * BIG + round];
            d.iter_mut().for_each(|b| *b = 0xa5);
            drop(d);
            let z = vec![0u8; 3 * BIG + round];
            assert!(z.iter().all(|&b| b == 0), "round {round}");
            let z2 = vec![0.0f64; (2 * BIG + 8 * round) / 8];
            assert!(z2.iter().all(|&b| b == 0.0), "round {round}");
        }
        let mut w = vec![1u8; BIG + 1];
        w[BIG] = 7;
        let w2 = w.clone();
        drop(w);
        assert_eq!(w2[BIG], 7);
        assert_eq!(w2.iter().map(|&b| b as usize).sum::<usize>(), BIG + 7);
    }
}
