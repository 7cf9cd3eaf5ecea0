//! gibbsline: electrochemical cell readings in, thermodynamic state out.
//!
//! The crate is split by what a module may touch. `electrochem` is pure
//! computation (no I/O, no async, no clock); the service shells around it
//! call in so every path gives the same answer for the same reading.

pub mod alerts;
pub mod app;
pub mod auth;
pub mod channel;
pub mod config;
pub mod electrochem;
pub mod error;
pub mod estimator;
/// Fuzz-target bodies: built for tests and for `cargo fuzz` (which sets
/// `--cfg fuzzing`), never into the release binary.
#[cfg(any(test, fuzzing))]
pub mod fuzzing;
pub mod grpc;
pub mod http;
pub mod ingest;
pub mod listen;
pub mod metrics;
pub mod notify;
pub mod pb;
pub mod retention;
pub mod sim;
pub mod store;
