//! Host-side fitting (feature `fit`, `f64`, nalgebra).
//!
//! - [`linear`] (from [`crate::regression`], below [`crate::stats`]): linear
//!   least squares, weighted when uncertainties are given, with coefficient
//!   standard errors, residual SD and R^2.
//! - [`nonlinear`]: Levenberg-Marquardt, weighted, with parameter standard
//!   errors from the Jacobian at the solution.
//!
//! - [`product`]: product-model fitting from lab samples (`fit_single`,
//!   `fit_relaxation`, `fit_multivariate`, `compare_models`), statistics
//!   through the device's own estimate.
//! - [`chemo`]: ridge regression and PLS1 (scikit-learn's conventions).
//! - [`zoo`]: synthetic products for tests and benchmarks.
//!
//! The solvers are checked against the NIST Statistical Reference Datasets
//! (`calibration/tests/nist_strd.rs`). Calibration statistics and
//! cross-validation live in [`crate::stats`].

pub mod adjust;
pub mod chemo;
pub mod gate;
mod law;
pub mod nonlinear;
pub mod product;
pub mod rng;
pub mod zoo;

pub use crate::regression::linear;
pub(crate) use crate::regression::{check_finite, check_sigma};
pub use crate::regression::{fit_linear, polynomial_design, FitError, LinearFit};
pub use nonlinear::{
    central_differences, covariance_from_jacobian, fit_curve, levenberg_marquardt, LmOptions,
    NoGradient, NonlinearFit, Problem, Termination,
};
pub use product::{
    compare, compare_models, fit_multivariate, fit_relaxation, fit_single, synthetic_samples,
    Candidate, ChannelReading, CompareOptions, Comparison, Excluded, FitStatistics, IntervalModel,
    MixingFit, ModelComparison, MultivariateOptions, MvMethod, PairedTest, ProductFit,
    ProductFitError, RelaxationOptions, Sample, SampleResult, SingleOptions, SynthSpec,
};
pub use rng::SeededRng;
