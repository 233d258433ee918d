//! The Gram matrix W'W of a tall column-major matrix by a packed, register-blocked kernel
//! (AVX-512, or AVX2 + FMA), run on this module's own threads.
//!
//! Why not BLAS syrk: the system OpenBLAS (0.3.21 on the target machine) runs syrk for the
//! shapes of the data pass (P of a few hundred, T in the thousands) at about the speed of one
//! thread even with a pool of two, and its idle workers spin for a tenth of a second after a
//! call, competing with the threads of the next step. Here each block of KC rows of W is packed
//! once into panels of `width` columns (row-interleaved), shared by all threads as both
//! operands; the threads then claim units of the lower triangle (one row panel against up to
//! NC columns) and add `width` x `width`/2 tiles, kept in registers over the block's rows,
//! into the product. Each entry is summed block by block in a fixed order, whichever thread
//! adds a block: the result does not depend on the number of threads.
//!
//! The threads never wait for one another as such, only for work another thread has claimed
//! and not finished (counters of finished panels and units, no barrier): a helper that starts
//! late, or loses its core to another process's thread, leaves its share to the threads that
//! are running instead of holding them at every block.

use ndarray::Array2;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};

use crate::error::{Result, SurError};

/// Rows of W per block, at most: a tile is then 256 steps of the kernel.
const KC: usize = 128;

/// Columns of the product per unit of work (their packed panels, NC x KC, fit in L2).
const NC: usize = 256;

/// Rows per block for `p` packed columns: KC, or fewer so that the two packed buffers stay
/// under 24 MB (the data pass of very wide systems is held to a memory budget).
fn block_rows(p: usize) -> usize {
    ((24 << 20) / (16 * p.max(1))).clamp(64, KC) / 16 * 16
}

/// The two kernels: an AVX-512 one (16 x 8 tiles from 16-wide panels) and an AVX2 + FMA one
/// (8 x 4 tiles from 8-wide panels). In both, a tile's columns are half of one panel, so a
/// single packed copy of each row block serves as both operands of the product.
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
pub(crate) enum Kernel {
    Avx512,
    Avx2,
}

