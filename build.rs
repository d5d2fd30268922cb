//! Compiles `proto/` with the pure-Rust protox compiler (no system `protoc`),
//! generates prost messages, tonic client and server code, and proto3-JSON
//! serde impls, and writes the descriptor set that reflection serves.

use std::path::PathBuf;

use prost::Message as _;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protos = ["proto/keelson/v1/weights.proto"];
    println!("cargo:rerun-if-changed=proto");
    let fds = protox::compile(protos, ["proto"])?;
    let out = PathBuf::from(std::env::var("OUT_DIR")?);
    let bytes = fds.encode_to_vec();
    std::fs::write(out.join("keelson_descriptor.bin"), &bytes)?;

    // Without the `server` feature only the messages are generated (no tonic).
    let grpc = std::env::var_os("CARGO_FEATURE_SERVER").is_some();
    tonic_prost_build::configure().build_client(grpc).build_server(grpc).compile_fds(fds)?;
    pbjson_build::Builder::new().register_descriptors(&bytes)?.emit_fields().build(&[".keelson.v1"])?;
    Ok(())
}
