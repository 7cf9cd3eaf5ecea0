//! What a database holds and what it costs on disk: rows and bytes per
//! table, readings and their time span per channel, file and WAL size.
//! Read through its own read-only connection, so it works beside a
//! running server (WAL readers never block the writer) and on a copy.

use super::StoreError;
use serde::Serialize;
use sqlx::Row;
use sqlx::sqlite::{SqliteConnectOptions, SqlitePoolOptions};
use std::path::Path;

/// The whole report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StorageReport {
    /// The database file.
    pub path: String,
    /// Its size, bytes.
    pub file_bytes: u64,
    /// The write-ahead log beside it (`<db>-wal`), bytes; 0 when absent.
    pub wal_bytes: u64,
    /// Every table of the schema.
    pub tables: Vec<TableUse>,
    /// Every channel defined.
    pub channels: Vec<ChannelUse>,
}

/// One table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TableUse {
    /// Its name in the schema.
    pub table: String,
    /// Rows it holds.
    pub rows: u64,
    /// Pages it and its indexes take, bytes (SQLite's `dbstat`); unset
    /// where this SQLite build has no `dbstat`.
    pub bytes: Option<u64>,
}

/// One channel's readings.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChannelUse {
    /// The channel.
    pub channel_id: String,
    /// Readings stored.
    pub readings: u64,
    /// The oldest and newest reading's time; unset without readings.
    pub oldest_unix_ns: Option<i64>,
    /// The newest reading's time.
    pub newest_unix_ns: Option<i64>,
    /// Retention's marks: raw readings and 10 s / 1 min rollups before
    /// these are deleted; unset where nothing has been pruned.
    pub raw_kept_from_unix_ns: Option<i64>,
    pub rollups_kept_from_unix_ns: Option<i64>,
}

/// Reads the report of the database at `path`, which must exist.
pub async fn storage_report(path: &Path) -> Result<StorageReport, StoreError> {
    let unopenable = |reason: String| StoreError::Open {
        path: path.to_path_buf(),
        reason,
    };
    let file_bytes = std::fs::metadata(path)
        .map_err(|e| unopenable(e.to_string()))?
        .len();
    let pool = SqlitePoolOptions::new()
        .max_connections(1)
        .connect_with(SqliteConnectOptions::new().filename(path).read_only(true))
        .await
        .map_err(|e| unopenable(e.to_string()))?;
    let report = StorageReport {
        path: path.display().to_string(),
        file_bytes,
        wal_bytes: wal_bytes(path),
        tables: tables(&pool).await?,
        channels: channels(&pool).await?,
    };
    pool.close().await;
    Ok(report)
}

/// Size of the database's write-ahead log, bytes; 0 when there is none.
pub fn wal_bytes(db: &Path) -> u64 {
    let mut wal = db.as_os_str().to_owned();
    wal.push("-wal");
    std::fs::metadata(wal).map(|m| m.len()).unwrap_or(0)
}

async fn tables(pool: &sqlx::SqlitePool) -> Result<Vec<TableUse>, StoreError> {
    let names: Vec<String> = sqlx::query_scalar(
        "SELECT name FROM sqlite_master WHERE type = 'table' \
         AND name NOT LIKE 'sqlite_%' AND name NOT LIKE '_sqlx%' ORDER BY name",
    )
    .fetch_all(pool)
    .await?;
    let bytes = table_bytes(pool).await;
    let mut out = Vec::with_capacity(names.len());
    for name in names {
        // The name comes from the schema itself, not from a user.
        let sql = sqlx::AssertSqlSafe(format!("SELECT COUNT(*) FROM \"{name}\""));
        let rows: i64 = sqlx::query_scalar(sql).fetch_one(pool).await?;
        out.push(TableUse {
            bytes: bytes.as_ref().map(|b| b.get(&name).copied().unwrap_or(0)),
            table: name,
            rows: rows as u64,
        });
    }
    Ok(out)
}

