//! blocksur: seemingly unrelated regressions (OLS, two-step FGLS, iterated FGLS) computed
//! blockwise, never forming the NT x NT covariance.
//!
//! The core knows nothing of Python: `cargo test` runs it alone. The bindings live in
//! `python.rs`, compiled only with the `python` feature (maturin turns it on).
//!
//! ```
//! use blocksur::{Equation, FitOptions, Method, Prepared, SystemData};
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

pub mod alloc;
pub mod batch;
pub mod cg;
pub mod error;
pub mod estimate;
mod gram;
pub mod linalg;
pub mod packed;
mod pool;
pub mod prepare;
mod small;
pub mod stream;
pub mod system;

#[cfg(feature = "python")]
mod python;

pub use error::{Result, SurError};
pub use estimate::{CovKind, Divisor, Estimate, FitOptions, Method, Restrictions};
pub use prepare::{CrossProducts, EquationFactor, Prepared};
pub use stream::{CrossStats, Pass2Basis, RowFactors, RowSummary};
pub use system::{Equation, SystemData};

// Large buffers on whole huge pages (see `alloc`): for the extension module and the crate's
// own tests; a Rust program linking the core keeps its own allocator.
#[cfg(any(feature = "python", test))]
#[global_allocator]
static GLOBAL: alloc::BigPageAlloc = alloc::BigPageAlloc;

// Link the BLAS/LAPACK implementation (system OpenBLAS).
extern crate blas_src;
extern crate openblas_src;

#[cfg(test)]
mod tests;
