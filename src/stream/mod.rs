//! Steps 0 and 1 over rows that arrive in chunks (streams, files, cluster partitions).
//!
//! Pass 1 reduces each chunk to the R factor of every equation's [X_i | y_i] (tall-skinny QR:
//! the R of two stacked chunks is the R of their two stacked R factors), so only (K_i + 1)^2
//! numbers per equation travel. Pass 2 turns each chunk into its rows of
//! W = [Q_1 .. Q_N, q_1 .. q_N] with [Q_i | q_i] = [X_i | y_i] R_i^+^-1 and sums the chunk Gram
//! matrices W_c'W_c (P x P). Both summaries merge associatively, in any order and any tree, and
//! `Prepared::from_summaries` finishes exactly as the in-memory path does. `RowSummary` gets
//! both summaries from one read of the rows (a tall-skinny QR of all the columns at once).
//! All three carry the largest |y_i| of the rows (merged by taking the maximum: exact, in any
//! order), so that finishing refuses a y out of the range of the in-memory path with its message
//! (and a caller running the passes apart can refuse it after pass 1: `RowFactors::check_y_range`).

use ndarray::{concatenate, s, Array1, Array2, Axis, ShapeBuilder};

use crate::data::SystemData;
use crate::error::{Result, SurError};
use crate::kernels::{gram, symmetrize, upper_inverse};
use crate::prepare::{
    abs_max, check_rank, cond_of_scaled, y_max_in_range, CrossProducts, EquationFactor, Prepared,
};

/// Pass-1 summary of some rows: per equation the upper-triangular R of [X_i | y_i], and the
/// largest |y_i| (merged by max).
#[derive(Debug, Clone)]
pub struct RowFactors {
    pub n_rows: usize,
    pub r: Vec<Array2<f64>>,
    pub y_max: Vec<f64>,
}

/// The R factor (m x m; rows below min(rows, m) zero) of a rows x m matrix: the Q factor is
/// never formed.
fn qr_r(a: Array2<f64>, _what: &str) -> Result<Array2<f64>> {
    let mut a = a;
    Ok(crate::kernels::qr_r(a.view_mut()))
}

/// The R factor (p x p, upper triangular) of a rows x p matrix whose rows a..b `fill` writes
/// into a buffer, by tall-skinny QR over row blocks of about 2 MB (the fastest of 0.25-4 MB
/// on 65,536 x 70 chunks): a running R stacked on each block, refactored. One LAPACK QR of a
/// whole long chunk streams it through memory once per column and was 2-5x slower.
fn tsqr_rows(
    rows: usize,
    p: usize,
    fill: impl Fn(usize, usize, ndarray::ArrayViewMut2<f64>),
    what: &str,
) -> Result<Array2<f64>> {
    let block = (262_144 / p.max(1)).max(2 * p).max(64);
    let mut r: Option<Array2<f64>> = None;
    let mut start = 0;
    while start < rows {
        let end = (start + block).min(rows);
        let top = r.as_ref().map_or(0, |r| r.nrows());
        let mut buf = Array2::<f64>::zeros((top + end - start, p).f());
        if let Some(r) = &r {
            buf.slice_mut(s![..top, ..]).assign(r);
        }
        fill(start, end, buf.slice_mut(s![top.., ..]));
        r = Some(qr_r(buf, what)?);
        start = end;
    }
    Ok(r.unwrap_or_else(|| Array2::zeros((p, p))))
}

impl RowFactors {
    /// Pass 1 on one chunk whose first row is row `row_offset` of the sample.
    pub fn from_chunk(data: &SystemData, row_offset: usize) -> Result<RowFactors> {
        let rows = data.validate_chunk(row_offset, false)?;
        let mut r = Vec::with_capacity(data.n_eq());
        for eq in &data.equations {
            let k = eq.n_regressors();
            let fill = |a: usize, b: usize, mut out: ndarray::ArrayViewMut2<f64>| {
                out.slice_mut(s![.., ..k]).assign(&eq.x.slice(s![a..b, ..]));
                out.column_mut(k).assign(&eq.y.slice(s![a..b]));
            };
            r.push(tsqr_rows(rows, k + 1, fill, "QR of a chunk")?);
        }
        let y_max = data.equations.iter().map(|eq| abs_max(eq.y)).collect();
        Ok(RowFactors {
            n_rows: rows,
            r,
            y_max,
        })
    }

