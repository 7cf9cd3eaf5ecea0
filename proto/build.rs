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
    let mut builder = tonic_prost_build::configure()
        .codec_path("crate::grpc::codec::StrictCodec")
        .build_server(true)
        .build_client(true)
        // The JSON API and the CLI print messages as they come off the
        // wire, so their JSON carries the proto's field names and nothing
        // is kept in step by hand.
        .type_attribute(".gibbsline.v1", "#[derive(serde::Serialize)]")
        // The JSON API answers in rows; a columns field it never fills
        // stays out of its JSON.
        .field_attribute(
            ".gibbsline.v1.QueryReadingsResponse.columns",
            "#[serde(skip_serializing_if = \"Option::is_none\")]",
        );
    // Enum fields are i32 on the Rust side; JSON spells their value's name.
    for (field, serializer) in enum_fields(&fds) {
        builder = builder.field_attribute(
            field,
            format!("#[serde(serialize_with = \"crate::pb::names::{serializer}\")]"),
        );
    }
    builder.compile_fds(fds)?;
    Ok(())
}

/// Every enum-typed field (`.gibbsline.v1.Alert.severity`) and the name of
/// the serializer for its enum (`severity`, from `Severity`).
fn enum_fields(fds: &prost_types::FileDescriptorSet) -> Vec<(String, String)> {
    use prost_types::field_descriptor_proto::{Label, Type};
    let mut out = Vec::new();
    for file in &fds.file {
        let package = file.package();
        for message in &file.message_type {
            for field in &message.field {
                if field.r#type() != Type::Enum {
                    continue;
                }
                let enum_name = field.type_name().rsplit('.').next().unwrap_or_default();
                // A repeated field's serializer is its enum's, for a list.
                let suffix = if field.label() == Label::Repeated {
                    "_list"
                } else {
                    ""
                };
                out.push((
                    format!(".{package}.{}.{}", message.name(), field.name()),
                    format!("{}{suffix}", snake_case(enum_name)),
                ));
            }
        }
    }
    out
}

fn snake_case(camel: &str) -> String {
    let mut out = String::new();
    for (i, c) in camel.chars().enumerate() {
        if c.is_ascii_uppercase() {
            if i > 0 {
                out.push('_');
            }
            out.push(c.to_ascii_lowercase());
        } else {
            out.push(c);
        }
    }
    out
}