impl Kernel {
    /// The best kernel this CPU runs, or None (then BLAS syrk serves).
    pub(crate) fn best() -> Option<Kernel> {
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx512f") {
                return Some(Kernel::Avx512);
            }
            if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
                return Some(Kernel::Avx2);
            }
        }
        None
    }

    /// Panel width: rows of a tile; a tile has half as many columns.
    fn width(self) -> usize {
        match self {
            Kernel::Avx512 => 16,
            Kernel::Avx2 => 8,
        }
    }

    /// Adds the tile sum over k < kc of a[k width + ii] b[k width + jj] (ii < width, jj <
    /// width / 2) into C at `c` (column-major, leading dimension `ldc`), rows ii < `rows` and
    /// columns jj < `cols` of the tile only; when `e` is not null, by two-sum with the
    /// rounding error added at `e` (same layout).
    ///
    /// # Safety
    /// The CPU has the kernel's features; `a` and `b` point to kc rows of `width` values (b may
    /// point into the middle of a row: only its first width / 2 values are read); `c` plus the
    /// tile's rows and columns lies inside C (and inside the error array when `e` is not
    /// null), and no other thread writes there meanwhile.
    #[allow(clippy::too_many_arguments)]
    unsafe fn run(self, kc: usize, a: *const f64, b: *const f64, c: *mut f64, e: *mut f64, ldc: usize, rows: usize, cols: usize) {
        #[cfg(target_arch = "x86_64")]
        // SAFETY: passed on from the caller.
        unsafe {
            match self {
                Kernel::Avx512 => kernel_16x8(kc, a, b, c, e, ldc, rows, cols),
                Kernel::Avx2 => kernel_8x4(kc, a, b, c, e, ldc, rows, cols),
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        unreachable!("no kernel off x86_64: {kc} {a:?} {b:?} {c:?} {e:?} {ldc} {rows} {cols}")
    }
}

/// The product written by the threads: raw because they write disjoint rows of it.
struct Out {
    ptr: *mut f64,
    /// The rounding errors of the additions into `ptr` (same layout), or null: over many row
    /// blocks the block sums are added with Knuth's two-sum and their errors kept here, so a
    /// long product (T = 10^7: 39,000 blocks) is as accurate as one block's sum.
    err: *mut f64,
    p: usize,
}
// SAFETY: within a block each row tile is claimed by one thread, no unit of a block starts
// before every unit of the one before has finished (`Job::lower_rows`), and the array outlives
// the scoped threads.
unsafe impl Sync for Out {}

/// The two packed copies of row blocks (double-buffered: while one block is multiplied, the
/// next may be packed), each panel written by the thread that claimed it.
struct Panels {
    ptr: [*mut f64; 2],
}
// SAFETY: each thread writes only the panels it claimed of the buffer being packed, and a
// buffer is not packed again before every unit that reads it has finished (see `lower_rows`).
unsafe impl Sync for Panels {}

/// W'W for the column-major T x P matrix in `w` (leading dimension T), full and symmetric,
/// by `kernel` (one this CPU runs: `Kernel::best`) on up to `threads` threads (the calling one
/// included; only it asks `cancel`, once per block of KC rows).
pub(crate) fn gram_packed(
    kernel: Kernel,
    w: &[f64],
    t: usize,
    p: usize,
    threads: usize,
    cancel: &(dyn Fn() -> bool + Sync),
) -> Result<Array2<f64>> {
    assert_eq!(w.len(), t * p, "gram_packed: W is not T x P");
    let mut g = crate::linalg::zeros_for_product(p);
    if t == 0 || p == 0 {
        return Ok(g);
    }
    let pw = kernel.width();
    let groups = p.div_ceil(pw);
    let parts = threads.clamp(1, groups);
    let kc_max = block_rows(groups * pw);
    // 64-byte aligned (a half panel row of the AVX-512 kernel is then one cache line)
    let len = groups * pw * kc_max;
    let mut bufs = [vec![0.0f64; len + 8], vec![0.0f64; len + 8]];
    let aligned = |b: &mut Vec<f64>| {
        let off = b.as_ptr().align_offset(64);
        // SAFETY: off < 8 (f64 alignment is 8), within the 8 spare values.
        unsafe { b.as_mut_ptr().add(off) }
    };
    let panels = Panels { ptr: [aligned(&mut bufs[0]), aligned(&mut bufs[1])] };
    // compensated additions over many blocks (with few, the plain sum errs by a few units in
    // the last place of the largest block sum at most)
    let mut err = if t > 64 * kc_max { crate::linalg::zeros_for_product(p) } else { Array2::zeros((0, 0)) };
    let out = Out { ptr: g.as_mut_ptr(), err: if err.is_empty() { std::ptr::null_mut() } else { err.as_mut_ptr() }, p };
    let stop = AtomicBool::new(false);
    let progress = Progress::default();
    // Column blocks in turn; within one, the row panels from the bottom (the longest) up.
    let mut units = Vec::new();
    for jc in (0..p).step_by(NC) {
        for gi in (jc / pw..groups).rev() {
            units.push((gi, jc));
        }
    }
    let job = Job { kernel, w, t, p, kc_max, groups, units, progress: &progress, panels: &panels, out: &out, stop: &stop };
    // the caller (share 0) is the one that asks `cancel`
    crate::pool::run(parts, &|i| if i == 0 { job.lower_rows(true, cancel) } else { job.lower_rows(false, &|| false) });
    drop(bufs);
    if stop.load(Ordering::Relaxed) {
        return Err(SurError::Interrupted);
    }
    if !err.is_empty() {
        g += &err;
    }
    drop(err);
    // The tiles on the diagonal also wrote some entries above it; mirror the lower triangle.
    crate::linalg::mirror(&mut g, true);
    Ok(g)
}

struct Job<'a> {
    kernel: Kernel,
    w: &'a [f64],
    t: usize,
    p: usize,
    kc_max: usize,
    groups: usize,
    /// (row panel, first column) of each unit of product work, in claiming order.
    units: Vec<(usize, usize)>,
    progress: &'a Progress,
    panels: &'a Panels,
    out: &'a Out,
    stop: &'a AtomicBool,
}

/// Work claimed and finished, counted over all blocks: block b's panels are numbers
/// b * groups .. (b + 1) * groups of the packing counters, its units b * units .. (b + 1) *
/// units of the product counters. Blocks are packed, and multiplied, in order (see
/// `Job::lower_rows`), so "block b is packed" is `packed >= (b + 1) * groups`.
#[derive(Default)]
struct Progress {
    pack_claimed: Line,
    packed: Line,
    unit_claimed: Line,
    multiplied: Line,
}