    /// Refuses the rows, as finishing would, when the largest |y| of an equation of `names` is
    /// out of range: for callers that run pass 2 apart, so that they stop before reading the rows
    /// again (and before pass 2 meets factors that overflowed).
    pub fn check_y_range(&self, names: &[String]) -> Result<()> {
        if names.len() != self.y_max.len() || names.len() != self.r.len() {
            return Err(SurError::InvalidOption(
                "the pass-1 summary does not match the system".into(),
            ));
        }
        check_y_range(names, &self.y_max)
    }

    /// The summary of the union of two sets of rows.
    pub fn merge(self, other: RowFactors) -> Result<RowFactors> {
        if self.r.len() != other.r.len()
            || self.y_max.len() != self.r.len()
            || other.y_max.len() != other.r.len()
        {
            return Err(SurError::InvalidOption(
                "cannot merge summaries of different systems".into(),
            ));
        }
        let y_max = merge_max(&self.y_max, &other.y_max);
        let mut r = Vec::with_capacity(self.r.len());
        for (a, b) in self.r.into_iter().zip(other.r) {
            if a.dim() != b.dim() || a.nrows() != a.ncols() || a.nrows() == 0 {
                return Err(SurError::InvalidOption(
                    "cannot merge summaries of different systems".into(),
                ));
            }
            let stacked = concatenate(Axis(0), &[a.view(), b.view()]).expect("same widths");
            let mut f = Array2::<f64>::zeros(stacked.dim().f());
            f.assign(&stacked);
            r.push(qr_r(f, "QR of stacked chunk factors")?);
        }
        Ok(RowFactors {
            n_rows: self.n_rows + other.n_rows,
            r,
            y_max,
        })
    }
}

/// Pass-2 summary of some rows.
#[derive(Debug, Clone)]
pub struct CrossStats {
    pub n_rows: usize,
    /// W_c'W_c summed over chunks (P x P).
    pub gram: Array2<f64>,
    /// Column sums of W (P).
    pub colsum: Array1<f64>,
    /// Per equation: mean of y and sum of squares about it (merged by Chan's formula), the raw
    /// sum of squares, and the largest |y| (merged by max).
    pub y_mean: Vec<f64>,
    pub y_m2: Vec<f64>,
    pub y_raw: Vec<f64>,
    pub y_max: Vec<f64>,
}

/// The inverses of the merged pass-1 factors, computed once and shared by every chunk of pass 2.
#[derive(Debug, Clone)]
pub struct Pass2Basis {
    rinv: Vec<Array2<f64>>,
    sign: Vec<f64>,
}

impl Pass2Basis {
    pub fn new(factors: &RowFactors) -> Result<Pass2Basis> {
        let mut rinv = Vec::new();
        let mut sign = Vec::new();
        for r in &factors.r {
            let m = r.nrows();
            if m < 2 || r.ncols() != m || r.iter().any(|v| !v.is_finite()) {
                return Err(SurError::InvalidOption(
                    "a pass-1 factor is not a finite square matrix of size K_i + 1".into(),
                ));
            }
            let mut safe = r.clone();
            // A perfect fit leaves r[m-1, m-1] = 0; its q column is then immaterial (rho = 0).
            if safe[[m - 1, m - 1]] == 0.0 {
                safe[[m - 1, m - 1]] = 1.0;
            }
            for j in 0..m - 1 {
                if safe[[j, j]] == 0.0 {
                    safe[[j, j]] = 1.0; // rank is checked, with names, when finishing
                }
            }
            sign.push(if r[[m - 1, m - 1]] < 0.0 { -1.0 } else { 1.0 });
            rinv.push(upper_inverse(&safe)?);
        }
        Ok(Pass2Basis { rinv, sign })
    }
}

