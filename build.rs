//! Compiles the wire contract in `proto/` with a pure-Rust protobuf compiler, so no
//! system `protoc` is needed, and the vendored ONNX schema (prost messages only).

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protos = ["proto/pollard/v1/model.proto", "proto/pollard/v1/pollard.proto"];
    for p in &protos {
        println!("cargo:rerun-if-changed={p}");
    }
    println!("cargo:rerun-if-changed=proto");
    let fds = protox::compile(protos, ["proto"])?;
    // The encoded descriptors serve gRPC server reflection.
    let out = std::path::PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(out.join("pollard_descriptor.bin"), prost::Message::encode_to_vec(&fds))?;
    tonic_prost_build::configure()
        .build_client(true)
        .build_server(true)
        .compile_fds(fds)?;
    // The vendored ONNX schema (proto/onnx/README.md): plain prost messages (no services,
    // no tonic), which `export::onnx` builds and encodes. Not part of the reflection
    // descriptors.
    let onnx = "proto/onnx/onnx-ml.proto";
    println!("cargo:rerun-if-changed={onnx}");
    let onnx_fds = protox::compile([onnx], ["proto"])?;
    prost_build::Config::new().compile_fds(onnx_fds)?;
    Ok(())
}