/// A counter on a cache line (pair) of its own: the claim counters take every thread's
/// compare-and-swaps while the waits read the finished counters.
#[derive(Default)]
#[repr(align(128))]
struct Line(AtomicUsize);

impl Job<'_> {
    /// One thread's part: for each block of KC rows of W, pack panels, then add row tiles
    /// into the product. Panels and row tiles are claimed one at a time (largest rows first),
    /// so a thread delayed by other load does less of the work. Each entry of the product is
    /// still summed block by block in a fixed order, whichever thread adds a block's tile: the
    /// result does not depend on the threads.
    ///
    /// Order, for block b (buffer b % 2): packing starts once every unit of block b - 2 (the
    /// last reader of that buffer) has finished; multiplying starts once all of block b is
    /// packed and every unit of block b - 1 has finished, so the tiles of one entry are added
    /// block after block and never by two threads at once. A thread waits only for work that
    /// another has claimed (which that thread finishes without waiting), so nothing waits for
    /// a thread that has not started: one that starts late finds the blocks before it done
    /// and joins at the current one.
    fn lower_rows(&self, is_caller: bool, cancel: &dyn Fn() -> bool) {
        let (t, p, pw) = (self.t, self.p, self.kernel.width());
        let half = pw / 2;
        let (groups, n_units) = (self.groups, self.units.len());
        let pr = self.progress;
        // a panic in this thread stops the others (they would wait for its claimed work)
        let _guard = StopOnPanic(self.stop);
        let mut t0 = 0;
        let mut block = 0;
        while t0 < t {
            let kc = self.kc_max.min(t - t0);
            let buf = self.panels.ptr[block % 2];
            if block >= 2 && !wait_for(&pr.multiplied.0, (block - 1) * n_units, self.stop) {
                return;
            }
            while let Some(g) = claim(&pr.pack_claimed.0, block, groups) {
                // SAFETY: panel g of this buffer is this thread's to write (claimed once); no
                // unit reads the buffer until the whole block is packed, and the units of block
                // b - 2 that read it before have finished (waited for above).
                let dst = unsafe { std::slice::from_raw_parts_mut(buf.add(g * pw * kc), pw * kc) };
                match pw {
                    16 => pack::<16>(self.w, t, t0, kc, g * 16, p, dst),
                    _ => pack::<8>(self.w, t, t0, kc, g * 8, p, dst),
                }
                pr.packed.0.fetch_add(1, Ordering::AcqRel);
            }
            if is_caller && cancel() {
                self.stop.store(true, Ordering::Release);
            }
            if !wait_for(&pr.packed.0, (block + 1) * groups, self.stop)
                || !wait_for(&pr.multiplied.0, block * n_units, self.stop)
            {
                return;
            }
            // Units: the row tiles of one panel (pw rows) against one block of NC columns,
            // column blocks in turn (their panels stay in L2 while the row panels stream).
            while let Some(u) = claim(&pr.unit_claimed.0, block, n_units) {
                let (gi, jc) = self.units[u];
                let i0 = gi * pw;
                let i_end = (i0 + pw).min(p);
                // SAFETY: the buffer was fully packed (waited for above) and is not written
                // until every unit of this block has finished.
                let a = unsafe { buf.add(gi * pw * kc) as *const f64 };
                for j0 in (jc..i_end.min(jc + NC)).step_by(half) {
                    let b = unsafe { buf.add((j0 / pw) * pw * kc + j0 % pw) as *const f64 };
                    let j_end = (j0 + half).min(p);
                    // SAFETY: the CPU has the kernel's features (Kernel::best); a and b hold kc
                    // rows of pw values; rows i0..i_end and columns j0..j_end (claimed by this
                    // thread for this block, the previous block's finished) lie inside the P x P product.
                    unsafe {
                        let at = i0 + j0 * self.out.p;
                        let c = self.out.ptr.add(at);
                        let e = if self.out.err.is_null() { self.out.err } else { self.out.err.add(at) };
                        self.kernel.run(kc, a, b, c, e, self.out.p, i_end - i0, j_end - j0);
                    }
                }
                pr.multiplied.0.fetch_add(1, Ordering::AcqRel);
            }
            t0 += kc;
            block += 1;
        }
    }
}

