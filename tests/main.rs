//! Integration tests, compiled as one binary to keep link time down.

mod cohort_io;
mod cusum_arl;
mod federated;
mod gp_reference;
mod prospective;
mod server_rpc;
mod simulator;
mod support;
