//! Integration tests, compiled as one binary to keep link time down.

mod cohort_io;
mod federated;
mod gp_reference;
mod server_rpc;
mod simulator;
mod support;