/// Waits until `counter` reaches `target`: by spinning, then by yielding the core (the work
/// waited for is one panel or one unit, well under a millisecond, unless its thread lost its
/// core). False when the product was stopped (cancelled, or a thread panicked).
fn wait_for(counter: &AtomicUsize, target: usize, stop: &AtomicBool) -> bool {
    let mut spins = 0u32;
    loop {
        if counter.load(Ordering::Acquire) >= target {
            return true;
        }
        if stop.load(Ordering::Acquire) {
            return false;
        }
        if spins < SPIN_LIMIT {
            std::hint::spin_loop();
            spins += 1;
        } else {
            // another thread may hold the core the work waited for needs
            std::thread::yield_now();
        }
    }
}

/// Spins before a wait yields the core (about 0.1-0.3 ms).
const SPIN_LIMIT: u32 = 1 << 14;

/// Stops the product when its thread unwinds from a panic: the others would otherwise wait
/// for ever for the work it had claimed (the panic then reaches the caller through the scope).
struct StopOnPanic<'a>(&'a AtomicBool);

impl Drop for StopOnPanic<'_> {
    fn drop(&mut self) {
        if std::thread::panicking() {
            self.0.store(true, Ordering::Release);
        }
    }
}

/// Claims the next of `units` units of work of block `block` from `counter`, which counts
/// the units claimed over all blocks (block b's are b * units .. (b + 1) * units): None when
/// the block has none left (also when the counter is past the block: a thread that started
/// late passes over the blocks the others have done). A counter behind the block is brought up.
fn claim(counter: &AtomicUsize, block: usize, units: usize) -> Option<usize> {
    let (start, end) = (block * units, (block + 1) * units);
    let mut v = counter.load(Ordering::Relaxed);
    loop {
        let cur = v.max(start);
        if cur >= end {
            return None;
        }
        match counter.compare_exchange_weak(v, cur + 1, Ordering::Relaxed, Ordering::Relaxed) {
            Ok(_) => return Some(cur - start),
            Err(now) => v = now,
        }
    }
}

static ZEROS: [f64; KC] = [0.0; KC];

/// Rows t0..t0+kc of the columns c0..c0+WIDTH of W (those at or past `end` as zeros) into
/// `dst`, row-interleaved: dst[tt WIDTH + j] = W[t0 + tt, c0 + j]. Writes are sequential.
fn pack<const WIDTH: usize>(w: &[f64], t: usize, t0: usize, kc: usize, c0: usize, end: usize, dst: &mut [f64]) {
    let cols: [&[f64]; WIDTH] =
        std::array::from_fn(|j| if c0 + j < end { &w[(c0 + j) * t + t0..(c0 + j) * t + t0 + kc] } else { &ZEROS[..kc] });
    for (tt, d) in dst[..kc * WIDTH].chunks_exact_mut(WIDTH).enumerate() {
        for (dj, col) in d.iter_mut().zip(&cols) {
            // SAFETY: tt < kc and every column slice has length kc.
            *dj = unsafe { *col.get_unchecked(tt) };
        }
    }
}

/// Adds the accumulated tile (column-major, `width` rows) into C: whole columns by vector
/// loads and stores when the tile is full, element by element otherwise.
#[inline(always)]
unsafe fn add_tile(tile: &[f64], width: usize, c: *mut f64, e: *mut f64, ldc: usize, rows: usize, cols: usize) {
    for jj in 0..cols {
        for ii in 0..rows {
            let x = tile[jj * width + ii];
            // SAFETY: (ii, jj) is inside the tile's part of C and of the error array (the
            // caller's contract).
            unsafe {
                let at = ii + jj * ldc;
                if e.is_null() {
                    *c.add(at) += x;
                } else {
                    let (s, r) = two_sum(*c.add(at), x);
                    *c.add(at) = s;
                    *e.add(at) += r;
                }
            }
        }
    }
}

/// a + b = s + r exactly (Knuth's two-sum, no condition on the magnitudes).
#[inline(always)]
fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let bb = s - a;
    (s, (a - (s - bb)) + (b - bb))
}

