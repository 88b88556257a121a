//! Compiles `plimsoll/v1/*.proto` with the pure-Rust `protox` compiler, so no
//! system `protoc` is needed, and writes a file descriptor set for reflection.
use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let proto = "plimsoll/v1/aggregator.proto";
    println!("cargo:rerun-if-changed={proto}");
    let fds = protox::compile([proto], ["."])?;
    let out_dir = PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(
        out_dir.join("plimsoll_v1_descriptor.bin"),
        prost::Message::encode_to_vec(&fds),
    )?;
    tonic_prost_build::configure().compile_fds(fds)?;
    Ok(())
}
