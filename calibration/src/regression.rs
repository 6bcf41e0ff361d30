//! Linear least squares and the errors of every fit (feature `fit`):
//! the bottom of the host-side fitting, used by [`crate::stats`] and
//! [`crate::fit`] alike (so neither imports the other in a loop).

pub mod linear;

pub use linear::{fit_linear, polynomial_design, LinearFit};

/// Why a least-squares fit was refused or failed.
#[derive(Debug, Clone, Copy, PartialEq)]
#[non_exhaustive]
pub enum FitError {
    /// Fewer observations than the model needs (`needed` is the minimum).
    TooFewObservations {
        /// Minimum number of observations.
        needed: usize,
        /// Number given.
        got: usize,
    },
    /// An input slice has the wrong length.
    LengthMismatch {
        /// Which input.
        what: &'static str,
        /// Expected length.
        expected: usize,
        /// Given length.
        got: usize,
    },
    /// An input value is NaN or infinite.
    NonFinite {
        /// Which input.
        what: &'static str,
        /// Index of the first bad value (row-major for a matrix: column-major
        /// storage index for nalgebra matrices).
        index: usize,
    },
    /// An uncertainty is zero, negative or not finite.
    BadUncertainty {
        /// Observation index.
        index: usize,
        /// The value given.
        value: f64,
    },
    /// The design (or the Jacobian at the solution) has dependent columns.
    RankDeficient {
        /// Numerical rank found.
        rank: usize,
        /// Number of parameters.
        params: usize,
    },
    /// The model returned NaN or infinity at the starting values.
    ModelNotFinite {
        /// Observation index of the first non-finite residual.
        index: usize,
    },
    /// Levenberg-Marquardt used its whole evaluation budget.
    NotConverged {
        /// Iterations done.
        iterations: usize,
        /// Weighted residual sum of squares reached.
        rss: f64,
    },
}

impl core::fmt::Display for FitError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            FitError::TooFewObservations { needed, got } => {
                write!(f, "too few observations: {got} given, at least {needed} needed")
            }
            FitError::LengthMismatch {
                what,
                expected,
                got,
            } => write!(f, "{what} has {got} values, expected {expected}"),
            FitError::NonFinite { what, index } => {
                write!(f, "{what}[{index}] is NaN or infinite")
            }
            FitError::BadUncertainty { index, value } => write!(
                f,
                "uncertainty sigma[{index}] = {value} must be positive and finite"
            ),
            FitError::RankDeficient { rank, params } => write!(
                f,
                "the model's {params} parameters are not all determined by the data (rank {rank})"
            ),
            FitError::ModelNotFinite { index } => write!(
                f,
                "the model is NaN or infinite at observation {index} for the starting values"
            ),
            FitError::NotConverged { iterations, rss } => write!(
                f,
                "least squares did not converge in {iterations} iterations (residual sum of squares {rss:e})"
            ),
        }
    }
}

impl std::error::Error for FitError {}

/// First non-finite value of `v`, as an error naming `what`.
pub(crate) fn check_finite(what: &'static str, v: &[f64]) -> Result<(), FitError> {
    match v.iter().position(|x| !x.is_finite()) {
        Some(index) => Err(FitError::NonFinite { what, index }),
        None => Ok(()),
    }
}

/// Every uncertainty must be positive and finite.
pub(crate) fn check_sigma(s: &[f64]) -> Result<(), FitError> {
    match s.iter().position(|x| !(x.is_finite() && *x > 0.0)) {
        Some(index) => Err(FitError::BadUncertainty {
            index,
            value: s[index],
        }),
        None => Ok(()),
    }
}