/// One tile kernel per instruction set, from one template: `$w` rows (two vectors of `$l`
/// lanes) by `$w / 2` columns, one fused multiply-add per term; the tile is added into C by
/// whole vectors when it is full, element by element (through `add_tile`) at the edges.
macro_rules! tile_kernel {
    ($(#[$doc:meta])* $name:ident, $feature:literal, $w:literal, $l:literal,
     $zero:ident, $load:ident, $store:ident, $splat:expr, $fma:ident, $add:ident, $sub:ident) => {
        $(#[$doc])*
        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = $feature)]
        #[allow(clippy::too_many_arguments)]
        unsafe fn $name(kc: usize, a: *const f64, b: *const f64, c: *mut f64, e: *mut f64, ldc: usize, rows: usize, cols: usize) {
            use std::arch::x86_64::*;
            // SAFETY (whole body): the caller's contract of `Kernel::run`.
            unsafe {
                for jj in 0..cols {
                    _mm_prefetch::<_MM_HINT_T0>(c.add(jj * ldc) as *const i8);
                    _mm_prefetch::<_MM_HINT_T0>(c.add(jj * ldc + $w - 1) as *const i8);
                }
                let mut acc = [[$zero(); 2]; $w / 2];
                for k in 0..kc {
                    let a0 = $load(a.add(k * $w));
                    let a1 = $load(a.add(k * $w + $l));
                    let bk = b.add(k * $w);
                    for (jj, cj) in acc.iter_mut().enumerate() {
                        let bj = $splat(bk.add(jj));
                        cj[0] = $fma(a0, bj, cj[0]);
                        cj[1] = $fma(a1, bj, cj[1]);
                    }
                }
                if rows == $w && cols == $w / 2 && e.is_null() {
                    for (jj, cj) in acc.iter().enumerate() {
                        let col = c.add(jj * ldc);
                        $store(col, $add($load(col), cj[0]));
                        $store(col.add($l), $add($load(col.add($l)), cj[1]));
                    }
                } else if rows == $w && cols == $w / 2 {
                    // two-sum, the error into e
                    for (jj, cj) in acc.iter().enumerate() {
                        for (h, x) in cj.iter().enumerate() {
                            let col = c.add(jj * ldc + h * $l);
                            let ecol = e.add(jj * ldc + h * $l);
                            let old = $load(col);
                            let s = $add(old, *x);
                            let bb = $sub(s, old);
                            let r = $add($sub(old, $sub(s, bb)), $sub(*x, bb));
                            $store(col, s);
                            $store(ecol, $add($load(ecol), r));
                        }
                    }
                } else {
                    let mut tile = [0.0f64; 128];
                    for (jj, cj) in acc.iter().enumerate() {
                        $store(tile.as_mut_ptr().add(jj * $w), cj[0]);
                        $store(tile.as_mut_ptr().add(jj * $w + $l), cj[1]);
                    }
                    add_tile(&tile, $w, c, e, ldc, rows, cols);
                }
            }
        }
    };
}

