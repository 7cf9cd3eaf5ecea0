//! Generated protobuf and gRPC code. Only `grpc/` and the client commands
//! use these types; everything else works on the crate's own types.
#![allow(clippy::all, missing_docs)]

tonic::include_proto!("gibbsline.v1");

/// Descriptor set for server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("gibbsline_descriptor");

pub mod names;
