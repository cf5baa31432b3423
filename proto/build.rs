//! Compiles the wire contract with protox (pure Rust, no protoc on the machine) and generates the tonic code.
use prost::Message;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let proto = "proto/framewise/v1/framewise.proto";
    println!("cargo:rerun-if-changed={proto}");
    let fds = protox::compile([proto], ["proto"])?;
    let out = std::path::PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(out.join("framewise_v1_descriptor.bin"), fds.encode_to_vec())?;
    tonic_prost_build::configure()
        .build_client(true)
        .build_server(true)
        // Frame pixels as `Bytes`: decoding slices the received buffer instead of copying the frame, and
        // a client can send the same frame many times without copying it.
        .bytes(".framewise.v1.Frame.data")
        .compile_fds(fds)?;
    Ok(())
}
