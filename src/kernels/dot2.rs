//! Residuals y - X b in doubled working precision (Ogita, Rump and Oishi's Dot2: error-free
//! products and sums, the errors summed alongside), so the cancellation between y and the fitted
//! values costs no digits: the one-step refinement of step 0 rests on it (NIST's Longley data
//! keep their certified digits through it). Kept for accuracy, not speed.
//!
//! Two variants of the error-free product: a fused multiply-add where the CPU has one
//! (x86-64 with FMA, every aarch64), Dekker's splitting everywhere else. They give the same
//! result up to the final rounding; `residual_dot2_with` forces either (tests run both).

use ndarray::{s, ArrayView1, ArrayView2};

/// How the exact product a b = p + e is formed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Product {
    /// e = fma(a, b, -p): needs a hardware fused multiply-add.
    Fma,
    /// Veltkamp splitting (Dekker): portable.
    Dekker,
}

impl Product {
    /// The variant this CPU runs best.
    pub(crate) fn best() -> Product {
        if Self::fma_available() {
            Product::Fma
        } else {
            Product::Dekker
        }
    }

    /// Whether the CPU has a hardware fused multiply-add.
    pub(crate) fn fma_available() -> bool {
        #[cfg(target_arch = "x86_64")]
        {
            std::is_x86_feature_detected!("fma")
        }
        #[cfg(target_arch = "aarch64")]
        {
            true
        }
        #[cfg(not(any(target_arch = "x86_64", target_arch = "aarch64")))]
        {
            false
        }
    }

    /// The variants this CPU runs.
    #[cfg(test)]
    pub(crate) fn available() -> Vec<Product> {
        let mut v = vec![Product::Dekker];
        if Self::fma_available() {
            v.push(Product::Fma);
        }
        v
    }
}

/// e = y - X b, each element in doubled working precision.
pub(crate) fn residual_dot2(x: ArrayView2<f64>, y: ArrayView1<f64>, b: &[f64], e: &mut [f64]) {
    residual_dot2_with(Product::best(), x, y, b, e)
}

