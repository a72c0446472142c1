//! Compiles the wire contract in `proto/` with a pure-Rust protobuf compiler, so no
//! system `protoc` is needed.

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protos = ["proto/pollard/v1/model.proto"];
    for p in &protos {
        println!("cargo:rerun-if-changed={p}");
    }
    println!("cargo:rerun-if-changed=proto");
    let fds = protox::compile(protos, ["proto"])?;
    tonic_prost_build::configure()
        .build_client(true)
        .build_server(true)
        .compile_fds(fds)?;
    Ok(())
}
