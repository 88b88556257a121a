//! Plimsoll aggregator: runs federated rounds over gRPC and keeps its state in
//! an embedded SQLite database.
//!
//! Architecture invariant: this crate has no dependency on the GP code. It
//! averages opaque named parameter vectors weighted by day counts; federated
//! training never sends it a raw observation. Flag packets ([`packets`]) are
//! the one exception, sent only by devices whose participant consented, and
//! hold numbers the device already computed: the aggregator stores and shows
//! them ([`review`]) and never fits or evaluates a model. The detector's
//! calibration ([`detection`]) sends it fixed-length arrays of sums and
//! counts, which it only validates, stores and adds up.

pub mod aggregate;
pub mod coverage;
pub mod db;
pub mod detection;
pub mod error;
pub mod fhir;
pub mod metrics;
pub mod packets;
pub mod presentation;
pub mod privacy;
pub mod review;
pub mod rounds;
pub mod secagg;
pub mod secrets;
pub mod secure_round;
pub mod service;
pub mod store;
pub mod study;
pub mod tls;
pub mod wire;

pub use error::AggregatorError;
pub use review::{RunningReview, ensure_demo_reviewer, serve_review, serve_review_with};
pub use rounds::{Coordinator, Enrollment};
pub use service::{RunningServer, serve, serve_with};
pub use study::{LocalTraining, Optimizer, SignalLayout, StudyConfig};
pub use tls::TlsIdentity;
