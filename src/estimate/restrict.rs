//! Linear restrictions R b = q across equations: their checks, the null-space form in which
//! they are imposed (b = b0 + N theta, one SVD per group of coefficients that restrictions
//! link), and the restricted step.

use ndarray::{s, Array1, Array2};

use super::Weight;
use crate::error::{Result, SurError};
use crate::kernels::{chol_lower, chol_solve, symmetrize, upper_inverse};
use crate::prepare::Prepared;

/// Linear restrictions R b = q on the stacked coefficients.
#[derive(Debug, Clone)]
pub struct Restrictions {
    pub r: Array2<f64>,
    pub q: Array1<f64>,
}

impl Restrictions {
    /// The same restrictions with each row of R (and q) scaled to unit length (`unit_row`).
    pub fn normalized(&self) -> Restrictions {
        let mut r = self.r.clone();
        let mut q = self.q.clone();
        for (i, mut row) in r.rows_mut().into_iter().enumerate() {
            if let Some((unit, rhs)) = unit_row(row.view(), q[i]) {
                row.assign(&unit);
                q[i] = rhs;
            }
        }
        Restrictions { r, q }
    }

    /// Checks R b = q to a tolerance relative to the size of the terms; a restriction that
    /// rounding kept from holding is reported rather than returned silently.
    /// `scales[j]` is a natural size of coefficient j (see `Prepared::coef_scales`).
    pub fn check_satisfied(&self, b: &Array1<f64>, scales: &[f64]) -> Result<()> {
        for (i, row) in self.r.rows().into_iter().enumerate() {
            let gap = row.dot(b) - self.q[i];
            let size: f64 = row
                .iter()
                .zip(b.iter().zip(scales))
                .map(|(a, (c, s))| a.abs() * (c.abs() + s))
                .sum::<f64>()
                + self.q[i].abs();
            // (a NaN gap fails too)
            let within = gap.abs() <= 1e-8 * size.max(f64::MIN_POSITIVE);
            if !within {
                return Err(SurError::InvalidRestriction {
                    index: Some(i),
                    detail: format!(
                        "could not be imposed accurately (R b - q = {} against terms of size {}): \
                         the coefficients it involves are on very different scales; rescale the \
                         regressors (e.g. income in thousands) and refit",
                        crate::kernels::fmt_num(gap),
                        crate::kernels::fmt_num(size)
                    ),
                });
            }
        }
        Ok(())
    }

    /// Checks shapes and finiteness, and that each restriction mentions a coefficient, adds
    /// information (is not implied by the earlier ones) and agrees with them.
    pub fn validate(&self, k: usize) -> Result<()> {
        let (m, kk) = self.r.dim();
        let bad =
            |index: Option<usize>, detail: String| SurError::InvalidRestriction { index, detail };
        if kk != k {
            return Err(bad(
                None,
                format!(
                    "the restriction matrix has {kk} columns but the system has {k} coefficients"
                ),
            ));
        }
        if self.q.len() != m {
            return Err(bad(
                None,
                format!("{m} restrictions but {} right-hand sides", self.q.len()),
            ));
        }
        if m == 0 {
            return Err(bad(None, "no restrictions were given".into()));
        }
        if m >= k {
            return Err(bad(
                None,
                format!("{m} restrictions on {k} coefficients leave nothing to estimate"),
            ));
        }
        if self.r.iter().chain(self.q.iter()).any(|v| !v.is_finite()) {
            return Err(bad(
                None,
                "the restrictions contain NaN or infinite values".into(),
            ));
        }
        // Gram-Schmidt on the rows, in order: a row that adds (almost) nothing is redundant when
        // its right-hand side agrees, inconsistent when it does not.
        let mut basis: Vec<(Array1<f64>, f64)> = Vec::new();
        for i in 0..m {
            let Some((mut v, mut rhs)) = unit_row(self.r.row(i), self.q[i]) else {
                return Err(bad(Some(i), "mentions no coefficient".into()));
            };
            for _ in 0..2 {
                for (u, qu) in &basis {
                    let c = u.dot(&v);
                    v.scaled_add(-c, u);
                    rhs -= c * qu;
                }
            }
            let nv = v.dot(&v).sqrt();
            if nv < 1e-10 {
                let scale = 1.0 + self.q.iter().fold(0.0f64, |a, b| a.max(b.abs()));
                return Err(if rhs.abs() <= 1e-9 * scale {
                    bad(
                        Some(i),
                        "is implied by the restrictions before it (redundant): remove it".into(),
                    )
                } else {
                    bad(Some(i), "contradicts the restrictions before it (inconsistent): no coefficients satisfy them all".into())
                });
            }
            basis.push((v / nv, rhs / nv));
        }
        Ok(())
    }
}

