//! The input: a system of equations borrowed from the caller, and its validation.

use ndarray::{Array2, ArrayView1, ArrayView2, Axis};

use crate::error::{Result, SurError};

/// One equation y = X b + e, borrowed from the caller (any strides, C or Fortran order).
#[derive(Debug, Clone)]
pub struct Equation<'a> {
    pub name: String,
    pub y: ArrayView1<'a, f64>,
    pub x: ArrayView2<'a, f64>,
    /// One name per column of `x`.
    pub regressors: Vec<String>,
}

impl<'a> Equation<'a> {
    /// An equation with default regressor names x0, x1, ...
    pub fn new(name: impl Into<String>, y: ArrayView1<'a, f64>, x: ArrayView2<'a, f64>) -> Self {
        let regressors = (0..x.ncols()).map(|j| format!("x{j}")).collect();
        Equation {
            name: name.into(),
            y,
            x,
            regressors,
        }
    }

    /// An equation with the given regressor names (one per column of `x`).
    pub fn named(
        name: impl Into<String>,
        y: ArrayView1<'a, f64>,
        x: ArrayView2<'a, f64>,
        regressors: Vec<String>,
    ) -> Self {
        Equation {
            name: name.into(),
            y,
            x,
            regressors,
        }
    }

    /// The same equation with the given regressor names.
    pub fn with_regressors(mut self, names: Vec<String>) -> Self {
        self.regressors = names;
        self
    }

    pub fn n_regressors(&self) -> usize {
        self.x.ncols()
    }
}

/// The index of the first item whose key an earlier item already has: a plain scan for the
/// few names of a small system (hashing costs more than its whole check), a hash set for many.
fn first_duplicate<'k>(keys: impl ExactSizeIterator<Item = &'k str>) -> Option<usize> {
    let keys: Vec<&str> = keys.collect();
    if keys.len() <= 32 {
        return (1..keys.len()).find(|&i| keys[..i].contains(&keys[i]));
    }
    let mut seen = std::collections::HashSet::with_capacity(keys.len());
    keys.iter().position(|k| !seen.insert(*k))
}

/// Whether two regressor matrices hold the same values: the same view of the same memory, or
/// equal element by element.
pub(crate) fn same_matrix(a: &ArrayView2<f64>, b: &ArrayView2<f64>) -> bool {
    a.shape() == b.shape()
        && (std::ptr::eq(a.as_ptr(), b.as_ptr()) && a.strides() == b.strides() || a == b)
}

/// A system of equations observed on a common sample of T rows.
#[derive(Debug, Clone)]
pub struct SystemData<'a> {
    pub equations: Vec<Equation<'a>>,
}

impl<'a> SystemData<'a> {
    pub fn new(equations: Vec<Equation<'a>>) -> Self {
        SystemData { equations }
    }

    pub fn n_eq(&self) -> usize {
        self.equations.len()
    }

    /// Checks shapes, names and finiteness; returns T. The checks run in this order so that the
    /// first message a user sees is the most basic problem.
    pub fn validate(&self) -> Result<usize> {
        self.validate_chunk(0, true)
    }

    /// Validation of a block of rows that starts at `row_offset` of the whole sample (rows in
    /// messages count from the start of the sample). `whole` also requires T > K_i.
    pub fn validate_chunk(&self, row_offset: usize, whole: bool) -> Result<usize> {
        let t = self.validate_shapes(whole)?;
        for eq in &self.equations {
            check_finite(eq, row_offset)?;
        }
        Ok(t)
    }

    /// The shape and name checks of `validate_chunk`, without the scan for non-finite values
    /// (the in-memory data pass does that scan on its copy of each equation).
    pub fn validate_shapes(&self, whole: bool) -> Result<usize> {
        let first = self.equations.first().ok_or(SurError::EmptySystem)?;
        let t = first.y.len();
        let dup = first_duplicate(self.equations.iter().map(|e| e.name.as_str()));
        for (i, eq) in self.equations.iter().enumerate() {
            if dup == Some(i) {
                return Err(SurError::ShapeMismatch {
                    equation: eq.name.clone(),
                    detail: "the name is used by more than one equation; names must be unique"
                        .into(),
                });
            }
            let shape = |detail: String| SurError::ShapeMismatch {
                equation: eq.name.clone(),
                detail,
            };
            if eq.y.len() != t {
                return Err(shape(format!(
                    "the dependent variable has {} rows but equation '{}' has {t}; all equations must share one sample",
                    eq.y.len(),
                    first.name
                )));
            }
            if eq.x.nrows() != t {
                return Err(shape(format!(
                    "the regressor matrix has {} rows but the dependent variable has {t}",
                    eq.x.nrows()
                )));
            }
            if eq.x.ncols() == 0 {
                return Err(shape(
                    "the regressor matrix has no columns; give at least one regressor".into(),
                ));
            }
            if eq.regressors.len() != eq.x.ncols() {
                return Err(shape(format!(
                    "{} regressor names were given for {} columns",
                    eq.regressors.len(),
                    eq.x.ncols()
                )));
            }
            if let Some(j) = first_duplicate(eq.regressors.iter().map(|r| r.as_str())) {
                return Err(shape(format!(
                    "regressor name '{}' appears twice",
                    eq.regressors[j]
                )));
            }
            if whole && t <= eq.x.ncols() {
                return Err(SurError::TooFewObservations {
                    equation: eq.name.clone(),
                    n_obs: t,
                    n_regressors: eq.x.ncols(),
                });
            }
        }
        Ok(t)
    }

    /// True when every equation has the same regressor matrix (values, not names).
    pub fn identical_regressors(&self) -> bool {
        let x0 = &self.equations[0].x;
        self.equations[1..].iter().all(|eq| same_matrix(&eq.x, x0))
    }

    /// Residuals y_i - X_i b_i computed from the data (T x N), for stacked coefficients `coef`.
    pub fn residuals(&self, coef: &[f64]) -> Array2<f64> {
        let t = self.equations[0].y.len();
        let mut out = Array2::<f64>::zeros((t, self.n_eq()));
        let mut off = 0;
        for (i, eq) in self.equations.iter().enumerate() {
            let k = eq.x.ncols();
            let b = ArrayView1::from(&coef[off..off + k]);
            let fitted = eq.x.dot(&b);
            let mut col = out.column_mut(i);
            col.assign(&eq.y);
            col -= &fitted;
            off += k;
        }
        out
    }
}

/// The first non-finite value of an equation, by row (then y before the regressors).
pub(crate) fn check_finite(eq: &Equation, row_offset: usize) -> Result<()> {
    let first_bad = |v: ArrayView1<f64>| v.iter().position(|a| !a.is_finite());
    let mut worst: Option<(usize, Option<usize>)> = first_bad(eq.y.view()).map(|r| (r, None));
    for (j, col) in eq.x.axis_iter(Axis(1)).enumerate() {
        if let Some(r) = first_bad(col) {
            if worst.is_none_or(|(w, _)| r < w) {
                worst = Some((r, Some(j)));
            }
        }
    }
    match worst {
        None => Ok(()),
        Some((row, col)) => {
            let value = match col {
                None => eq.y[row],
                Some(j) => eq.x[[row, j]],
            };
            Err(SurError::NonFinite {
                equation: eq.name.clone(),
                row: row + row_offset,
                column: col.map(|j| eq.regressors[j].clone()),
                value: if value.is_nan() {
                    "NaN".into()
                } else {
                    format!("{value}")
                },
            })
        }
    }
}
