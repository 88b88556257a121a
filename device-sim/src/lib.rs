//! Plimsoll device side: everything a participant's device computes, and the
//! cohort simulator.
//!
//! - [`gp`]: the Gaussian-process engine (plain numerics; no runtime, no wire types).
//! - [`prior`]: the shared prior's parameter layout and the model it defines.
//! - [`training`]: local FedAvg steps and the centralised yardstick.
//! - [`personal`]: the personalised posterior and its bands.
//! - [`cohort`]: the shared CSV format (reader, writer) and the simulator.
//! - [`client`], [`wire`]: the gRPC side of a device.
//! - [`demo`]: the end-to-end demo.

pub mod client;
pub mod cohort;
pub mod demo;
pub mod device_report;
pub mod evaluate;
pub mod flags;
pub mod gp;
pub mod packets;
pub mod personal;
pub mod prior;
pub mod prospective;
pub mod signal;
pub mod training;
pub mod wire;