/// Restrictions solved in the coordinates of b, where they are stated and well scaled:
/// b = b0 + N theta with R b0 = q (minimum norm) and N an orthonormal basis of the null space of
/// R. In the orthonormal basis gamma = blockdiag(R_i) b, so delta = d0 + G theta with
/// G = blockdiag(R_i) N and d0 = blockdiag(R_i) b0 - z.
#[derive(Debug, Clone)]
pub(crate) struct NullSpace {
    pub(crate) r: Array2<f64>,
    pub(crate) b0: Array1<f64>,
    pub(crate) n: Array2<f64>,
    pub(crate) g: Array2<f64>,
    pub(crate) d0: Array1<f64>,
}

/// The pieces of a restricted fit: the null space and, from its last step, the QR factors of
/// F = L'G (W = L L'; F = G when W = I): R_F^-1 (p x p) and Q_F (K x p).
#[derive(Debug, Clone)]
pub(crate) struct RestrictedParts {
    pub(crate) space: NullSpace,
    pub(crate) theta: Array1<f64>,
    pub(crate) rf_inv: Array2<f64>,
    pub(crate) qf: Array2<f64>,
}

/// The coefficients a restriction of its own fixes (rows of R with one nonzero entry).
pub(crate) fn fixed_alone(r: &Array2<f64>) -> impl Iterator<Item = usize> + '_ {
    r.rows().into_iter().filter_map(|row| {
        let mut nz = row
            .iter()
            .enumerate()
            .filter(|(_, x)| **x != 0.0)
            .map(|(j, _)| j);
        match (nz.next(), nz.next()) {
            (Some(j), None) => Some(j),
            _ => None,
        }
    })
}

/// A restriction row and its right-hand side scaled to a row of unit length, or None for a
/// row of zeros: first by its largest magnitude, so that the squares of entries near 1e+-200
/// neither overflow (a row of 1e200s had read as zeros, "redundant") nor underflow ("mentions
/// no coefficient").
fn unit_row(row: ndarray::ArrayView1<f64>, q: f64) -> Option<(Array1<f64>, f64)> {
    let top = row.iter().fold(0.0f64, |a, v| a.max(v.abs()));
    if !(top > 0.0 && top.is_finite()) {
        return None;
    }
    let scaled = row.mapv(|v| v / top);
    let n = scaled.dot(&scaled).sqrt();
    Some((scaled / n, q / top / n))
}

