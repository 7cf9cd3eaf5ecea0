//! Retention in SQL: the marks, and deletions in small transactions
//! (`ingest::prune` decides when; `crate::retention` decides where).
//!
//! Deletions run inside the ingest writer's group commits, a few thousand
//! rows at a time, so they share its fsync and never hold the one write
//! connection apart from it: a pass costs acks milliseconds, not seconds.

use super::Pool;
use super::{Store, StoreError, Tx};
use crate::retention::RetentionMarks;
use sqlx::Row;

/// A channel's stored marks; none stored means nothing pruned.
pub async fn load_marks(pool: &Pool, channel_key: i64) -> Result<RetentionMarks, StoreError> {
    let row = sqlx::query(
        "SELECT raw_before_ns, rollup_before_ns FROM retention_marks WHERE channel_key = $1",
    )
    .bind(channel_key)
    .fetch_optional(pool)
    .await?;
    match row {
        Some(r) => Ok(RetentionMarks {
            raw_before_ns: r.try_get("raw_before_ns")?,
            rollup_before_ns: r.try_get("rollup_before_ns")?,
        }),
        None => Ok(RetentionMarks::default()),
    }
}

/// Stores raised marks (each only ever rises), before anything below them
/// is deleted: a restart mid-pass refuses the same readings.
pub async fn raise_marks(
    store: &Store,
    channel_key: i64,
    marks: RetentionMarks,
) -> Result<(), StoreError> {
    store
        .write(async |tx| {
            sqlx::query(
                "INSERT INTO retention_marks (channel_key, raw_before_ns, rollup_before_ns) VALUES ($1, $2, $3) \
                 ON CONFLICT (channel_key) DO UPDATE SET \
                 raw_before_ns = CASE WHEN excluded.raw_before_ns > retention_marks.raw_before_ns \
                   THEN excluded.raw_before_ns ELSE retention_marks.raw_before_ns END, \
                 rollup_before_ns = CASE WHEN excluded.rollup_before_ns > retention_marks.rollup_before_ns \
                   THEN excluded.rollup_before_ns ELSE retention_marks.rollup_before_ns END",
            )
            .bind(channel_key)
            .bind(marks.raw_before_ns)
            .bind(marks.rollup_before_ns)
            .execute(&mut **tx)
            .await?;
            Ok(())
        })
        .await
}

/// What one retention deletion removes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Pruned {
    /// Raw readings stamped before the mark.
    Readings,
    /// 10 s and 1 min rollups starting before the mark (1 h is kept).
    FineRollups,
}

/// Deletes a channel's rows of `what` before `before_ns`, oldest first,
/// in the caller's transaction (the writer's group commit: the deletion
/// shares its fsync): fine rollups at most `limit`, readings whole chunks
/// until at least `limit` went. Returns how many went; fewer than `limit`
/// means none is left.
pub async fn prune(
    tx: &mut Tx<'_>,
    channel_key: i64,
    what: Pruned,
    before_ns: i64,
    limit: u32,
) -> Result<u64, StoreError> {
    match what {
        Pruned::Readings => {
            super::chunks::prune(tx, channel_key, before_ns, u64::from(limit)).await
        }
        Pruned::FineRollups => {
            let fine = &super::rollup::TIERS_S[..super::rollup::TIERS_S.len() - 1];
            let done = sqlx::query(
                "DELETE FROM rollups WHERE channel_key = $1 AND (width_s, start_ns) IN ( \
                   SELECT width_s, start_ns FROM rollups WHERE channel_key = $1 \
                   AND width_s BETWEEN $2 AND $3 AND start_ns < $4 LIMIT $5)",
            )
            .bind(channel_key)
            .bind(fine[0])
            .bind(fine[fine.len() - 1])
            .bind(before_ns)
            .bind(i64::from(limit))
            .execute(&mut **tx)
            .await?;
            Ok(done.rows_affected())
        }
    }
}
