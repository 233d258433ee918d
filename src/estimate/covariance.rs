//! Covariances of the coefficients (classical, HC0, HC1; unrestricted and restricted), their
//! diagonal without the K x K matrix where the kind allows it (panels of L^-1), standard
//! errors, and variances of predicted means.

use ndarray::{s, Array1, Array2, ShapeBuilder};

use super::omega::invert_omega;
use super::restrict::{fixed_alone, RestrictedParts};
use super::{matrix_free_unsupported, needs_full_preparation, CovKind, Estimate, Weight};
use crate::data::SystemData;
use crate::error::{Result, SurError};
use crate::kernels::{gram, inverse_columns, matmul, solve_triangular, symmetrize, upper_inverse};
use crate::prepare::{CrossProducts, Prepared};

/// diag(A B A') into `out`, for a square block B.
fn block_variances(a: &Array2<f64>, b: &Array2<f64>, mut out: ndarray::ArrayViewMut1<f64>) {
    let ab = a.dot(b);
    for (j, o) in out.iter_mut().enumerate() {
        *o = ab.row(j).dot(&a.row(j));
    }
}

/// Columns of whole equations per panel of L^-1 in `coef_variances` (a K x PANEL block).
const PANEL: usize = 256;

/// Classical covariance of gamma, unrestricted: W^-1 for GLS, omega_ij Q_i'Q_j for OLS.
pub(crate) fn classical_gamma_cov(prep: &Prepared, est: &Estimate) -> Result<Array2<f64>> {
    if matches!(prep.cross, CrossProducts::MatrixFree { .. }) {
        return Err(matrix_free_unsupported("the full covariance matrix"));
    }
    if !matches!(est.weight, Weight::Identity) {
        return crate::estimate::gls::weight_inverse(prep, &est.weight);
    }
    let k = prep.n_coef();
    let n = prep.n_eq();
    let mut v = Array2::<f64>::zeros((k, k));
    for i in 0..n {
        for j in 0..n {
            let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
            let (c, d) = (prep.offsets[j], prep.offsets[j + 1]);
            let mut blk = v.slice_mut(s![a..b, c..d]);
            match &prep.cross {
                CrossProducts::General { gram } => {
                    blk.assign(&gram.slice(s![a..b, c..d]));
                    blk *= est.omega[[i, j]];
                }
                CrossProducts::SharedRegressors { .. } => blk.diag_mut().fill(est.omega[[i, j]]),
                CrossProducts::MatrixFree { .. } => unreachable!(),
                CrossProducts::ResidualsOnly { .. } => {
                    return Err(needs_full_preparation("the full OLS covariance"))
                }
            }
        }
    }
    Ok(v)
}

/// Covariance of gamma (K x K) of the given kind. Robust kinds need the data.
pub(crate) fn gamma_covariance(
    prep: &Prepared,
    est: &Estimate,
    kind: CovKind,
    data: Option<&SystemData>,
) -> Result<Array2<f64>> {
    crate::estimate::check_matches(prep, Some(est), data)?;
    let v = match kind {
        CovKind::Classical => classical_gamma_cov(prep, est)?,
        CovKind::Hc0 | CovKind::Hc1 => {
            let data = data.ok_or_else(|| {
                SurError::InvalidOption("a robust covariance needs the data".into())
            })?;
            let meat = score_outer_product(prep, est, data)?;
            let mut v = match &est.weight {
                Weight::Identity => meat,
                w => {
                    let left = crate::estimate::gls::weight_solve(prep, w, &meat)?;
                    let mut v = crate::estimate::gls::weight_solve(prep, w, &left.t().to_owned())?;
                    symmetrize(&mut v);
                    v
                }
            };
            if kind == CovKind::Hc1 {
                let t = prep.n_obs as f64;
                let kbar = prep.n_coef() as f64 / prep.n_eq() as f64;
                v *= t / (t - kbar);
            }
            v
        }
    };
    Ok(v)
}

