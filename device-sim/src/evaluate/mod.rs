//! Evaluation of detection methods on a cohort with ground-truth events: the comparison
//! methods ([`methods`]), the run over a cohort ([`run`]), the metrics ([`metrics`]), the
//! report ([`report`]), the prior file ([`prior_file`]) and the `plimsoll evaluate` command
//! ([`command`]). Definitions of every metric and report key: `docs/evaluation.md`.

pub mod command;
pub mod compare;
pub mod methods;
pub mod metrics;
pub mod prior_file;
pub mod report;
pub mod run;
pub mod sweep;
