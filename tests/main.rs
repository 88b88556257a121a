//! Integration tests, compiled as one binary to keep link time down.

mod server_rpc;
mod support;
