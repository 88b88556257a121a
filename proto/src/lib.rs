//! Generated gRPC types and stubs for the `plimsoll.v1` package.
//!
//! Only the edge modules of the other crates (`server::wire`, `device_sim::wire`)
//! import from here; everything else works on the project's own types.

#[allow(missing_debug_implementations, clippy::all)]
pub mod v1 {
    tonic::include_proto!("plimsoll.v1");

    /// Encoded file descriptor set, served by gRPC reflection.
    pub const FILE_DESCRIPTOR_SET: &[u8] =
        include_bytes!(concat!(env!("OUT_DIR"), "/plimsoll_v1_descriptor.bin"));
}
