//! The raw-SQLite baseline of `bench ingest --baseline`: what SQLite alone
//! takes on this machine, so the server's figure can be read against it.
//! One prepared INSERT into a table shaped like readings stored one per
//! row (every column, the primary key and the time index of the first
//! schema), 10,000 rows per transaction, WAL, the same `synchronous` as
//! the server's durability, one thread, nothing derived.

use serde::Serialize;
use std::path::Path;
use std::time::Instant;

/// Rows per transaction.
const ROWS_PER_TX: u64 = 10_000;

#[derive(Debug, Serialize)]
pub(crate) struct BaselineReport {
    pub rows: u64,
    pub rows_per_s: f64,
    pub bytes_per_row: f64,
}

const SCHEMA: &str = "
CREATE TABLE readings (
    channel_key INTEGER NOT NULL, seq INTEGER NOT NULL, run_id INTEGER NOT NULL,
    time_ns INTEGER NOT NULL, volts REAL NOT NULL, amps REAL, temp_c REAL,
    cell_volts_used REAL NOT NULL, soc_model REAL, soc_fused REAL,
    charge_ah REAL NOT NULL, energy_wh REAL NOT NULL, flags INTEGER NOT NULL,
    soc_counted_unclamped REAL,
    PRIMARY KEY (channel_key, seq)
) WITHOUT ROWID;
CREATE INDEX readings_by_time ON readings (channel_key, time_ns);";

/// Inserts `rows` readings of `channels` channels, `batch` consecutive
/// readings of one channel at a time (as the load sends them), into a
/// fresh file in `dir`.
pub(crate) fn run(
    dir: &Path,
    rows: u64,
    channels: u32,
    batch: u64,
    synchronous: &str,
) -> anyhow::Result<BaselineReport> {
    let path = dir.join("baseline.db");
    let conn = rusqlite::Connection::open(&path)?;
    conn.pragma_update(None, "journal_mode", "WAL")?;
    conn.pragma_update(None, "synchronous", synchronous)?;
    conn.execute_batch(SCHEMA)?;
    let start = Instant::now();
    let mut seqs = vec![0u64; channels.max(1) as usize];
    let mut written = 0;
    let mut insert =
        conn.prepare("INSERT INTO readings VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)")?;
    while written < rows {
        conn.execute_batch("BEGIN")?;
        {
            for i in written..(written + ROWS_PER_TX).min(rows) {
                let channel = (i / batch) % seqs.len() as u64;
                let seq = &mut seqs[channel as usize];
                *seq += 1;
                insert_one(&mut insert, channel, *seq)?;
            }
        }
        conn.execute_batch("COMMIT")?;
        written = (written + ROWS_PER_TX).min(rows);
    }
    let seconds = start.elapsed().as_secs_f64();
    drop(insert);
    drop(conn);
    let bytes = [path.clone(), dir.join("baseline.db-wal")]
        .iter()
        .filter_map(|p| std::fs::metadata(p).ok())
        .map(|m| m.len())
        .sum::<u64>();
    let _ = std::fs::remove_file(&path);
    let _ = std::fs::remove_file(dir.join("baseline.db-wal"));
    let _ = std::fs::remove_file(dir.join("baseline.db-shm"));
    Ok(BaselineReport {
        rows,
        rows_per_s: rows as f64 / seconds,
        bytes_per_row: bytes as f64 / rows.max(1) as f64,
    })
}

/// One reading-shaped row of `channel` with `seq`.
fn insert_one(
    insert: &mut rusqlite::Statement<'_>,
    channel: u64,
    seq: u64,
) -> rusqlite::Result<()> {
    let s = seq as f64;
    insert.execute(rusqlite::params![
        channel as i64,
        seq as i64,
        channel as i64 + 1,
        1_700_000_000_000_000_000i64 + seq as i64 * 1_000_000,
        1.10 + 1e-5 * (s % 97.0),
        Some(0.5),
        Some(25.0),
        1.10 + 1e-5 * (s % 97.0),
        None::<f64>,
        Some(0.5 + s * 1e-7),
        s * 1.4e-7,
        s * 1.5e-7,
        16i64,
        Some(0.5 + s * 1e-7),
    ])?;
    Ok(())
}
