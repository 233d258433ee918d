//! blocksur: seemingly unrelated regressions (OLS, two-step FGLS, iterated FGLS) computed
//! blockwise, never forming the NT x NT covariance.
//!
//! The core knows nothing of Python: `cargo test` runs it alone. The bindings live in
//! `python/`, compiled only with the `python` feature (maturin turns it on). Dense linear
//! algebra comes from faer (or, with the `lapack` feature, a vendor LAPACK) through
//! `kernels`; parallel work runs on blocksur's own rayon pool (`runtime`).
//!
//! ```
//! use blocksur::{Equation, Estimation, FitOptions, Method, Prepared, SystemData};
//! use ndarray::{array, Array2};
//! let x = Array2::from_shape_fn((6, 2), |(t, j)| if j == 0 { 1.0 } else { t as f64 });
//! let y1 = array![1.0, 2.1, 2.9, 4.2, 5.0, 5.8];
//! let y2 = array![0.5, 0.4, 1.1, 0.9, 1.6, 1.4];
//! let x2 = Array2::from_shape_fn((6, 2), |(t, j)| if j == 0 { 1.0 } else { (t * t) as f64 });
//! let data = SystemData::new(vec![
//!     Equation::new("a", y1.view(), x.view()),
//!     Equation::new("b", y2.view(), x2.view()),
//! ]);
//! let prep = Prepared::new(&data).unwrap();
//! let fit = prep.estimate(&FitOptions { method: Method::IteratedFgls, ..Default::default() }).unwrap();
//! assert!(fit.converged);
//! ```

pub mod batch;
pub mod data;
pub mod error;
pub mod estimate;
pub(crate) mod kernels;
pub mod prepare;
pub mod runtime;
pub mod stream;

#[cfg(feature = "python")]
mod python;

pub use data::{Equation, SystemData};
pub use error::{Result, SurError};
pub use estimate::{
    fgls_from_data, CovKind, Divisor, Estimate, Estimation, FitOptions, Method, Restrictions,
};
pub use kernels::{backend_name, isa_name, kernels_isa_name};
pub use prepare::{CrossProducts, EquationFactor, Prepared};
pub use runtime::{get_threads, set_threads};
pub use stream::{CrossStats, Pass2Basis, RowFactors, RowSummary};

#[cfg(test)]
mod tests;
