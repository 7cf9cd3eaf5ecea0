//! The pruning task: every `retention.prune_interval_s`, each channel's
//! marks are raised as its policy asks (`Hub::raise_retention`, under the
//! channel's commit gate, stored first), then what lies below them is
//! deleted in small transactions, and free pages beyond a slack are handed
//! back to the file system.
//!
//! Ingest never waits for a pass: each deletion is one transaction of at
//! most [`ROWS_PER_TRANSACTION`] rows on the shared write connection, and
//! the task yields between them, so the writer's next group commit goes
//! in between. A crash mid-pass leaves the marks stored and some rows
//! below them; the next pass deletes the rest.

use super::{Hub, IngestError};
use crate::config::RetentionSettings;
use crate::retention::{RetentionMarks, RetentionPolicy};
use crate::store::{self, StoreError};
use std::sync::Arc;
use std::sync::atomic::Ordering::Relaxed;
use std::time::Duration;

/// Rows one deletion transaction removes at most: a few milliseconds of
/// the write connection (measured with `bench retention`).
pub const ROWS_PER_TRANSACTION: u32 = 2_000;
/// Free pages kept for reuse, as a fraction of the file: new readings
/// fill them before the file grows, so at steady load the file stays
/// flat without being shrunk and regrown.
const FREE_PAGE_SLACK: f64 = 0.10;
/// Pages handed back per transaction at most.
const PAGES_PER_RELEASE: u32 = 4_096;

/// What one pass removed.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct PassReport {
    /// Raw readings deleted.
    pub readings: u64,
    /// 10 s and 1 min rollups deleted.
    pub rollups: u64,
    /// Free pages handed back to the file system.
    pub pages_released: u64,
}

/// Runs passes until the server begins to stop.
pub async fn run(hub: Arc<Hub>, settings: RetentionSettings) {
    let mut tick = tokio::time::interval(Duration::from_secs(settings.prune_interval_s));
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let default = settings.policy();
    loop {
        tokio::select! {
            _ = tick.tick() => {}
            () = super::stopped(hub.shutdown_signal()) => return,
        }
        match pass(&hub, &default).await {
            Ok(report) if report != PassReport::default() => {
                tracing::info!(
                    readings = report.readings,
                    rollups = report.rollups,
                    pages_released = report.pages_released,
                    "retention pass"
                );
            }
            Ok(_) => {}
            Err(e) => {
                tracing::warn!(error = %e, "retention pass stopped; trying again next period")
            }
        }
    }
}

/// One pass over every channel.
pub async fn pass(hub: &Hub, default: &RetentionPolicy) -> Result<PassReport, IngestError> {
    let mut report = PassReport::default();
    for (channel_id, runtime) in hub.runtimes() {
        let policy = {
            let rt = runtime.lock().expect("channel state poisoned");
            rt.def.retention.unwrap_or_default().over(default)
        };
        if !policy.prunes() {
            continue;
        }
        let (key, marks) = hub.raise_retention(&channel_id, default).await?;
        let (readings, rollups) = prune_channel(hub, key, marks).await?;
        report.readings += readings;
        report.rollups += rollups;
        if hub.is_shutting_down() {
            break;
        }
    }
    if report.readings + report.rollups > 0 {
        report.pages_released = release_pages(hub).await?;
    }
    hub.metrics().prune_passes.fetch_add(1, Relaxed);
    Ok(report)
}

/// Deletes one channel's rows below its marks: readings, then fine rollups.
async fn prune_channel(
    hub: &Hub,
    key: i64,
    marks: RetentionMarks,
) -> Result<(u64, u64), StoreError> {
    let readings = drain(hub, key, Pruned::Readings, marks.raw_before_ns).await?;
    let rollups = drain(hub, key, Pruned::Rollups, marks.rollup_before_ns).await?;
    Ok((readings, rollups))
}

/// What a deletion step removes.
#[derive(Debug, Clone, Copy)]
enum Pruned {
    Readings,
    Rollups,
}

/// Deletes a channel's rows of one kind before `before_ns`, one small
/// transaction at a time, yielding between them, until a step removes
/// less than a full transaction's worth; stops early when the server
/// begins to stop.
async fn drain(hub: &Hub, key: i64, what: Pruned, before_ns: i64) -> Result<u64, StoreError> {
    let store = hub.store();
    let mut total = 0;
    loop {
        let n = match what {
            Pruned::Readings => {
                let n =
                    store::retention::prune_readings(store, key, before_ns, ROWS_PER_TRANSACTION)
                        .await?;
                hub.metrics().pruned_readings.fetch_add(n, Relaxed);
                n
            }
            Pruned::Rollups => {
                let n =
                    store::retention::prune_rollups(store, key, before_ns, ROWS_PER_TRANSACTION)
                        .await?;
                hub.metrics().pruned_rollups.fetch_add(n, Relaxed);
                n
            }
        };
        total += n;
        if n < u64::from(ROWS_PER_TRANSACTION) || hub.is_shutting_down() {
            return Ok(total);
        }
        tokio::task::yield_now().await;
    }
}

/// Hands free pages beyond the slack back to the file system.
async fn release_pages(hub: &Hub) -> Result<u64, StoreError> {
    let store = hub.store();
    let (pages, mut free) = store::retention::page_counts(&store.writer).await?;
    let keep = (pages as f64 * FREE_PAGE_SLACK) as i64;
    let mut released = 0;
    while free > keep && !hub.is_shutting_down() {
        let step = (free - keep).min(i64::from(PAGES_PER_RELEASE)) as u32;
        let left = store::retention::release_free_pages(store, step).await?;
        if left >= free {
            // An older file without incremental auto-vacuum: pages are
            // only reused, never handed back.
            break;
        }
        released += (free - left) as u64;
        free = left;
        tokio::task::yield_now().await;
    }
    hub.metrics().released_pages.fetch_add(released, Relaxed);
    Ok(released)
}