/// Covariance of a restricted fit, in b coordinates. With b = b0 + N theta,
/// theta = A^-1 G'(h - W d0), A = G'WG = R_F'R_F (F = L'G = Q_F R_F) and h the score of the
/// unrestricted step (W delta_u = h): A^-1 G' = R_F^-1 H' with H = L^-T Q_F (Q_F when W = I),
/// so Cov(b) = P (H' B H) P', P = N R_F^-1 and B = Cov(h): M for classical GLS (then
/// H'BH = I and Cov(b) = P P'), omega_ij Q_i'Q_j for classical OLS, the HC0 meat for the
/// robust kinds. The conditioning of the regressors enters once, through R_F^-1 (forming
/// A^-1 G'BG A^-1 from A^-1 had squared it: standard errors of nearly collinear, restricted
/// equations off by percents).
pub(crate) fn restricted_covariance(
    prep: &Prepared,
    est: &Estimate,
    p: &RestrictedParts,
    kind: CovKind,
    data: Option<&SystemData>,
) -> Result<Array2<f64>> {
    let (pmat, middle) = restricted_factors(prep, est, p, kind, data)?;
    let mut out = match middle {
        None => matmul(pmat.view(), pmat.t()),
        Some(c) => matmul(matmul(pmat.view(), c.view()).view(), pmat.t()),
    };
    // a coefficient fixed by a restriction of its own has exactly zero (co)variance
    for j in fixed_alone(&p.space.r) {
        out.row_mut(j).fill(0.0);
        out.column_mut(j).fill(0.0);
    }
    symmetrize(&mut out);
    Ok(out)
}

/// Standard errors of a restricted fit from the factors of its covariance, without forming
/// it: se_j = s_j sqrt(p_j' C p_j / s_j^2) for row p_j of P (C = H'BH, or I), s_j the row's
/// largest magnitude. A regressor in units of 1e+-200 has a row of P near 1e-+200, whose
/// squares the covariance matrix cannot hold (se had come out 0 or inf); a coefficient
/// fixed by a restriction of its own has se 0, as its row and column of the covariance.
pub(crate) fn restricted_standard_errors(
    prep: &Prepared,
    est: &Estimate,
    p: &RestrictedParts,
    kind: CovKind,
    data: Option<&SystemData>,
) -> Result<Array1<f64>> {
    let (mut pmat, middle) = restricted_factors(prep, est, p, kind, data)?;
    let mut size = Array1::<f64>::zeros(pmat.nrows());
    for (mut row, s) in pmat.rows_mut().into_iter().zip(size.iter_mut()) {
        *s = row.iter().fold(0.0f64, |a, v| a.max(v.abs()));
        if *s > 0.0 && s.is_finite() {
            let inv = 1.0 / *s;
            row.mapv_inplace(|v| v * inv);
        }
    }
    let pc = middle.as_ref().map(|c| matmul(pmat.view(), c.view()));
    let mut out = Array1::from_iter((0..pmat.nrows()).map(|j| {
        let q = match &pc {
            None => pmat.row(j).dot(&pmat.row(j)),
            Some(pc) => pc.row(j).dot(&pmat.row(j)),
        };
        size[j] * q.max(0.0).sqrt()
    }));
    for j in fixed_alone(&p.space.r) {
        out[j] = 0.0;
    }
    Ok(out)
}

/// The factors of `restricted_covariance`: P = N R_F^-1 (K x p) and H'BH (p x p; None when
/// it is the identity, classical GLS), Cov(b) = P (H'BH) P'.
pub(crate) fn restricted_factors(
    prep: &Prepared,
    est: &Estimate,
    p: &RestrictedParts,
    kind: CovKind,
    data: Option<&SystemData>,
) -> Result<(Array2<f64>, Option<Array2<f64>>)> {
    let pmat = matmul(p.space.n.view(), p.rf_inv.view());
    let middle = match (kind, &est.weight) {
        (CovKind::Classical, Weight::Identity) => Some(classical_gamma_cov(prep, est)?),
        (CovKind::Classical, _) => None,
        (CovKind::Hc0 | CovKind::Hc1, _) => {
            let data = data.ok_or_else(|| {
                SurError::InvalidOption("a robust covariance needs the data".into())
            })?;
            let mut meat = score_outer_product(prep, est, data)?;
            if kind == CovKind::Hc1 {
                let t = prep.n_obs as f64;
                meat *= t / (t - prep.n_coef() as f64 / prep.n_eq() as f64);
            }
            Some(meat)
        }
    };
    let middle = match middle {
        None => None,
        Some(b) => {
            let h = match crate::estimate::gls::weight_factor(prep, &est.weight)? {
                None => p.qf.clone(),
                // H = L^-T Q_F
                Some(l) => solve_triangular(l.view(), true, true, p.qf.view()),
            };
            let mut c = matmul(h.t(), matmul(b.view(), h.view()).view());
            symmetrize(&mut c);
            Some(c)
        }
    };
    Ok((pmat, middle))
}

