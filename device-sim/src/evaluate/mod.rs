//! Evaluation of detection methods on a cohort with ground-truth events.

pub mod metrics;
pub mod report;
