//! Integration tests, compiled as one binary to keep link time down.

mod cohort_io;
mod cusum_arl;
mod detect;
mod detection_stats;
mod device_identity;
mod episodes;
mod evaluation;
mod federated;
mod fhir_export;
mod flag_packets;
mod gp_reference;
mod load_short;
mod metrics;
mod pooled;
mod prospective;
mod python_device;
mod review_access;
mod review_browser;
mod review_login_limits;
mod review_support;
mod server_rpc;
mod simulator;
mod ss_likelihood;
mod subgroups;
mod support;
mod transport_tls;
