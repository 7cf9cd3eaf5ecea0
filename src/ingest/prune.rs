//! The upkeep task: every `retention.prune_interval_s`, a retention pass
//! and then a compaction pass ([`super::compact`]). In the retention
//! pass each channel's
//! marks are raised as its policy asks (`Hub::raise_retention`, under the
//! channel's commit gate, stored first), then what lies below them is
//! deleted a few thousand rows at a time. Freed pages go to SQLite's free
//! list, which new readings fill before the file grows.
//!
//! Ingest never waits for a pass: each deletion step of at most
//! [`ROWS_PER_STEP`] rows is a job in the writer's queue, committed in a
//! group with the readings queued beside it (one fsync for both), and the
//! next step is sent only once that commit is answered. A crash mid-pass
//! leaves the marks stored and some rows below them; the next pass
//! deletes the rest.

use super::{Hub, IngestError, Job};
use crate::config::RetentionSettings;
use crate::retention::{RetentionMarks, RetentionPolicy};
use crate::store::retention::Pruned;
use std::collections::HashMap;
use std::sync::Arc;
use std::sync::atomic::Ordering::Relaxed;
use std::time::Duration;

/// Rows one deletion step removes at most: it rides in one of the
/// writer's group commits, so it adds its own few milliseconds to the
/// acks of that commit (measured with `bench retention`).
pub const ROWS_PER_STEP: u32 = 4_000;

/// What one pass removed.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct PassReport {
    /// Raw readings deleted.
    pub readings: u64,
    /// 10 s and 1 min rollups deleted.
    pub rollups: u64,
}

/// Runs passes until the server begins to stop.
pub async fn run(hub: Arc<Hub>, settings: RetentionSettings) {
    let mut tick = tokio::time::interval(Duration::from_secs(settings.prune_interval_s));
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let default = settings.policy();
    // Marks each channel was last drained to: a pass sends no deletions
    // for a channel whose marks have not moved since (a restart drains
    // each once, finishing what a killed pass left).
    let mut drained = HashMap::new();
    loop {
        tokio::select! {
            _ = tick.tick() => {}
            () = super::stopped(hub.shutdown_signal()) => return,
        }
        match pass(&hub, &default, &mut drained).await {
            Ok(report) if report != PassReport::default() => {
                tracing::info!(
                    readings = report.readings,
                    rollups = report.rollups,
                    "retention pass"
                );
            }
            Ok(_) => {}
            Err(e) => {
                tracing::warn!(error = %e, "retention pass stopped; trying again next period")
            }
        }
        if let Err(e) = super::compact::pass(&hub).await {
            tracing::warn!(error = %e, "compaction pass stopped; trying again next period");
        }
    }
}

/// One pass over every channel; `drained` holds the marks each channel
/// was last drained to.
pub async fn pass(
    hub: &Hub,
    default: &RetentionPolicy,
    drained: &mut HashMap<i64, RetentionMarks>,
) -> Result<PassReport, IngestError> {
    let mut report = PassReport::default();
    for (channel_id, runtime) in hub.runtimes() {
        let policy = {
            let rt = runtime.lock().expect("channel state poisoned");
            rt.def.retention.unwrap_or_default().over(default)
        };
        if !policy.prunes() {
            continue;
        }
        // Shared database: the channel's owner prunes it; a channel no
        // server owns (no rig streams to it) is claimed by this one, so
        // its history still stays within bounds.
        let (key, marks) = match hub.raise_retention(&channel_id, default).await {
            Ok(raised) => raised,
            Err(IngestError::OwnedElsewhere(_)) => continue,
            Err(e) => return Err(e),
        };
        if marks == RetentionMarks::default() || drained.get(&key) == Some(&marks) {
            continue;
        }
        let (readings, rollups) = prune_channel(hub, key, marks).await?;
        report.readings += readings;
        report.rollups += rollups;
        if hub.is_shutting_down() {
            break;
        }
        drained.insert(key, marks);
    }
    hub.metrics().prune_passes.fetch_add(1, Relaxed);
    Ok(report)
}

/// Deletes one channel's rows below its marks: readings, then fine rollups.
async fn prune_channel(
    hub: &Hub,
    key: i64,
    marks: RetentionMarks,
) -> Result<(u64, u64), IngestError> {
    let readings = drain(hub, key, Pruned::Readings, marks.raw_before_ns).await?;
    let rollups = drain(hub, key, Pruned::FineRollups, marks.rollup_before_ns).await?;
    Ok((readings, rollups))
}

/// Deletes a channel's rows of one kind before `before_ns`, one writer
/// job at a time (each rides in a group commit beside ingest), until a
/// step removes less than a full job's worth; stops early when the
/// server begins to stop.
async fn drain(hub: &Hub, key: i64, what: Pruned, before_ns: i64) -> Result<u64, IngestError> {
    let counter = match what {
        Pruned::Readings => &hub.metrics().pruned_readings,
        Pruned::FineRollups => &hub.metrics().pruned_rollups,
    };
    let mut total = 0;
    loop {
        let outcome = hub
            .submit(|reply| Job::Prune {
                channel_key: key,
                what,
                before_ns,
                limit: ROWS_PER_STEP,
                reply,
            })
            .await?;
        counter.fetch_add(outcome.pruned, Relaxed);
        total += outcome.pruned;
        if outcome.pruned < u64::from(ROWS_PER_STEP) || hub.is_shutting_down() {
            return Ok(total);
        }
    }
}
