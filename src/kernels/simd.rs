//! Vector kernels written once over pulp's SIMD layer (the one faer uses; the instruction set is
//! chosen at run time: AVX2 + FMA on x86-64 CPUs that have them, NEON on aarch64, plain scalar
//! code otherwise): pairwise dot products, several dot products with one vector, axpy and
//! column combinations. Step 0 and the warm-started GLS solves spend their time here.
//!
//! Every kernel has a `_with` form that takes the `Isa` to run: `Isa::Scalar` forces pulp's
//! scalar code, `Isa::Best` the best this CPU runs. The tests run both against plain loops.

use pulp::{Simd, WithSimd};

/// Which code path a kernel runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Isa {
    /// pulp's scalar implementation (one lane): forced by the tests.
    #[cfg_attr(not(test), allow(dead_code))]
    Scalar,
    /// The best this CPU runs (pulp's run-time dispatch).
    Best,
}

impl Isa {
    /// The variants the tests run (Best is Scalar on a CPU without SIMD).
    #[cfg(test)]
    pub(crate) const ALL: [Isa; 2] = [Isa::Scalar, Isa::Best];

    #[inline(always)]
    fn run<Op: WithSimd>(self, op: Op) -> Op::Output {
        match self {
            Isa::Scalar => pulp::Scalar::new().vectorize(op),
            Isa::Best => arch().dispatch(op),
        }
    }
}

/// pulp's choice for this CPU (detected once).
fn arch() -> pulp::Arch {
    static ARCH: std::sync::OnceLock<pulp::Arch> = std::sync::OnceLock::new();
    *ARCH.get_or_init(pulp::Arch::new)
}

/// The instruction set pulp's dispatch chose for these kernels on this CPU.
pub(crate) fn best_name() -> &'static str {
    struct Name;
    impl WithSimd for Name {
        type Output = &'static str;
        #[inline(always)]
        fn with_simd<S: Simd>(self, _simd: S) -> &'static str {
            match (S::F64_LANES, cfg!(target_arch = "aarch64")) {
                (1, _) => "scalar",
                (_, true) => "neon",
                (2, false) => "sse2",
                (4, false) => "avx2+fma",
                _ => "avx512",
            }
        }
    }
    arch().dispatch(Name)
}

/// Below this length a pairwise sum stops splitting.
const BLOCK: usize = 1024;

/// Dot product, pairwise over halves down to blocks of BLOCK, each block in several
/// independent partial sums: the rounding error grows with log2(n), not n (over 10^7 rows a
/// running sum would cost several digits).
pub(crate) fn dot(a: &[f64], b: &[f64]) -> f64 {
    dot_with(Isa::Best, a, b)
}

pub(crate) fn dot_with(isa: Isa, a: &[f64], b: &[f64]) -> f64 {
    dotn_with::<1>(isa, [a], b)[0]
}

/// N dot products with one vector (v is read once per pass), each by the pairwise scheme of
/// `dot`.
pub(crate) fn dotn_with<const N: usize>(isa: Isa, c: [&[f64]; N], v: &[f64]) -> [f64; N] {
    let n = c.iter().fold(v.len(), |m, x| m.min(x.len()));
    if n > BLOCK {
        let h = (n / 2) & !7;
        let a = dotn_with(isa, c.map(|x| &x[..h]), &v[..h]);
        let b = dotn_with(isa, c.map(|x| &x[h..n]), &v[h..n]);
        return std::array::from_fn(|i| a[i] + b[i]);
    }
    isa.run(DotBlock {
        c: c.map(|x| &x[..n]),
        v: &v[..n],
    })
}

struct DotBlock<'a, const N: usize> {
    c: [&'a [f64]; N],
    v: &'a [f64],
}