/// `residual_dot2` with the given variant of the exact product. Panics when `Fma` is asked of
/// a CPU without it.
pub(crate) fn residual_dot2_with(
    v: Product,
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    b: &[f64],
    e: &mut [f64],
) {
    match v {
        Product::Dekker => residual_blocks(x, y, b, e, two_prod_dekker),
        Product::Fma => {
            assert!(
                Product::fma_available(),
                "this CPU has no fused multiply-add"
            );
            #[cfg(target_arch = "x86_64")]
            // SAFETY: the CPU has FMA (asserted above).
            unsafe {
                residual_fma(x, y, b, e)
            }
            #[cfg(not(target_arch = "x86_64"))]
            residual_blocks(x, y, b, e, two_prod_fma)
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "fma")]
unsafe fn residual_fma(x: ArrayView2<f64>, y: ArrayView1<f64>, b: &[f64], e: &mut [f64]) {
    residual_blocks(x, y, b, e, two_prod_fma)
}

#[inline(always)]
fn two_prod_fma(a: f64, b: f64) -> (f64, f64) {
    let p = a * b;
    (p, a.mul_add(b, -p))
}

/// a b = p + err exactly, by Veltkamp splitting (no FMA needed).
#[inline(always)]
fn two_prod_dekker(a: f64, b: f64) -> (f64, f64) {
    const SPLIT: f64 = 134217729.0; // 2^27 + 1
    let p = a * b;
    let split = |v: f64| {
        let c = SPLIT * v;
        let hi = c - (c - v);
        (hi, v - hi)
    };
    let ((ah, al), (bh, bl)) = (split(a), split(b));
    (p, ((ah * bh - p) + ah * bl + al * bh) + al * bl)
}

/// Rows per block: within a block every row's sum is independent of the others, so the
/// column-by-column updates vectorise.
const B: usize = 256;

#[inline(always)]
fn residual_blocks(
    x: ArrayView2<f64>,
    y: ArrayView1<f64>,
    b: &[f64],
    e: &mut [f64],
    two_prod: impl Fn(f64, f64) -> (f64, f64),
) {
    let k = b.len();
    let t = e.len();
    if k == 0 {
        for (d, v) in e.iter_mut().zip(y.iter()) {
            *d = *v;
        }
        return;
    }
    let rows = x.as_slice().filter(|_| x.is_standard_layout());
    let colmajor = x
        .as_slice_memory_order()
        .filter(|_| x.t().is_standard_layout() && x.nrows() == t);
    // a column block for row-major or strided X, from a per-thread buffer (the small-system
    // path calls this once per equation of every system)
    thread_local! {
        static BLOCK: std::cell::Cell<Vec<f64>> = const { std::cell::Cell::new(Vec::new()) };
    }
    let mut cols = BLOCK.with(|cell| cell.take());
    if colmajor.is_none() && cols.len() < k * B.min(t) {
        cols.resize(k * B.min(t), 0.0);
    }
    let mut start = 0;
    while start < t {
        let end = (start + B).min(t);
        let n = end - start;
        let mut sum = [0.0f64; B];
        let mut err = [0.0f64; B];
        for (d, v) in sum[..n].iter_mut().zip(y.slice(s![start..end]).iter()) {
            *d = *v;
        }
        if colmajor.is_none() {
            match rows {
                // SAFETY: column j of the block is cols[j * n..(j + 1) * n] (length checked above).
                Some(rs) => unsafe {
                    scatter_rows(&rs[start * k..end * k], k, cols.as_mut_ptr(), n)
                },
                None => {
                    for j in 0..k {
                        for (d, v) in cols[j * n..(j + 1) * n]
                            .iter_mut()
                            .zip(x.slice(s![start..end, j]).iter())
                        {
                            *d = *v;
                        }
                    }
                }
            }
        }
        for (j, bj) in b.iter().enumerate() {
            let col: &[f64] = match colmajor {
                Some(cm) => &cm[j * t + start..j * t + end],
                None => &cols[j * n..(j + 1) * n],
            };
            let nb = -*bj;
            for ((sv, rv), xv) in sum[..n].iter_mut().zip(err[..n].iter_mut()).zip(col) {
                let (p, ep) = two_prod(nb, *xv);
                let s0 = *sv;
                let tt = s0 + p;
                let z = tt - s0;
                *rv += ((s0 - (tt - z)) + (p - z)) + ep;
                *sv = tt;
            }
        }
        for ((d, sv), rv) in e[start..end].iter_mut().zip(&sum[..n]).zip(&err[..n]) {
            *d = sv + rv;
        }
        start = end;
    }
    BLOCK.with(|cell| cell.replace(cols));
}

/// Writes the rows of the row-major r x k block `rows` into k columns: column j starts at
/// `dst + j * ld`. Narrow blocks (k <= 8) go row by row with k fixed at compile time (k output
/// streams, one pass over the input); wider ones column by column.
///
/// # Safety
/// `dst` must be valid for writes at `j * ld + i` for every j < k and i < r = rows.len() / k.
pub(crate) unsafe fn scatter_rows(rows: &[f64], k: usize, dst: *mut f64, ld: usize) {
    #[inline(always)]
    unsafe fn fixed<const K: usize>(rows: &[f64], dst: *mut f64, ld: usize) {
        for (i, row) in rows.chunks_exact(K).enumerate() {
            for j in 0..K {
                // SAFETY: within the caller's promise (i < r, j < k).
                unsafe { *dst.add(j * ld + i) = row[j] };
            }
        }
    }
    // SAFETY (every arm): the caller's promise, with K = k.
    unsafe {
        match k {
            0 => {}
            1 => std::ptr::copy_nonoverlapping(rows.as_ptr(), dst, rows.len()),
            2 => fixed::<2>(rows, dst, ld),
            3 => fixed::<3>(rows, dst, ld),
            4 => fixed::<4>(rows, dst, ld),
            5 => fixed::<5>(rows, dst, ld),
            6 => fixed::<6>(rows, dst, ld),
            7 => fixed::<7>(rows, dst, ld),
            8 => fixed::<8>(rows, dst, ld),
            _ => {
                for j in 0..k {
                    for (i, row) in rows.chunks_exact(k).enumerate() {
                        *dst.add(j * ld + i) = row[j];
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, Array2, ShapeBuilder};

    /// Both variants against the exact residual: data on a grid of 2^-20 with integer
    /// coefficients scaled by 2^-10, so every product and sum is an integer multiple of 2^-30
    /// and the exact residual is computed in i128; values chosen so that y and X b cancel to
    /// a residual eight orders below them (where a working-precision residual loses its
    /// digits). Row-major, column-major and strided inputs.
    #[test]
    fn every_variant_gives_the_exact_residual_rounded_once() {
        let (t, k) = (700usize, 5usize);
        let mut s = 3u64;
        let mut int = move |m: i64| {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((s >> 20) as i64 % (2 * m + 1)) - m
        };
        let xi: Vec<i64> = (0..t * k).map(|_| int(1 << 40)).collect();
        let bi: Vec<i64> = (0..k).map(|_| int(1 << 12)).collect();
        // y = X b exactly, plus a small integer residual
        let ri: Vec<i64> = (0..t).map(|_| int(1 << 10)).collect();
        let yi: Vec<i128> = (0..t)
            .map(|r| {
                (0..k)
                    .map(|j| xi[r * k + j] as i128 * bi[j] as i128)
                    .sum::<i128>()
                    + ri[r] as i128
            })
            .collect();
        let xs = 2f64.powi(-20);
        let bs = 2f64.powi(-10);
        let ys = xs * bs;
        let x = Array2::from_shape_fn((t, k), |(r, j)| xi[r * k + j] as f64 * xs);
        let b: Vec<f64> = bi.iter().map(|v| *v as f64 * bs).collect();
        // y rounds to double precision (its integer may pass 2^53); its float value over ys is
        // still an exact integer, so the exact residual is that integer minus X b's
        let y = Array1::from_shape_fn(t, |r| yi[r] as f64 * ys);
        let exact: Vec<f64> = (0..t)
            .map(|r| ((y[r] / ys) as i128 - (yi[r] - ri[r] as i128)) as f64 * ys)
            .collect();
        let terms: Vec<f64> = (0..t)
            .map(|r| y[r].abs() + (0..k).map(|j| (x[[r, j]] * b[j]).abs()).sum::<f64>())
            .collect();
        let xf = {
            let mut f = Array2::<f64>::zeros((t, k).f());
            f.assign(&x);
            f
        };
        let wide = Array2::from_shape_fn((t, 2 * k), |(r, j)| x[[r, j / 2]]);
        let strided = wide.slice(s![.., ..;2]);
        for v in Product::available() {
            for (label, xv) in [
                ("row-major", x.view()),
                ("column-major", xf.view()),
                ("strided", strided),
            ] {
                let mut e = vec![0.0; t];
                residual_dot2_with(v, xv, y.view(), &b, &mut e);
                for r in 0..t {
                    // Dot2's bound: the exact residual rounded once, plus (k + 1)^2 eps^2 times the
                    // terms' sizes (a working-precision residual errs by eps times the terms)
                    let tol = exact[r].abs() * f64::EPSILON
                        + ((k + 1) as f64 * f64::EPSILON).powi(2) * terms[r];
                    assert!(
                        (e[r] - exact[r]).abs() <= tol,
                        "{v:?} {label} row {r}: {} vs {}",
                        e[r],
                        exact[r]
                    );
                }
            }
        }
    }

    #[test]
    fn rows_scatter_into_columns() {
        for k in 1..=11usize {
            let r = 13;
            let rows: Vec<f64> = (0..r * k).map(|v| v as f64).collect();
            let ld = r + 3;
            let mut dst = vec![-1.0; ld * k];
            // SAFETY: dst holds ld * k values, ld >= r.
            unsafe { scatter_rows(&rows, k, dst.as_mut_ptr(), ld) };
            for j in 0..k {
                for i in 0..r {
                    assert_eq!(dst[j * ld + i], rows[i * k + j], "k={k} ({i},{j})");
                }
                assert!(dst[j * ld + r..(j + 1) * ld].iter().all(|v| *v == -1.0));
            }
        }
    }
}