impl CrossStats {
    /// Pass 2 on one chunk.
    pub fn from_chunk(
        data: &SystemData,
        basis: &Pass2Basis,
        row_offset: usize,
    ) -> Result<CrossStats> {
        let rows = data.validate_chunk(row_offset, false)?;
        let n = data.n_eq();
        if basis.rinv.len() != n {
            return Err(SurError::InvalidOption(
                "the chunk does not match the pass-1 summary".into(),
            ));
        }
        let k: usize = data.equations.iter().map(|e| e.n_regressors()).sum();
        let p = k + n;
        let mut w = Array2::<f64>::zeros((rows, p).f());
        let mut off = 0;
        for (i, eq) in data.equations.iter().enumerate() {
            let ki = eq.n_regressors();
            if basis.rinv[i].nrows() != ki + 1 {
                return Err(SurError::InvalidOption(
                    "the chunk does not match the pass-1 summary".into(),
                ));
            }
            let mut a = Array2::<f64>::zeros((rows, ki + 1));
            a.slice_mut(s![.., ..ki]).assign(&eq.x);
            a.column_mut(ki).assign(&eq.y);
            let qa = a.dot(&basis.rinv[i]);
            w.slice_mut(s![.., off..off + ki])
                .assign(&qa.slice(s![.., ..ki]));
            w.column_mut(k + i)
                .assign(&qa.column(ki).mapv(|v| v * basis.sign[i]));
            off += ki;
        }
        let (y_mean, y_m2, y_raw, y_max) = y_moments(data, rows);
        Ok(CrossStats {
            n_rows: rows,
            gram: gram(w.view()),
            colsum: w.sum_axis(Axis(0)),
            y_mean,
            y_m2,
            y_raw,
            y_max,
        })
    }

    /// The summary of the union of two sets of rows.
    pub fn merge(self, other: CrossStats) -> Result<CrossStats> {
        if self.gram.dim() != other.gram.dim()
            || self.gram.nrows() != self.gram.ncols()
            || self.colsum.len() != self.gram.nrows()
            || self.colsum.len() != other.colsum.len()
            || self.y_mean.len() != other.y_mean.len()
            || self.y_m2.len() != other.y_m2.len()
            || self.y_raw.len() != other.y_raw.len()
            || self.y_max.len() != other.y_max.len()
        {
            return Err(SurError::InvalidOption(
                "cannot merge summaries of different systems".into(),
            ));
        }
        let (y_mean, y_m2, y_raw, y_max) = merge_moments(
            (
                self.n_rows,
                &self.y_mean,
                &self.y_m2,
                &self.y_raw,
                &self.y_max,
            ),
            (
                other.n_rows,
                &other.y_mean,
                &other.y_m2,
                &other.y_raw,
                &other.y_max,
            ),
        );
        Ok(CrossStats {
            n_rows: self.n_rows + other.n_rows,
            gram: self.gram + other.gram,
            colsum: self.colsum + other.colsum,
            y_mean,
            y_m2,
            y_raw,
            y_max,
        })
    }
}

/// Per equation: the mean of y, its sum of squares about the mean, its raw sum of squares, and
/// its largest |value|.
type YStats = (Vec<f64>, Vec<f64>, Vec<f64>, Vec<f64>);

/// The `YStats` of the rows of a chunk.
fn y_moments(data: &SystemData, rows: usize) -> YStats {
    let (mut y_mean, mut y_m2, mut y_raw, mut y_max) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for eq in &data.equations {
        let mean = if rows > 0 {
            eq.y.sum() / rows as f64
        } else {
            0.0
        };
        y_mean.push(mean);
        y_m2.push(eq.y.iter().map(|v| (v - mean) * (v - mean)).sum());
        y_raw.push(eq.y.iter().map(|v| v * v).sum());
        y_max.push(abs_max(eq.y));
    }
    (y_mean, y_m2, y_raw, y_max)
}

type Moments<'a> = (usize, &'a [f64], &'a [f64], &'a [f64], &'a [f64]);