impl<const N: usize> WithSimd for DotBlock<'_, N> {
    type Output = [f64; N];

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) -> [f64; N] {
        let (vh, vt) = S::as_simd_f64s(self.v);
        let heads = self.c.map(|x| S::as_simd_f64s(x));
        // two accumulators per column (four for a single column): independent chains
        const ACC: usize = 4;
        let mut acc = [[simd.splat_f64s(0.0); ACC]; N];
        let per = if N == 1 { ACC } else { 2 };
        let mut i = 0;
        while i + per <= vh.len() {
            for (a, (h, _)) in acc.iter_mut().zip(&heads) {
                for l in 0..per {
                    a[l] = simd.mul_add_e_f64s(h[i + l], vh[i + l], a[l]);
                }
            }
            i += per;
        }
        while i < vh.len() {
            for (a, (h, _)) in acc.iter_mut().zip(&heads) {
                a[0] = simd.mul_add_e_f64s(h[i], vh[i], a[0]);
            }
            i += 1;
        }
        let mut out = [0.0; N];
        for ((o, a), (_, tail)) in out.iter_mut().zip(&acc).zip(&heads) {
            let s = simd.add_f64s(simd.add_f64s(a[0], a[2]), simd.add_f64s(a[1], a[3]));
            let mut s = simd.reduce_sum_f64s(s);
            for (x, y) in tail.iter().zip(vt) {
                s = x.mul_add(*y, s);
            }
            *o = s;
        }
        out
    }
}

/// out[j] = q_j'v for the columns q_j of the column-major T x out.len() block `q`, four
/// columns per pass over the rows, each by the pairwise scheme of `dot`.
pub(crate) fn dots(q: &[f64], t: usize, v: &[f64], out: &mut [f64]) {
    dots_with(Isa::Best, q, t, v, out)
}

pub(crate) fn dots_with(isa: Isa, q: &[f64], t: usize, v: &[f64], out: &mut [f64]) {
    let v = &v[..t];
    let col = |j: usize| &q[j * t..(j + 1) * t];
    let mut j = 0;
    while j + 4 <= out.len() {
        out[j..j + 4].copy_from_slice(&dotn_with(
            isa,
            [col(j), col(j + 1), col(j + 2), col(j + 3)],
            v,
        ));
        j += 4;
    }
    for (jj, o) in out.iter_mut().enumerate().skip(j) {
        *o = dot_with(isa, col(jj), v);
    }
}

/// y += alpha x (over the shorter of the two).
pub(crate) fn axpy(y: &mut [f64], x: &[f64], alpha: f64) {
    axpy_with(Isa::Best, y, x, alpha)
}

pub(crate) fn axpy_with(isa: Isa, y: &mut [f64], x: &[f64], alpha: f64) {
    let n = y.len().min(x.len());
    combine_with::<1>(isa, &mut y[..n], [&x[..n]], [alpha]);
}

/// v += sum_j w_j c_j for N columns in one pass over the rows (each at least v's length).
pub(crate) fn combine_with<const N: usize>(isa: Isa, v: &mut [f64], c: [&[f64]; N], w: [f64; N]) {
    let n = v.len();
    isa.run(Combine {
        v,
        c: c.map(|x| &x[..n]),
        w,
    })
}

struct Combine<'a, 'b, const N: usize> {
    v: &'a mut [f64],
    c: [&'b [f64]; N],
    w: [f64; N],
}

impl<const N: usize> WithSimd for Combine<'_, '_, N> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) {
        let (vh, vt) = S::as_mut_simd_f64s(self.v);
        let heads = self.c.map(|x| S::as_simd_f64s(x));
        let ws = self.w.map(|w| simd.splat_f64s(w));
        for (i, o) in vh.iter_mut().enumerate() {
            let mut acc = *o;
            for ((h, _), w) in heads.iter().zip(&ws) {
                acc = simd.mul_add_e_f64s(*w, h[i], acc);
            }
            *o = acc;
        }
        for (i, o) in vt.iter_mut().enumerate() {
            for ((_, tail), w) in heads.iter().zip(&self.w) {
                *o = w.mul_add(tail[i], *o);
            }
        }
    }
}

/// cols[c] += w_c v for N columns in one pass over the rows (v is read once; every column at
/// least v's length).
pub(crate) fn outer_with<const N: usize>(isa: Isa, cols: [&mut [f64]; N], v: &[f64], w: [f64; N]) {
    let n = v.len();
    isa.run(Outer {
        cols: cols.map(|c| &mut c[..n]),
        v,
        w,
    })
}