/// For classical GLS with a Cholesky factor L of M: `visit(i, x_i)` for
/// every equation i, x_i the rows from the equation's first of the columns of U = L^-1 that
/// belong to it (U is zero above them), so (M^-1)_ii = x_i' x_i. U is solved a panel of
/// whole equations at a time (columns c..d of U solve L[c.., c..] X = I[c.., c..d]): K^3/3
/// flops in all, as one trtri, but only a K x PANEL block in memory. Ok(false), visiting
/// nothing, for a weight without such a factor.
pub(crate) fn inverse_panels(
    prep: &Prepared,
    est: &Estimate,
    mut visit: impl FnMut(usize, ndarray::ArrayView2<f64>),
) -> Result<bool> {
    let Weight::Chol(l) = &est.weight else {
        return Ok(false);
    };
    // the panels: (first equation, one past the last)
    let n = prep.n_eq();
    let mut panels = Vec::new();
    let mut first = 0;
    while first < n {
        let c = prep.offsets[first];
        let mut last = first + 1;
        while last < n && prep.offsets[last + 1] - c <= PANEL {
            last += 1;
        }
        panels.push((first, last));
        first = last;
    }
    // large factors: as many panels at a time as the pool has threads, each solved on one
    // thread (a panel's solve threaded by the backend waited in its barriers on a shared host);
    // small ones: one panel after the other
    let k = prep.n_coef();
    let at_once =
        if (k as f64).powi(3) >= PARALLEL_PANELS_FLOPS && crate::runtime::parallel_allowed() {
            crate::runtime::get_threads()
        } else {
            1
        };
    for group in panels.chunks(at_once) {
        let solve = |&(first, last): &(usize, usize)| -> Result<Array2<f64>> {
            let (c, d) = (prep.offsets[first], prep.offsets[last]);
            if at_once > 1 {
                crate::runtime::sequential(|| inverse_columns(l, c, d))
            } else {
                inverse_columns(l, c, d)
            }
        };
        let xs: Vec<Result<Array2<f64>>> = if at_once > 1 {
            use rayon::prelude::*;
            crate::runtime::install(|| group.par_iter().with_max_len(1).map(solve).collect())
        } else {
            group.iter().map(solve).collect()
        };
        for (&(first, last), x) in group.iter().zip(xs) {
            let x = x?;
            let c = prep.offsets[first];
            for i in first..last {
                let (a, b) = (prep.offsets[i] - c, prep.offsets[i + 1] - c);
                visit(i, x.slice(s![a.., a..b]));
            }
        }
    }
    Ok(true)
}

/// K^3 above which the panels of L^-1 are solved several at a time.
const PARALLEL_PANELS_FLOPS: f64 = 1e9;