/// The `YStats` of the union of two sets of rows (Chan et al.'s update for the sum of squares;
/// the maximum of the two maxima, exact in any order).
fn merge_moments(a: Moments<'_>, b: Moments<'_>) -> YStats {
    let (na, nb) = (a.0 as f64, b.0 as f64);
    let n = na + nb;
    let mut y_mean = Vec::new();
    let mut y_m2 = Vec::new();
    for i in 0..a.1.len() {
        let d = b.1[i] - a.1[i];
        y_mean.push(if n > 0.0 { a.1[i] + d * nb / n } else { 0.0 });
        y_m2.push(a.2[i] + b.2[i] + if n > 0.0 { d * d * na * nb / n } else { 0.0 });
    }
    let y_raw = a.3.iter().zip(b.3).map(|(x, y)| x + y).collect();
    (y_mean, y_m2, y_raw, merge_max(a.4, b.4))
}

/// The largest |y| of the union of two sets of rows, per equation.
fn merge_max(a: &[f64], b: &[f64]) -> Vec<f64> {
    a.iter().zip(b).map(|(x, y)| x.max(*y)).collect()
}

/// Refuses summarised rows in which an equation's largest |y| lies outside the range the
/// in-memory data pass accepts, with its message: called where the summaries are finished,
/// before anything is computed from them.
fn check_y_range(names: &[String], y_max: &[f64]) -> Result<()> {
    names
        .iter()
        .zip(y_max)
        .try_for_each(|(name, &m)| y_max_in_range(name, m))
}

/// One-pass summary of some rows. With Z = [X_1 y_1 .. X_N y_N] (T x P, each equation's
/// columns together), `r` is a square root of Z'Z (r'r = Z'Z, at most P rows) from tall-skinny
/// QR: a chunk's R, and the R of two stacked summaries for their union. Orthogonal
/// transformations only, so nothing is lost to the conditioning of Z'Z. With it come the column
/// sums of Z and the moments and largest |value| of each y. `finish` turns it into exactly what
/// the two passes give: Z = Q_Z r for an orthonormal Q_Z, so the QR [U_i u_i] R_i of equation
/// i's columns of `r` makes Q_Z [U_i u_i] the Q factor of [X_i | y_i], and W'W is the Gram
/// matrix of the small matrix [U_1 .. U_N, u_1 .. u_N] (P x P): one read of the rows instead of
/// two.
#[derive(Debug, Clone)]
pub struct RowSummary {
    pub n_rows: usize,
    pub r: Array2<f64>,
    pub colsum: Array1<f64>,
    pub y_mean: Vec<f64>,
    pub y_m2: Vec<f64>,
    pub y_raw: Vec<f64>,
    pub y_max: Vec<f64>,
}

impl RowSummary {
    /// The summary of one chunk whose first row is row `row_offset` of the sample.
    pub fn from_chunk(data: &SystemData, row_offset: usize) -> Result<RowSummary> {
        let rows = data.validate_chunk(row_offset, false)?;
        let p: usize = data.equations.iter().map(|e| e.n_regressors() + 1).sum();
        let mut colsum = Array1::<f64>::zeros(p);
        let mut off = 0;
        for eq in &data.equations {
            let k = eq.n_regressors();
            colsum
                .slice_mut(s![off..off + k])
                .assign(&eq.x.sum_axis(Axis(0)));
            colsum[off + k] = eq.y.sum();
            off += k + 1;
        }
        let fill = |a: usize, b: usize, mut out: ndarray::ArrayViewMut2<f64>| {
            let mut off = 0;
            for eq in &data.equations {
                let k = eq.n_regressors();
                out.slice_mut(s![.., off..off + k])
                    .assign(&eq.x.slice(s![a..b, ..]));
                out.column_mut(off + k).assign(&eq.y.slice(s![a..b]));
                off += k + 1;
            }
        };
        let r = tsqr_rows(rows, p, fill, "QR of a chunk")?;
        let (y_mean, y_m2, y_raw, y_max) = y_moments(data, rows);
        Ok(RowSummary {
            n_rows: rows,
            r,
            colsum,
            y_mean,
            y_m2,
            y_raw,
            y_max,
        })
    }