/// Bytes per table with its indexes, or none without `dbstat`.
async fn table_bytes(pool: &sqlx::SqlitePool) -> Option<std::collections::HashMap<String, u64>> {
    let rows = sqlx::query(
        "SELECT m.tbl_name AS table_name, SUM(d.pgsize) AS bytes \
         FROM dbstat d JOIN sqlite_master m ON m.name = d.name GROUP BY m.tbl_name",
    )
    .fetch_all(pool)
    .await
    .ok()?;
    rows.iter()
        .map(|r| {
            let bytes: i64 = r.try_get("bytes").ok()?;
            Some((r.try_get("table_name").ok()?, bytes as u64))
        })
        .collect()
}

async fn channels(pool: &sqlx::SqlitePool) -> Result<Vec<ChannelUse>, StoreError> {
    // Readings sit in chunks, and in rows on a file no server of this
    // release has opened yet (or one it was still moving).
    let sql = if has_table(pool, "chunks").await? {
        "SELECT c.channel_id AS channel_id, \
           (SELECT COALESCE(SUM(n), 0) FROM chunks k WHERE k.channel_key = c.channel_key) \
           + (SELECT COUNT(*) FROM readings r WHERE r.channel_key = c.channel_key) AS n, \
           (SELECT MIN(t) FROM (SELECT MIN(start_ns) AS t FROM chunks WHERE channel_key = c.channel_key \
              UNION ALL SELECT MIN(time_ns) FROM readings WHERE channel_key = c.channel_key)) AS oldest, \
           (SELECT MAX(t) FROM (SELECT MAX(end_ns) AS t FROM chunks WHERE channel_key = c.channel_key \
              UNION ALL SELECT MAX(time_ns) FROM readings WHERE channel_key = c.channel_key)) AS newest \
         FROM channels c ORDER BY c.channel_id"
    } else {
        "SELECT c.channel_id AS channel_id, COUNT(r.seq) AS n, \
         MIN(r.time_ns) AS oldest, MAX(r.time_ns) AS newest \
         FROM channels c LEFT JOIN readings r ON r.channel_key = c.channel_key \
         GROUP BY c.channel_key ORDER BY c.channel_id"
    };
    let rows = sqlx::query(sql).fetch_all(pool).await?;
    let marks = marks(pool).await?;
    rows.iter()
        .map(|r| {
            let channel_id: String = r.try_get("channel_id")?;
            let (raw, rollups) = marks.get(&channel_id).copied().unzip();
            Ok(ChannelUse {
                readings: r.try_get::<i64, _>("n")? as u64,
                oldest_unix_ns: r.try_get("oldest")?,
                newest_unix_ns: r.try_get("newest")?,
                raw_kept_from_unix_ns: raw.filter(|t| *t > 0),
                rollups_kept_from_unix_ns: rollups.filter(|t| *t > 0),
                channel_id,
            })
        })
        .collect()
}

/// Each channel's retention marks; none on a database that a server of
/// this release has not opened yet (the table comes with its migration).
async fn marks(
    pool: &sqlx::SqlitePool,
) -> Result<std::collections::HashMap<String, (i64, i64)>, StoreError> {
    if !has_table(pool, "retention_marks").await? {
        return Ok(Default::default());
    }
    let rows = sqlx::query(
        "SELECT c.channel_id AS channel_id, m.raw_before_ns AS raw, m.rollup_before_ns AS rollups \
         FROM retention_marks m JOIN channels c ON c.channel_key = m.channel_key",
    )
    .fetch_all(pool)
    .await?;
    rows.iter()
        .map(|r| {
            Ok((
                r.try_get("channel_id")?,
                (r.try_get("raw")?, r.try_get("rollups")?),
            ))
        })
        .collect()
}

/// Whether the file has the table (an older file may lack it: this report
/// reads files no server of this release has migrated).
async fn has_table(pool: &sqlx::SqlitePool, name: &str) -> Result<bool, StoreError> {
    Ok(
        sqlx::query("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?")
            .bind(name)
            .fetch_optional(pool)
            .await?
            .is_some(),
    )
}
