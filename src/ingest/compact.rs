//! Compaction: small chunks (a slow rig sends a reading or two per batch,
//! and each commit stores a batch as a chunk) merged into larger ones, so
//! a reading costs what the codec makes of a long run, not a row's
//! overhead. Run by the upkeep task after each retention pass (`prune`).
//!
//! Like pruning, each step of at most [`ROWS_PER_STEP`] readings is a job
//! in the writer's queue, committed in a group beside ingest; a crash
//! leaves every merge done or not done, never half (one transaction).

use super::{Hub, IngestError, Job};
use std::sync::atomic::Ordering::Relaxed;

/// Readings one merge step rewrites at most (about: a step finishes the
/// hour it is in).
pub const ROWS_PER_STEP: u32 = 20_000;

/// One pass over every channel; returns the readings rewritten.
pub async fn pass(hub: &Hub) -> Result<u64, IngestError> {
    let mut total = 0;
    for (_, runtime) in hub.runtimes() {
        let (key, owned) = {
            let rt = runtime.lock().expect("channel state poisoned");
            (rt.key, hub.owns(&rt))
        };
        // Shared database: the channel's owner merges its chunks.
        if !owned {
            continue;
        }
        loop {
            let outcome = hub
                .submit(|reply| Job::Compact {
                    channel_key: key,
                    limit: ROWS_PER_STEP,
                    reply,
                })
                .await?;
            hub.metrics()
                .compacted_readings
                .fetch_add(outcome.compacted, Relaxed);
            total += outcome.compacted;
            if outcome.compacted < u64::from(ROWS_PER_STEP) || hub.is_shutting_down() {
                break;
            }
        }
        if hub.is_shutting_down() {
            break;
        }
    }
    Ok(total)
}