/// Variances of the predicted means x'b_i for new regressor rows (`xs[i]`: m x K_i, the same
/// m for every equation), of the covariance kind given, without forming x V_ii x' from the
/// covariance matrix: along a nearly collinear direction of X_i that product cancels (V_ii
/// large, the variance small) and had lost three digits at condition 7e6. Here u = R_i^-T x
/// (the conditioning of X_i taken out by one triangular solve) meets the covariance of
/// gamma: classical GLS as |L^-1 panel u|^2, classical OLS as omega_ii |u|^2, the rest as
/// u' C_ii u; restricted fits as w' C w with w = P_i' x (P = N R_F^-1).
pub(crate) fn prediction_variances(
    prep: &Prepared,
    est: &Estimate,
    kind: CovKind,
    data: Option<&SystemData>,
    xs: &[ndarray::ArrayView2<f64>],
) -> Result<Vec<Array1<f64>>> {
    crate::estimate::check_matches(prep, Some(est), data)?;
    let n = prep.n_eq();
    if xs.len() != n || xs.iter().enumerate().any(|(i, x)| x.ncols() != prep.k(i)) {
        return Err(SurError::InvalidOption(
            "new regressors: one m x K_i array per equation".into(),
        ));
    }
    let quad = |w: &Array2<f64>, c: &Array2<f64>| -> Array1<f64> {
        // diag(w' C w) for the columns of w
        let cw = c.dot(w);
        Array1::from_iter(
            w.columns()
                .into_iter()
                .zip(cw.columns())
                .map(|(a, b)| a.dot(&b)),
        )
    };
    if let Some(p) = &est.restricted {
        let (pmat, middle) = restricted_factors(prep, est, p, kind, data)?;
        return Ok((0..n)
            .map(|i| {
                let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
                // w = P_i' x for each new row (p x m)
                let w = pmat.slice(s![a..b, ..]).t().dot(&xs[i].t());
                match &middle {
                    None => w.map_axis(ndarray::Axis(0), |c| c.dot(&c)),
                    Some(c) => quad(&w, c),
                }
            })
            .collect());
    }
    // u = R_i^-T x' (K_i x m) per equation
    let us: Vec<Array2<f64>> = (0..n)
        .map(|i| {
            let r = &prep.factors[i].r;
            if (0..r.nrows()).any(|j| r[[j, j]] == 0.0 || !r[[j, j]].is_finite()) {
                return Err(SurError::numerical(
                    "prediction variances",
                    "singular regressor factor",
                ));
            }
            Ok(solve_triangular(r.view(), false, true, xs[i].t()))
        })
        .collect::<Result<_>>()?;
    let sumsq = |u: &Array2<f64>| u.map_axis(ndarray::Axis(0), |c| c.dot(&c));
    if kind == CovKind::Classical {
        if matches!(prep.cross, CrossProducts::MatrixFree { .. }) {
            return Err(matrix_free_unsupported("prediction standard errors"));
        }
        let mut out = vec![Array1::zeros(0); n];
        if inverse_panels(prep, est, |i, x| out[i] = sumsq(&x.dot(&us[i])))? {
            return Ok(out);
        }
        if matches!(est.weight, Weight::Identity) {
            // omega_ii Q_i'Q_i = omega_ii I
            return Ok(us
                .iter()
                .enumerate()
                .map(|(i, u)| sumsq(u) * est.omega[[i, i]])
                .collect());
        }
    }
    let v = gamma_covariance(prep, est, kind, data)?;
    Ok(us
        .iter()
        .enumerate()
        .map(|(i, u)| {
            let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
            quad(u, &v.slice(s![a..b, a..b]).to_owned())
        })
        .collect())
}

/// Sum over rows of s_t s_t', s_t stacking Q_i[t,:]' u_t[i], with u_t = Omega^-1 e_t for GLS
/// and u_t = e_t for OLS. One pass over the data in row blocks; Q_i = X_i R_i^-1.
pub(crate) fn score_outer_product(
    prep: &Prepared,
    est: &Estimate,
    data: &SystemData,
) -> Result<Array2<f64>> {
    let t = prep.n_obs;
    let k = prep.n_coef();
    let n = prep.n_eq();
    crate::estimate::check_matches(prep, Some(est), Some(data))?;
    data.validate_chunk(0, false)?;
    let sigma_inv = match &est.weight {
        Weight::Identity => None,
        _ => Some(invert_omega(&est.omega, &prep.names, t, &prep.y_scales())?.0),
    };
    let rinv: Vec<Array2<f64>> = prep
        .factors
        .iter()
        .map(|f| upper_inverse(&f.r))
        .collect::<Result<_>>()?;
    let mut meat = Array2::<f64>::zeros((k, k));
    let block = 2048usize;
    let mut start = 0;
    while start < t {
        let end = (start + block).min(t);
        let rows = end - start;
        let mut e = Array2::<f64>::zeros((rows, n));
        for (i, eq) in data.equations.iter().enumerate() {
            let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
            let x = eq.x.slice(s![start..end, ..]);
            let fit = x.dot(&est.coef.slice(s![a..b]));
            let mut col = e.column_mut(i);
            col.assign(&eq.y.slice(s![start..end]));
            col -= &fit;
        }
        let u = match &sigma_inv {
            None => e,
            Some(si) => matmul(e.view(), si.view()),
        };
        let mut sc = Array2::<f64>::zeros((rows, k).f());
        for (i, eq) in data.equations.iter().enumerate() {
            let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
            let q = eq.x.slice(s![start..end, ..]).dot(&rinv[i]);
            let mut dst = sc.slice_mut(s![.., a..b]);
            dst.assign(&q);
            for (mut row, ui) in dst.rows_mut().into_iter().zip(u.column(i)) {
                row *= *ui;
            }
        }
        meat += &gram(sc.view());
        start = end;
    }
    Ok(meat)
}