/// The null-space form of normalized restrictions.
pub(crate) fn null_space(prep: &Prepared, rs: &Restrictions) -> Result<NullSpace> {
    let (m, k) = rs.r.dim();
    let dependent = || SurError::InvalidRestriction {
        index: None,
        detail: "are linearly dependent".into(),
    };
    // Coefficients no restriction mentions keep their own unit directions in N. The others
    // fall into groups that restrictions link (two coefficients in one restriction are in
    // one group), and each group gets the SVD null space of its own restrictions: a
    // direction of N never mixes coefficients that no restriction links, so a poorly
    // determined coefficient does not leak into the variance of a well-determined one
    // (one SVD over all of them had mixed the groups' directions arbitrarily).
    let involved: Vec<usize> = (0..k)
        .filter(|&j| rs.r.column(j).iter().any(|v| *v != 0.0))
        .collect();
    let free: Vec<usize> = (0..k).filter(|j| !involved.contains(j)).collect();
    let mut group: Vec<usize> = (0..k).collect();
    fn root(group: &mut [usize], mut j: usize) -> usize {
        while group[j] != j {
            group[j] = group[group[j]];
            j = group[j];
        }
        j
    }
    for row in rs.r.rows() {
        let mut first = None;
        for (j, v) in row.iter().enumerate() {
            if *v != 0.0 {
                let rj = root(&mut group, j);
                match first {
                    None => first = Some(rj),
                    Some(f) => group[rj] = f,
                }
            }
        }
    }
    let mut n = Array2::<f64>::zeros((k, k - m));
    for (c, &j) in free.iter().enumerate() {
        n[[j, c]] = 1.0;
    }
    let mut col = free.len();
    let roots: Vec<usize> = involved.iter().map(|&j| root(&mut group, j)).collect();
    let mut seen = Vec::new();
    for &g in &roots {
        if seen.contains(&g) {
            continue;
        }
        seen.push(g);
        let members: Vec<usize> = involved
            .iter()
            .zip(&roots)
            .filter(|(_, r)| **r == g)
            .map(|(j, _)| *j)
            .collect();
        let rows: Vec<usize> = (0..m)
            .filter(|&i| members.iter().any(|&j| rs.r[[i, j]] != 0.0))
            .collect();
        if rows.len() > members.len() || col + members.len() - rows.len() > k - m {
            return Err(dependent());
        }
        let rg =
            rs.r.select(ndarray::Axis(0), &rows)
                .select(ndarray::Axis(1), &members);
        let basis = crate::kernels::null_space(rg.view())?;
        for c in 0..(members.len() - rows.len()) {
            for (pos, &j) in members.iter().enumerate() {
                n[[j, col + c]] = basis[[pos, c]];
            }
        }
        col += members.len() - rows.len();
    }
    if col != k - m {
        return Err(dependent());
    }
    let ri = rs.r.select(ndarray::Axis(1), &involved);
    let mut rrt = ri.dot(&ri.t());
    symmetrize(&mut rrt);
    let l = chol_lower(crate::kernels::to_fortran(&rrt)).ok_or_else(dependent)?;
    let b0i = ri.t().dot(&chol_solve(&l, &rs.q)?);
    let mut b0 = Array1::<f64>::zeros(k);
    for (row, &j) in involved.iter().enumerate() {
        b0[j] = b0i[row];
    }
    let mut g = Array2::<f64>::zeros((k, k - m));
    let mut d0 = Array1::<f64>::zeros(k);
    for (i, f) in prep.factors.iter().enumerate() {
        let (a, b) = (prep.offsets[i], prep.offsets[i + 1]);
        g.slice_mut(s![a..b, ..])
            .assign(&f.r.dot(&n.slice(s![a..b, ..])));
        d0.slice_mut(s![a..b])
            .assign(&(f.r.dot(&b0.slice(s![a..b])) - &f.z));
    }
    Ok(NullSpace {
        r: rs.r.clone(),
        b0,
        n,
        g,
        d0,
    })
}

/// The restricted step: minimises the estimator's objective over delta = d0 + G theta,
/// given the unrestricted solution delta_u of W delta = h: (G'WG) theta = G'W (delta_u - d0).
///
/// Solved as the least-squares problem min ||L'(d0 + G theta - delta_u)|| (W = L L') by QR
/// of F = L'G, so the conditioning of G enters once, not squared as in the normal equations.
pub(crate) fn restrict(
    prep: &Prepared,
    delta_u: &Array1<f64>,
    w: &Weight,
    space: &NullSpace,
) -> Result<(Array1<f64>, RestrictedParts)> {
    let factor = crate::estimate::gls::weight_factor(prep, w)?;
    let l = factor.as_deref();
    let gap = delta_u - &space.d0;
    let (f, c) = match l {
        None => (space.g.clone(), gap),
        Some(l) => (
            crate::kernels::matmul(l.t(), space.g.view()),
            l.t().dot(&gap),
        ),
    };
    let (qf, rf) = crate::kernels::qr::thin_qr(crate::kernels::to_fortran(&f))?;
    let theta =
        crate::kernels::upper_solve(&rf, &qf.t().dot(&c)).map_err(|_| SurError::SingularOmega {
            equations: prep.names.clone(),
            detail: "the GLS weights are numerically singular on the coefficients the \
                 restrictions leave free: the estimated cross-equation covariance is (nearly) \
                 singular; use fewer equations, method='fgls', or omega='ledoit-wolf'"
                .into(),
        })?;
    let out = &space.d0 + &space.g.dot(&theta);
    let rf_inv = upper_inverse(&rf)?;
    Ok((
        out,
        RestrictedParts {
            space: space.clone(),
            theta,
            rf_inv,
            qf,
        },
    ))
}
