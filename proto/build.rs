//! Compiles the wire contract with protox (pure Rust: no system protoc) and
//! writes the descriptor set that server reflection serves.

use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let files = [
        "proto/gibbsline/v1/channel.proto",
        "proto/gibbsline/v1/ingest.proto",
        "proto/gibbsline/v1/history.proto",
        "proto/gibbsline/v1/chemistry.proto",
        "proto/gibbsline/v1/alert.proto",
    ];
    // protox prints no rerun-if-changed lines of its own.
    println!("cargo:rerun-if-changed=proto");
    // Without this, a new migration file is not embedded by sqlx::migrate!.
    println!("cargo:rerun-if-changed=migrations");
    let fds = protox::compile(files, ["proto"])?;
    let out_dir = PathBuf::from(std::env::var("OUT_DIR")?);
    // compile_fds does not write the descriptor file reflection needs.
    std::fs::write(
        out_dir.join("gibbsline_descriptor.bin"),
        prost::Message::encode_to_vec(&fds),
    )?;
    tonic_prost_build::configure()
        .codec_path("crate::grpc::codec::StrictCodec")
        .build_server(true)
        .build_client(true)
        // The CLI prints these as they come off the wire, so its JSON and
        // CSV carry the proto's field names and nothing to keep in step.
        .type_attribute("gibbsline.v1.Cycle", "#[derive(serde::Serialize)]")
        .type_attribute("gibbsline.v1.ChemistryInfo", "#[derive(serde::Serialize)]")
        .compile_fds(fds)?;
    Ok(())
}