/// Covariance of the coefficients b (K x K): blockdiag(R_i^-1) Cov(gamma) blockdiag(R_i^-T).
pub(crate) fn coef_covariance_of(
    prep: &Prepared,
    est: &Estimate,
    kind: CovKind,
    data: Option<&SystemData>,
) -> Result<Array2<f64>> {
    if let Some(p) = &est.restricted {
        crate::estimate::check_matches(prep, Some(est), data)?;
        return restricted_covariance(prep, est, p, kind, data);
    }
    let v = gamma_covariance(prep, est, kind, data)?;
    let rinv: Vec<Array2<f64>> = prep
        .factors
        .iter()
        .map(|f| upper_inverse(&f.r))
        .collect::<Result<_>>()?;
    let left = block_left_multiply(prep, &rinv, &v);
    let mut out = block_left_multiply(prep, &rinv, &left.t().to_owned());
    symmetrize(&mut out);
    Ok(out)
}

/// Variances of the coefficients b: the diagonal of `coef_covariance_of` without forming
/// the K x K covariance when the kind allows it.
///
/// Classical GLS: with M = L L' and U = L^-1 (one triangular inverse, K^3/3 flops),
/// (M^-1)_ii = U_i' U_i for the columns U_i of equation i (zero above its first row), so
/// Var(b_i) = column sums of squares of U_i R_i^-T. Classical OLS and shared regressors need
/// only the diagonal blocks omega_ii Q_i'Q_i (resp. omega_ii I). Robust kinds and
/// restricted fits take the diagonal of the full covariance (their K x K products remain).
pub(crate) fn coef_variances(
    prep: &Prepared,
    est: &Estimate,
    kind: CovKind,
    data: Option<&SystemData>,
) -> Result<Array1<f64>> {
    crate::estimate::check_matches(prep, Some(est), data)?;
    if let Some(p) = &est.restricted {
        return Ok(restricted_covariance(prep, est, p, kind, data)?
            .diag()
            .to_owned());
    }
    let rinv: Vec<Array2<f64>> = prep
        .factors
        .iter()
        .map(|f| upper_inverse(&f.r))
        .collect::<Result<_>>()?;
    variances_with(prep, est, kind, data, &rinv)
}