    /// The summary of the union of two sets of rows.
    pub fn merge(self, other: RowSummary) -> Result<RowSummary> {
        let p = self.r.ncols();
        if other.r.ncols() != p
            || self.colsum.len() != p
            || other.colsum.len() != p
            || self.y_mean.len() != other.y_mean.len()
            || self.y_m2.len() != self.y_mean.len()
            || other.y_m2.len() != other.y_mean.len()
            || self.y_raw.len() != self.y_mean.len()
            || other.y_raw.len() != other.y_mean.len()
            || self.y_max.len() != self.y_mean.len()
            || other.y_max.len() != other.y_mean.len()
        {
            return Err(SurError::InvalidOption(
                "cannot merge summaries of different systems".into(),
            ));
        }
        let stacked = concatenate(Axis(0), &[self.r.view(), other.r.view()]).expect("same widths");
        let mut f = Array2::<f64>::zeros(stacked.dim().f());
        f.assign(&stacked);
        let r = qr_r(f, "QR of stacked chunk summaries")?;
        let (y_mean, y_m2, y_raw, y_max) = merge_moments(
            (
                self.n_rows,
                &self.y_mean,
                &self.y_m2,
                &self.y_raw,
                &self.y_max,
            ),
            (
                other.n_rows,
                &other.y_mean,
                &other.y_m2,
                &other.y_raw,
                &other.y_max,
            ),
        );
        Ok(RowSummary {
            n_rows: self.n_rows + other.n_rows,
            r,
            colsum: self.colsum + other.colsum,
            y_mean,
            y_m2,
            y_raw,
            y_max,
        })
    }

    /// The pass-1 and pass-2 summaries of the same rows, for equations `names` with
    /// `widths[i]` = K_i + 1 columns each. A y out of range is refused here, naming its
    /// equation, before the factors (which may then hold infinities) are looked at.
    pub fn finish(&self, names: &[String], widths: &[usize]) -> Result<(RowFactors, CrossStats)> {
        let n = widths.len();
        let p: usize = widths.iter().sum();
        if n == 0
            || names.len() != n
            || widths.contains(&0)
            || p != self.r.ncols()
            || self.colsum.len() != p
            || self.y_mean.len() != n
            || self.y_max.len() != n
        {
            return Err(SurError::InvalidOption(
                "the summary does not match the system".into(),
            ));
        }
        check_y_range(names, &self.y_max)?;
        if self.r.iter().any(|v| !v.is_finite()) {
            return Err(SurError::InvalidOption(
                "the summary holds non-finite values".into(),
            ));
        }
        let k = p - n;
        // At least P rows, so that every equation's block is tall (zero rows change no product).
        let rows = self.r.nrows().max(p);
        let mut a = Array2::<f64>::zeros((rows, p).f());
        a.slice_mut(s![..self.r.nrows(), ..]).assign(&self.r);
        let mut v = Array2::<f64>::zeros((rows, p).f());
        let mut colsum = Array1::<f64>::zeros(p);
        let mut factors = Vec::with_capacity(n);
        let (mut off, mut qoff) = (0, 0);
        for (i, &w) in widths.iter().enumerate() {
            let ki = w - 1;
            let (q, r) = crate::kernels::qr::thin_qr(a.slice(s![.., off..off + w]).to_owned())?;
            let sign = if r[[ki, ki]] < 0.0 { -1.0 } else { 1.0 };
            v.slice_mut(s![.., qoff..qoff + ki])
                .assign(&q.slice(s![.., ..ki]));
            v.column_mut(k + i).assign(&q.column(ki).mapv(|x| x * sign));
            // 1'[Q_i q_i] = 1'[X_i y_i] R^-1 (a zero pivot is named when finishing; a perfect
            // fit's q is immaterial).
            let mut safe = r.clone();
            for j in 0..w {
                if safe[[j, j]] == 0.0 {
                    safe[[j, j]] = 1.0;
                }
            }
            let c = self
                .colsum
                .slice(s![off..off + w])
                .dot(&upper_inverse(&safe)?);
            colsum
                .slice_mut(s![qoff..qoff + ki])
                .assign(&c.slice(s![..ki]));
            colsum[k + i] = if r[[ki, ki]] == 0.0 {
                0.0
            } else {
                sign * c[ki]
            };
            factors.push(r);
            off += w;
            qoff += ki;
        }
        let stats = CrossStats {
            n_rows: self.n_rows,
            gram: gram(v.view()),
            colsum,
            y_mean: self.y_mean.clone(),
            y_m2: self.y_m2.clone(),
            y_raw: self.y_raw.clone(),
            y_max: self.y_max.clone(),
        };
        Ok((
            RowFactors {
                n_rows: self.n_rows,
                r: factors,
                y_max: self.y_max.clone(),
            },
            stats,
        ))
    }
}

