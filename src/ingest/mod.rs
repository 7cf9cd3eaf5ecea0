//! The ingest path: batch → validation → estimator and rules (per channel,
//! in seq order) → bounded queue → one batching writer → ack after commit.
//!
//! - [`derive`]: the pure work on one batch (no I/O, no async, no clock).
//! - [`runtime`]: one channel's live state and how it is rebuilt.
//! - [`hub`]: the shared service state every shell calls into.
//! - [`session`]: one rig's ingest stream, batch after batch.
//! - [`writer`]: the single batching writer.
//! - [`prune`]: the upkeep task: retention (small deletions beside the
//!   writer), then [`compact`]ion of small chunks.
//!
//! Per-channel state sits behind a std `Mutex`: it is held only for the
//! pure computation of one batch, never across an `.await`.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

pub mod compact;
pub mod derive;
pub mod hub;
pub mod ownership;
pub mod prune;
pub mod relay;
pub mod runtime;
pub mod session;
pub mod writer;

use crate::store::StoreError;
pub use derive::{DerivedBatch, check_batch_size, derive_batch};
pub use hub::{Hub, now_ns, stopped};
pub use runtime::{ChannelRuntime, load_runtime, restore_runtime};
pub use writer::{Job, ReadingsJob, WriteOutcome};

/// Readings per batch at most. 10,000 readings ≈ 400 kB of protobuf,
/// inside the 1 MiB ingest message limit the server sets.
pub const MAX_BATCH_READINGS: usize = 10_000;
/// How far a reading's clock may run ahead of the server's, and how far
/// its seq may jump past the last one: beyond either, the reading is
/// refused (quarantined: counted, named in the ack, never made the
/// channel's front), so one garbled value cannot push every later real
/// reading onto the out-of-order path and out of the alert rules.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IngestLimits {
    pub max_future_ns: i64,
    pub max_seq_jump: u64,
}

/// Five minutes: a rig PC without time sync drifts by seconds a day; a
/// reading further ahead carries a broken clock.
pub const DEFAULT_MAX_FUTURE_S: u64 = 300;
/// A billion: a counting rig never jumps that far; one that numbers its
/// readings by its millisecond clock may be offline for 11 days. Raise it
/// for rigs that number by microseconds.
pub const DEFAULT_MAX_SEQ_JUMP: u64 = 1_000_000_000;

impl Default for IngestLimits {
    fn default() -> IngestLimits {
        IngestLimits {
            max_future_ns: DEFAULT_MAX_FUTURE_S as i64 * 1_000_000_000,
            max_seq_jump: DEFAULT_MAX_SEQ_JUMP,
        }
    }
}
/// Readings stamped before 2000-01-01T00:00:00Z come from a rig whose clock
/// was never set; storing them would misplace them in every query.
pub const MIN_TIME_NS: i64 = 946_684_800 * 1_000_000_000;

#[derive(Debug, thiserror::Error)]
pub enum IngestError {
    #[error(
        "channel_id {0:?}: unknown channel (define it first: `gibbsline channels put FILE`, or the PutChannel RPC)"
    )]
    UnknownChannel(String),
    #[error("{field} = {value}: {reason}")]
    Invalid {
        field: String,
        value: String,
        reason: String,
    },
    #[error("readings: batch of {0} readings is over the limit of {MAX_BATCH_READINGS}")]
    BatchTooLarge(usize),
    #[error("alert_id {0}: no such alert")]
    AlertNotFound(u64),
    #[error("the server is shutting down; reconnect and resend from last_stored_seq")]
    ShuttingDown,
    /// A stored channel that no longer loads: most often its chemistry
    /// came from a config or file that no longer defines it.
    #[error(
        "channel {channel_id}: its stored {part} does not load ({reason}); give the server the chemistry it names again, or put the channel anew"
    )]
    StoredUnusable {
        channel_id: String,
        part: &'static str,
        reason: String,
    },
    /// Several servers on one database: another owns this channel now.
    #[error(transparent)]
    OwnedElsewhere(#[from] ownership::OwnedElsewhere),
    #[error(transparent)]
    Store(#[from] StoreError),
}

fn invalid(field: &str, value: impl std::fmt::Display, reason: impl Into<String>) -> IngestError {
    IngestError::Invalid {
        field: field.into(),
        value: value.to_string(),
        reason: reason.into(),
    }
}

/// One raw reading as it came off the wire.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RawReading {
    pub seq: u64,
    pub time_unix_ns: i64,
    pub volts: f64,
    pub amps: Option<f64>,
    pub temp_c: Option<f64>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Rejection {
    pub index: u32,
    pub seq: u64,
    pub field: &'static str,
    pub reason: String,
}

#[derive(Debug, Clone, PartialEq, Default)]
pub struct Ack {
    pub channel_id: String,
    pub batch_id: u64,
    pub accepted: u32,
    pub duplicates: u32,
    pub out_of_order: u32,
    pub rejected: Vec<Rejection>,
    pub last_stored_seq: u64,
}

#[cfg(test)]
mod tests;
