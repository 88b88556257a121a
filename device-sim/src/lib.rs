//! Plimsoll device side: everything a participant's device computes, and the
//! cohort simulator.
//!
//! - [`gp`]: the Gaussian-process engine (plain numerics; no runtime, no wire types).
//! - [`gp_ss`]: the shared prior's NLML and exact gradient on its state-space form, O(n).
//! - [`prior`]: the shared prior's parameter layout and the model it defines.
//! - [`training`]: local FedAvg steps and the centralised yardstick.
//! - [`personal`]: the personalised (retrospective) posterior and its bands.
//! - [`prospective`]: the exact state-space filter giving one-step-ahead predictive days.
//! - [`detect`]: the detector (guarded baseline, window-limited joint score, episodes,
//!   calibration).
//! - [`episode_flags`]: the device's flags: episodes with level, direction, signals and a
//!   reason with the study's odds.
//! - [`flags`]: the earlier day-by-day detectors (single-day, CUSUM, multi-signal), kept for
//!   their tests and benchmark; the device's flags no longer come from them.
//! - [`device_report`]: what a device writes about its participant (CSV, JSON, HTML).
//! - [`evaluate`]: detection methods compared against ground-truth events.
//! - [`cohort`]: the shared CSV format (reader, writer) and the simulator.
//! - [`omh_import`]: open mHealth (IEEE 1752.1) JSON data points of one participant to
//!   `daily.csv`.
//! - [`client`], [`wire`]: the gRPC side of a device.
//! - [`demo`]: the end-to-end demo.
//! - [`scheduler`]: federated training of a large in-process cohort with a bounded pool of
//!   devices (used by `plimsoll evaluate`).
//! - [`participate`]: one device taking part in a study run elsewhere.

pub mod client;
pub mod cohort;
pub mod demo;
pub mod detect;
pub mod device_report;
pub mod episode_flags;
pub mod evaluate;
pub mod flags;
pub mod gp;
pub mod gp_ss;
pub mod omh_import;
pub mod packets;
pub mod participate;
pub mod personal;
pub mod prior;
pub mod prospective;
pub mod retry;
pub mod scheduler;
pub mod secure;
pub mod signal;
pub mod training;
pub mod wire;