tile_kernel!(
    /// The AVX-512 tile: 16 x 8 in sixteen 8-wide accumulators.
    kernel_16x8, "avx512f", 16, 8, _mm512_setzero_pd, _mm512_loadu_pd, _mm512_storeu_pd,
    |p: *const f64| _mm512_set1_pd(*p), _mm512_fmadd_pd, _mm512_add_pd, _mm512_sub_pd
);
tile_kernel!(
    /// The AVX2 tile: 8 x 4 in eight 4-wide accumulators.
    kernel_8x4, "avx2,fma", 8, 4, _mm256_setzero_pd, _mm256_loadu_pd, _mm256_storeu_pd,
    |p: *const f64| _mm256_broadcast_sd(&*p), _mm256_fmadd_pd, _mm256_add_pd, _mm256_sub_pd
);

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;
    use ndarray::ShapeBuilder;

    fn data(t: usize, p: usize) -> Vec<f64> {
        let mut seed = 7u64;
        (0..t * p)
            .map(|_| {
                seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
                (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.3
            })
            .collect()
    }

    /// The packed kernel against plain sums of products (the definition of W'W), on shapes
    /// that leave partial tiles and row blocks, for 1-3 threads; the result must not depend on
    /// the thread count at all (each entry is summed by one thread in a fixed order).
    #[test]
    fn packed_gram_matches_the_definition_and_ignores_the_thread_count() {
        let Some(kernel) = Kernel::best() else {
            return; // the BLAS path serves such CPUs; nothing of this kernel runs there
        };
        for &(t, p) in &[(1, 1), (3, 2), (255, 7), (257, 13), (600, 50), (1000, 97), (513, 131), (20000, 37)] {
            let w = data(t, p);
            let one = gram_packed(kernel, &w, t, p, 1, &|| false).unwrap();
            #[cfg(target_arch = "x86_64")]
            if kernel == Kernel::Avx512 {
                // the AVX2 kernel too, where the CPU runs both: the same sums in the same order
                assert!(gram_packed(Kernel::Avx2, &w, t, p, 2, &|| false).unwrap() == one, "t={t} p={p}: AVX2 differs");
            }
            for i in 0..p {
                for j in 0..p {
                    let exact: f64 = (0..t).map(|r| w[i * t + r] * w[j * t + r]).sum();
                    assert_relative_eq!(one[[i, j]], exact, epsilon = 1e-12 * t as f64, max_relative = 1e-12);
                    assert_eq!(one[[i, j]], one[[j, i]], "symmetric at {i},{j}");
                }
            }
            // the BLAS path (wide products, CPUs without AVX2), with its blocked mirror
            let wv = ndarray::ArrayView2::from_shape((t, p).f(), &w).unwrap();
            let blas = crate::linalg::gram_syrk(wv, &|| false).unwrap();
            for (a, b) in blas.iter().zip(one.iter()) {
                assert_relative_eq!(*a, *b, epsilon = 1e-12 * t as f64, max_relative = 1e-12);
            }
            // more threads than this machine's cores too: some then start late or lose their
            // core mid-product, and the others take their share
            for threads in [2, 3, 8] {
                let many = gram_packed(kernel, &w, t, p, threads, &|| false).unwrap();
                assert!(many == one, "t={t} p={p}: {threads} threads differ from one");
            }
        }
    }

    /// Long products (many row blocks) add the block sums by two-sum: against a doubled-
    /// precision reference (Ogita-Rump-Oishi Dot2, written out here), the error stays at the
    /// level of one block's rounding, and the result still does not depend on the threads.
    #[test]
    fn long_packed_gram_is_compensated() {
        let Some(kernel) = Kernel::best() else {
            return;
        };
        let (t, p) = (200_000, 5);
        let mut w = data(t, p);
        for v in w.iter_mut() {
            *v = 1.0 + 1e-3 * *v; // all of one sign: the running sums only grow
        }
        let g = gram_packed(kernel, &w, t, p, 1, &|| false).unwrap();
        assert!(gram_packed(kernel, &w, t, p, 2, &|| false).unwrap() == g);
        for i in 0..p {
            for j in 0..=i {
                let (mut s, mut c) = (0.0f64, 0.0f64);
                for r in 0..t {
                    let (a, b) = (w[i * t + r], w[j * t + r]);
                    let h = a * b;
                    let l = a.mul_add(b, -h);
                    let (s2, e) = two_sum(s, h);
                    s = s2;
                    c += e + l;
                }
                let exact = s + c;
                assert!(((g[[i, j]] - exact) / exact).abs() <= 4.0 * f64::EPSILON, "entry {i},{j}: {} vs {exact}", g[[i, j]]);
            }
        }
    }

    #[test]
    fn packed_gram_stops_when_asked() {
        let Some(kernel) = Kernel::best() else {
            return;
        };
        let (t, p) = (2000, 40);
        let w = data(t, p);
        assert!(matches!(gram_packed(kernel, &w, t, p, 2, &|| true), Err(SurError::Interrupted)));
    }

    /// A thread that panics with work claimed must not leave the others waiting for it for
    /// ever: its guard stops the product and the waits return.
    #[test]
    fn a_panicking_thread_stops_the_waits() {
        let stop = AtomicBool::new(false);
        let finished = AtomicUsize::new(0);
        let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            std::thread::scope(|sc| {
                sc.spawn(|| {
                    let _guard = StopOnPanic(&stop);
                    panic!("a worker fails with a unit claimed (expected in this test)");
                });
                // the unit the worker claimed never finishes
                assert!(!wait_for(&finished, 1, &stop));
            })
        }));
        assert!(out.is_err());
        assert!(stop.load(Ordering::Relaxed));
        // and a wait for finished work returns at once
        finished.store(3, Ordering::Release);
        assert!(wait_for(&finished, 3, &AtomicBool::new(false)));
    }
}
