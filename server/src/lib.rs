//! Plimsoll aggregator: runs federated rounds over gRPC and keeps its state in
//! an embedded SQLite database.
//!
//! Architecture invariant: this crate has no dependency on the GP code. It
//! averages opaque named parameter vectors weighted by day counts and never
//! receives a raw observation.

pub mod error;
pub mod rounds;
pub mod service;
pub mod store;
pub mod study;
pub mod wire;

pub use error::AggregatorError;
pub use rounds::Coordinator;
pub use service::{RunningServer, serve};
pub use study::{LocalTraining, Optimizer, SignalLayout, StudyConfig};
