//! Gaussian-process regression on a one-dimensional time axis (days): kernels, a jittered
//! Cholesky factorisation, the marginal likelihood with its gradient, an optional hyperprior,
//! and the minimisers used to fit hyperparameters.
//!
//! The module is plain numerics: it depends only on `nalgebra`, `thiserror` and `std`, and knows
//! nothing about the wire format or the runtime. All hyperparameters are exchanged as natural
//! logarithms so that any real vector is a valid parameter setting and the optimisers need no
//! constraints (Rasmussen & Williams 2006, §5.4.1).
//!
//! Main entry points: [`GpRegression::nlml_grad`] (objective for fitting),
//! [`GpRegression::posterior`] then [`Posterior::predict`] (prediction), and the minimisers
//! [`lbfgs`], [`adam`] and [`sgd`].

mod cholesky;
mod hyperprior;
mod kernel;
mod model;
mod optim;

pub use cholesky::cholesky_with_jitter;
pub use hyperprior::LogNormalPrior;
pub use kernel::Kernel;
pub use model::{GpRegression, Posterior, Predictive};
pub use optim::{AdamConfig, LbfgsConfig, OptimResult, adam, lbfgs, sgd};

/// Everything that can go wrong in the GP engine.
#[derive(Debug, thiserror::Error)]
pub enum GpError {
    /// A covariance matrix stayed non-positive-definite after the bounded jitter escalation of
    /// [`cholesky_with_jitter`]. `max_jitter` is the largest diagonal jitter that was tried
    /// (0 when the matrix had a non-positive mean diagonal and no jitter scale could be formed).
    #[error(
        "{n}x{n} covariance matrix is not positive definite, even with diagonal jitter up to {max_jitter:e}"
    )]
    NotPositiveDefinite {
        /// Matrix dimension.
        n: usize,
        /// Largest jitter added to the diagonal before giving up.
        max_jitter: f64,
    },
    /// Inputs with inconsistent lengths or dimensions; the message says which.
    #[error("shape mismatch: {0}")]
    Shape(String),
    /// A NaN or infinity in inputs, hyperparameters or an objective value; the message says where.
    #[error("non-finite value: {0}")]
    NonFinite(String),
    /// An optimiser could not make progress (e.g. no step satisfied the line search).
    #[error("optimiser failed: {0}")]
    Optimizer(String),
}

/// Result type of the GP engine.
pub type Result<T> = std::result::Result<T, GpError>;