struct Outer<'a, 'b, const N: usize> {
    cols: [&'a mut [f64]; N],
    v: &'b [f64],
    w: [f64; N],
}

impl<const N: usize> WithSimd for Outer<'_, '_, N> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: Simd>(self, simd: S) {
        let (vh, vt) = S::as_simd_f64s(self.v);
        let ws = self.w.map(|w| simd.splat_f64s(w));
        let mut heads = self.cols.map(|c| S::as_mut_simd_f64s(c));
        for (i, x) in vh.iter().enumerate() {
            for ((h, _), w) in heads.iter_mut().zip(&ws) {
                h[i] = simd.mul_add_e_f64s(*w, *x, h[i]);
            }
        }
        for ((_, tail), w) in heads.iter_mut().zip(&self.w) {
            for (o, x) in tail.iter_mut().zip(vt) {
                *o = w.mul_add(*x, *o);
            }
        }
    }
}

/// v -= sum_j c_j q_j for the columns q_j of the column-major T x c.len() block `q`.
pub(crate) fn sub_combination(v: &mut [f64], q: &[f64], t: usize, c: &[f64]) {
    sub_combination_with(Isa::Best, &mut v[..t], c, |j| &q[j * t..(j + 1) * t]);
}

/// v -= sum_j c_j col(j) over the length of v (each column at least that long), four columns
/// per pass.
pub(crate) fn sub_combination_with<'a>(
    isa: Isa,
    v: &mut [f64],
    c: &[f64],
    cols: impl Fn(usize) -> &'a [f64],
) {
    let mut j = 0;
    while j + 4 <= c.len() {
        combine_with(
            isa,
            v,
            [cols(j), cols(j + 1), cols(j + 2), cols(j + 3)],
            [-c[j], -c[j + 1], -c[j + 2], -c[j + 3]],
        );
        j += 4;
    }
    for jj in j..c.len() {
        let n = v.len();
        combine_with::<1>(isa, v, [&cols(jj)[..n]], [-c[jj]]);
    }
}

/// y = A x for a symmetric n x n A given by its lower triangle, column-major (the upper
/// triangle is not read).
pub(crate) fn sym_lower_matvec(a: &[f64], n: usize, x: &[f64], y: &mut [f64]) {
    y[..n].fill(0.0);
    for j in 0..n {
        let col = &a[j * n + j..(j + 1) * n]; // rows j.. of column j
        axpy(&mut y[j..n], col, x[j]);
        y[j] += dot(&col[1..], &x[j + 1..n]);
    }
}

/// Sum of squared deviations from `mean`, in eight partial sums.
pub(crate) fn centred_squares(x: &[f64], mean: f64) -> f64 {
    let mut acc = [0.0f64; 8];
    let c = x.chunks_exact(8);
    let rest: f64 = c.remainder().iter().map(|v| (v - mean) * (v - mean)).sum();
    for ch in c {
        for l in 0..8 {
            let d = ch[l] - mean;
            acc[l] += d * d;
        }
    }
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + rest
}

/// Sum of a slice in eight partial sums.
pub(crate) fn sum(x: &[f64]) -> f64 {
    let mut acc = [0.0f64; 8];
    let c = x.chunks_exact(8);
    let rest: f64 = c.remainder().iter().sum();
    for ch in c {
        for l in 0..8 {
            acc[l] += ch[l];
        }
    }
    ((acc[0] + acc[4]) + (acc[1] + acc[5])) + ((acc[2] + acc[6]) + (acc[3] + acc[7])) + rest
}