/// Finishes steps 0 and 1 from merged pass-1 and pass-2 summaries of all rows.
pub fn prepare_from_summaries(
    names: Vec<String>,
    regressors: Vec<Vec<String>>,
    factors: &RowFactors,
    stats: &CrossStats,
) -> Result<Prepared> {
    let n = names.len();
    if n == 0 {
        return Err(SurError::EmptySystem);
    }
    if factors.r.len() != n || regressors.len() != n || factors.n_rows != stats.n_rows {
        return Err(SurError::InvalidOption(
            "the summaries do not match the system".into(),
        ));
    }
    let t = factors.n_rows;
    let mut offsets = vec![0usize];
    for regs in &regressors {
        offsets.push(offsets.last().unwrap() + regs.len());
    }
    let k = offsets[n];
    if stats.gram.dim() != (k + n, k + n)
        || stats.colsum.len() != k + n
        || stats.y_mean.len() != n
        || stats.y_m2.len() != n
        || stats.y_raw.len() != n
        || stats.y_max.len() != n
    {
        return Err(SurError::InvalidOption(
            "the pass-2 summary does not match the system".into(),
        ));
    }
    check_y_range(&names, &stats.y_max)?;
    let mut out = Vec::with_capacity(n);
    for i in 0..n {
        let ki = regressors[i].len();
        let rp = &factors.r[i];
        if rp.nrows() != ki + 1 || rp.ncols() != ki + 1 {
            return Err(SurError::InvalidOption(
                "the summaries do not match the system".into(),
            ));
        }
        if t <= ki {
            return Err(SurError::TooFewObservations {
                equation: names[i].clone(),
                n_obs: t,
                n_regressors: ki,
            });
        }
        // Column norms of [X_i | y_i] are the column norms of R (Q has orthonormal columns).
        let norms: Vec<f64> = (0..=ki)
            .map(|j| rp.column(j).dot(&rp.column(j)).sqrt())
            .collect();
        let yscale = if norms[ki] > 0.0 { norms[ki] } else { 1.0 };
        let mut rs = rp.clone();
        for j in 0..ki {
            if norms[j] > 0.0 {
                rs.column_mut(j).mapv_inplace(|v| v / norms[j]);
            }
        }
        rs.column_mut(ki).mapv_inplace(|v| v / yscale);
        check_rank(&names[i], &regressors[i], &rs, &norms[..ki], t)?;
        let r = rp.slice(s![..ki, ..ki]).to_owned();
        let z = rp.slice(s![..ki, ki]).to_owned();
        let rho = rp[[ki, ki]].abs();
        let s2: f64 = stats
            .colsum
            .slice(s![offsets[i]..offsets[i + 1]])
            .iter()
            .map(|v| v * v)
            .sum();
        out.push(EquationFactor {
            r,
            z,
            rho,
            spans_constant: (t as f64 - s2).abs() <= 1e-9 * t as f64,
            tss_centred: stats.y_m2[i],
            tss_raw: stats.y_raw[i],
            cond: cond_of_scaled(&rs, ki),
        });
    }
    let mut g = stats.gram.clone();
    symmetrize(&mut g);
    for i in 0..n {
        let (a, b) = (offsets[i], offsets[i + 1]);
        g.slice_mut(s![a..b, a..b]).assign(&Array2::eye(b - a));
        g.slice_mut(s![a..b, k + i]).fill(0.0);
        g.slice_mut(s![k + i, a..b]).fill(0.0);
        g[[k + i, k + i]] = 1.0;
    }
    Ok(Prepared {
        n_obs: t,
        names,
        regressors,
        offsets,
        factors: out,
        cross: CrossProducts::General { gram: g },
    })
}
