//! Compiles `proto/` with protox (a protobuf compiler in pure Rust, so no system `protoc`),
//! writes the descriptor set for server reflection, and generates the tonic code.

use prost::Message;
use std::{env, fs, path::PathBuf};

const PROTOS: &[&str] = &[
    "proto/holdout/v1/types.proto",
    "proto/holdout/v1/holdouts.proto",
    "proto/holdout/v1/submissions.proto",
    "proto/holdout/v1/ledger.proto",
    "proto/holdout/v1/users.proto",
];

fn main() -> Result<(), Box<dyn std::error::Error>> {
    for proto in PROTOS {
        println!("cargo:rerun-if-changed={proto}");
    }
    let fds = protox::compile(PROTOS, ["proto"])?;
    let out = PathBuf::from(env::var("OUT_DIR")?);
    fs::write(out.join("holdout_v1_descriptor.bin"), fds.encode_to_vec())?;
    tonic_prost_build::configure()
        .build_server(true)
        .build_client(true)
        .compile_fds(fds)?;
    Ok(())
}
