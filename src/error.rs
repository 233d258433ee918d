//! Typed errors of the core. Every variant says what went wrong and what to fix, naming the
//! equation, the column and the row where there is one. The Python bindings map each variant to
//! its own exception class (see `python/blocksur/errors.py`).

use thiserror::Error;

/// Everything the core can refuse or fail at.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum SurError {
    /// No equations were given.
    #[error("the system has no equations: give at least one (y, X) pair")]
    EmptySystem,

    /// Shapes that do not fit together.
    #[error("equation '{equation}': {detail}")]
    ShapeMismatch { equation: String, detail: String },

    /// A NaN or infinity in the data.
    #[error(
        "equation '{equation}': {value} in {} at row {row}; remove or impute that row (the sample must be common to all equations)",
        match .column { Some(c) => format!("regressor '{c}'"), None => "the dependent variable".to_string() }
    )]
    NonFinite {
        equation: String,
        row: usize,
        column: Option<String>,
        value: String,
    },

    /// Not enough observations to estimate an equation.
    #[error(
        "equation '{equation}' has {n_regressors} regressors but only {n_obs} observations; \
         it needs more observations than regressors (drop regressors or add data)"
    )]
    TooFewObservations {
        equation: String,
        n_obs: usize,
        n_regressors: usize,
    },

    /// A regressor is (numerically) a linear combination of the earlier ones.
    #[error("equation '{equation}': regressor '{column}' {detail}; drop it or reparameterise")]
    Collinear {
        equation: String,
        column: String,
        detail: String,
    },

    /// Values of a magnitude that leaves double precision no room for their sums of squares.
    #[error("equation '{equation}': {detail}; rescale it to moderate units (divide or multiply by a power of ten: its coefficients scale with it)")]
    Scale { equation: String, detail: String },

    /// The cross-equation covariance cannot be inverted.
    #[error("{detail}")]
    SingularOmega {
        equations: Vec<String>,
        detail: String,
    },

    /// A restriction that cannot be imposed (index: its position, 0-based, when one is to blame).
    #[error("{}{detail}", match .index { Some(i) => format!("restriction {i} "), None => String::new() })]
    InvalidRestriction {
        index: Option<usize>,
        detail: String,
    },

    /// An option value outside its domain.
    #[error("{0}")]
    InvalidOption(String),

    /// The caller asked to stop (Ctrl-C).
    #[error("interrupted")]
    Interrupted,

    /// A failure inside LAPACK that the checks above did not foresee.
    #[error("linear algebra failure in {context}: {detail}")]
    Numerical { context: String, detail: String },
}

impl SurError {
    /// The name of the Python exception class this error maps to.
    pub fn kind(&self) -> &'static str {
        match self {
            SurError::EmptySystem => "EmptySystemError",
            SurError::ShapeMismatch { .. } => "ShapeMismatchError",
            SurError::NonFinite { .. } => "NonFiniteError",
            SurError::TooFewObservations { .. } => "TooFewObservationsError",
            SurError::Collinear { .. } => "CollinearityError",
            SurError::SingularOmega { .. } => "SingularOmegaError",
            SurError::Scale { .. } => "InputError",
            SurError::InvalidRestriction { .. } => "RestrictionError",
            SurError::InvalidOption(_) => "InvalidOptionError",
            SurError::Numerical { .. } => "NumericalError",
            SurError::Interrupted => "KeyboardInterrupt",
        }
    }

    pub(crate) fn numerical(context: &str, err: impl std::fmt::Display) -> Self {
        SurError::Numerical {
            context: context.to_string(),
            detail: err.to_string(),
        }
    }
}

pub type Result<T> = std::result::Result<T, SurError>;