/// The variances of `coef_variances` with R_i^-1 given per equation (`rinv`): those of
/// b or, given the inverse factors of the column-scaled regressors, of b_j times the norm
/// of column j.
pub(crate) fn variances_with(
    prep: &Prepared,
    est: &Estimate,
    kind: CovKind,
    data: Option<&SystemData>,
    rinv: &[Array2<f64>],
) -> Result<Array1<f64>> {
    let mut out = Array1::<f64>::zeros(prep.n_coef());
    if kind == CovKind::Classical {
        if matches!(prep.cross, CrossProducts::MatrixFree { .. }) {
            return Err(matrix_free_unsupported("the covariance matrix"));
        }
        let offsets = &prep.offsets;
        let mut t = Vec::new();
        let visited = inverse_panels(prep, est, |i, x| {
            let ki = x.ncols();
            if ki > 16 {
                let v = x.dot(&rinv[i].t());
                for (j, col) in v.columns().into_iter().enumerate() {
                    out[offsets[i] + j] = col.dot(&col);
                }
                return;
            }
            // column j of x R_i^-T is sum_c x[:, c] R_i^-1[j, c] (c >= j): narrow blocks
            // without a BLAS call per equation
            t.clear();
            t.resize(x.nrows(), 0.0);
            for j in 0..ki {
                t.iter_mut().for_each(|v| *v = 0.0);
                for c in j..ki {
                    let f = rinv[i][[j, c]];
                    for (tv, xv) in t.iter_mut().zip(x.column(c)) {
                        *tv += f * xv;
                    }
                }
                out[offsets[i] + j] = crate::kernels::dot(&t, &t);
            }
        })?;
        if visited {
            return Ok(out);
        }
        for (i, ri) in rinv.iter().enumerate() {
            let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
            let w = est.omega[[i, i]];
            let blk = match (&est.weight, &prep.cross) {
                (Weight::Identity, CrossProducts::General { gram }) => {
                    gram.slice(s![a..b, a..b]).mapv(|g| g * w)
                }
                _ => Array2::from_diag_elem(b - a, w),
            };
            block_variances(ri, &blk, out.slice_mut(s![a..b]));
        }
        return Ok(out);
    }
    let v = gamma_covariance(prep, est, kind, data)?;
    for (i, ri) in rinv.iter().enumerate() {
        let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
        block_variances(
            ri,
            &v.slice(s![a..b, a..b]).to_owned(),
            out.slice_mut(s![a..b]),
        );
    }
    Ok(out)
}

/// Standard errors of the coefficients b: square roots of `coef_variances`, with a
/// variance that rounding leaves a hair below zero (a coefficient a restriction fixes) read
/// as zero.
///
/// Unrestricted fits take them from the column-scaled problem, se(b_j) = se(b_j |x_j|) /
/// |x_j| (|x_j| the norm of regressor j, the norm of column j of R_i): a regressor in units
/// of 1e+-200 has a standard error near 1e-+200 whose square is beyond double precision,
/// and squaring had given 0 or inf.
pub(crate) fn coef_standard_errors(
    prep: &Prepared,
    est: &Estimate,
    kind: CovKind,
    data: Option<&SystemData>,
) -> Result<Array1<f64>> {
    if let Some(p) = &est.restricted {
        crate::estimate::check_matches(prep, Some(est), data)?;
        return restricted_standard_errors(prep, est, p, kind, data);
    }
    let plain = coef_variances(prep, est, kind, data)?;
    // variances that are all well inside double precision's range (the usual case) serve
    // as they are; the column-scaled problem only where one is near it or beyond
    let safe = |v: &f64| v.abs() > 1e-280 && v.abs() < 1e280;
    if plain.iter().all(safe) {
        return Ok(plain.mapv_into(|v| v.max(0.0).sqrt()));
    }
    let mut norms = Vec::with_capacity(prep.n_coef());
    let mut rinv = Vec::with_capacity(prep.n_eq());
    for f in &prep.factors {
        let mut rs = f.r.clone();
        for mut col in rs.columns_mut() {
            let nj = crate::kernels::scaled_norm(&col.to_vec());
            norms.push(nj);
            if nj > 0.0 && nj.is_finite() {
                col.mapv_inplace(|v| v / nj);
            }
        }
        rinv.push(upper_inverse(&rs)?);
    }
    let v = variances_with(prep, est, kind, data, &rinv)?;
    Ok(Array1::from_iter(
        v.iter().zip(&norms).map(|(v, n)| v.max(0.0).sqrt() / n),
    ))
}

pub(crate) fn block_left_multiply(
    prep: &Prepared,
    blocks: &[Array2<f64>],
    v: &Array2<f64>,
) -> Array2<f64> {
    let mut out = Array2::<f64>::zeros(v.dim());
    for (i, bi) in blocks.iter().enumerate() {
        let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
        out.slice_mut(s![a..b, ..])
            .assign(&bi.dot(&v.slice(s![a..b, ..])));
    }
    out
}