/// 2-norm scaled by the largest magnitude, for columns whose plain sum of squares would
/// overflow or underflow.
pub fn scaled_norm(x: &[f64]) -> f64 {
    let m = x.iter().fold(0.0f64, |a, b| a.max(b.abs()));
    if m == 0.0 || !m.is_finite() {
        return m;
    }
    let inv = 1.0 / m;
    let mut ss = 0.0;
    for c in x.chunks(1024) {
        ss += c.iter().map(|e| (e * inv) * (e * inv)).sum::<f64>();
    }
    m * ss.sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn data(n: usize, seed: u64) -> Vec<f64> {
        let mut s = seed;
        (0..n)
            .map(|_| {
                s = s
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5
            })
            .collect()
    }

    /// Every variant this CPU runs (scalar and the dispatched one) against plain loops summed
    /// in doubled precision (two-sum and exact products by FMA: the reference is exact to
    /// the last place), lengths on both sides of the block and lane boundaries.
    #[test]
    fn every_variant_matches_plain_loops() {
        let exact_dot = |a: &[f64], b: &[f64]| {
            let (mut s, mut e) = (0.0f64, 0.0f64);
            for (x, y) in a.iter().zip(b) {
                let p = x * y;
                let pe = x.mul_add(*y, -p);
                let t = s + p;
                let z = t - s;
                e += (s - (t - z)) + (p - z) + pe;
                s = t;
            }
            s + e
        };
        for isa in Isa::ALL {
            for n in [0usize, 1, 3, 7, 8, 9, 31, 1023, 1024, 1025, 5000, 100_003] {
                let (a, b) = (data(n, n as u64 + 1), data(n, n as u64 + 2));
                let scale: f64 = a
                    .iter()
                    .zip(&b)
                    .map(|(x, y)| (x * y).abs())
                    .sum::<f64>()
                    .max(1e-300);
                let d = dot_with(isa, &a, &b);
                assert!(
                    (d - exact_dot(&a, &b)).abs() <= 1e-15 * scale * (n as f64).log2().max(1.0),
                    "{isa:?} n={n}"
                );
                // four columns at once, and the column-block form
                let cols: Vec<Vec<f64>> = (0..6).map(|j| data(n, 100 + j)).collect();
                let mut out = vec![0.0; 6];
                let q: Vec<f64> = cols.concat();
                dots_with(isa, &q, n, &b, &mut out);
                for j in 0..6 {
                    let s: f64 = cols[j]
                        .iter()
                        .zip(&b)
                        .map(|(x, y)| (x * y).abs())
                        .sum::<f64>()
                        .max(1e-300);
                    assert!(
                        (out[j] - exact_dot(&cols[j], &b)).abs()
                            <= 1e-15 * s * (n as f64).log2().max(1.0),
                        "{isa:?} n={n} col {j}"
                    );
                }
                // axpy and combinations: each element is one fused or two rounded operations
                let mut y = b.clone();
                axpy_with(isa, &mut y, &a, 0.7);
                for i in 0..n {
                    assert!(
                        (y[i] - (b[i] + 0.7 * a[i])).abs()
                            <= 2.0 * f64::EPSILON * (b[i].abs() + 0.7 * a[i].abs())
                    );
                }
                let (mut u1, mut u2) = (b.clone(), a.clone());
                outer_with::<2>(isa, [&mut u1, &mut u2], &cols[0], [0.5, -2.0]);
                for i in 0..n {
                    assert!(
                        (u1[i] - (b[i] + 0.5 * cols[0][i])).abs()
                            <= 2.0 * f64::EPSILON * (b[i].abs() + 0.5 * cols[0][i].abs())
                    );
                    assert!(
                        (u2[i] - (a[i] - 2.0 * cols[0][i])).abs()
                            <= 2.0 * f64::EPSILON * (a[i].abs() + 2.0 * cols[0][i].abs())
                    );
                }
                let c = [0.3, -1.2, 2.0, 0.5, -0.25];
                let mut v = b.clone();
                sub_combination_with(isa, &mut v, &c, |j| &cols[j][..]);
                for i in 0..n {
                    let want: f64 = b[i] - (0..5).map(|j| c[j] * cols[j][i]).sum::<f64>();
                    let size: f64 =
                        b[i].abs() + (0..5).map(|j| (c[j] * cols[j][i]).abs()).sum::<f64>();
                    assert!(
                        (v[i] - want).abs() <= 8.0 * f64::EPSILON * size,
                        "{isa:?} n={n} row {i}"
                    );
                }
            }
        }
        assert!(["scalar", "sse2", "avx2+fma", "avx512", "neon"].contains(&best_name()));
    }

    #[test]
    fn symmetric_product_from_the_lower_triangle() {
        let n = 37;
        let full = data(n * n, 9);
        // symmetric from the lower triangle; garbage above it (never read)
        let a: Vec<f64> = (0..n * n)
            .map(|idx| {
                let (i, j) = (idx % n, idx / n);
                if i >= j {
                    full[i + j * n]
                } else {
                    f64::NAN
                }
            })
            .collect();
        let x = data(n, 10);
        let mut y = vec![0.0; n];
        sym_lower_matvec(&a, n, &x, &mut y);
        for i in 0..n {
            let want: f64 = (0..n)
                .map(|j| if i >= j { a[i + j * n] } else { a[j + i * n] } * x[j])
                .sum();
            assert!((y[i] - want).abs() <= 1e-14, "row {i}");
        }
    }
}
