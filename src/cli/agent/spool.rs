//! The agent's spool: every reading is here, fsynced, before it goes to
//! the server, and leaves only after the server acknowledged it. One
//! SQLite file (WAL, `synchronous = FULL`) of the agent's own; per
//! channel, the readings in seq order and the next seq to give.

use gibbsline::pb;
use sqlx::sqlite::{SqliteConnectOptions, SqliteJournalMode, SqlitePoolOptions, SqliteSynchronous};
use sqlx::{Row, SqlitePool};
use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering::SeqCst};

pub(crate) struct Spool {
    pool: SqlitePool,
    /// The file, for every message about it.
    path: std::path::PathBuf,
    /// Why the last write failed, until one succeeds: the log says it
    /// once, the metrics and `/health` for as long as it lasts.
    fault: std::sync::Mutex<Option<String>>,
    pub(crate) write_errors_total: AtomicU64,
    max_rows: u64,
    /// Readings older than this go unsent.
    max_age: Option<std::time::Duration>,
    /// Readings spooled now, all channels (counted once at open, then
    /// kept: a COUNT per write would scan the spool).
    rows: AtomicU64,
    /// Since start: readings dropped by a bound, readings the server
    /// acknowledged (trimmed), instrument reads or file lines that failed.
    pub(crate) dropped_total: AtomicU64,
    pub(crate) acked_total: AtomicU64,
    pub(crate) read_errors_total: AtomicU64,
}

const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS spooled (
    channel_id TEXT NOT NULL, seq INTEGER NOT NULL, time_ns INTEGER NOT NULL,
    volts REAL NOT NULL, amps_charge_positive REAL, temp_c REAL,
    PRIMARY KEY (channel_id, seq)) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS next_seq (channel_id TEXT PRIMARY KEY, next INTEGER NOT NULL);
CREATE TABLE IF NOT EXISTS dropped (channel_id TEXT PRIMARY KEY, n INTEGER NOT NULL);
CREATE INDEX IF NOT EXISTS spooled_by_time ON spooled (channel_id, time_ns);
CREATE TABLE IF NOT EXISTS file_pos (channel_id TEXT PRIMARY KEY, inode INTEGER NOT NULL, offset INTEGER NOT NULL);
";

/// How far a followed file has been read: its inode and byte offset.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub(crate) struct FilePos {
    pub inode: u64,
    pub offset: u64,
}

/// One reading as spooled: current charge-positive.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Spooled {
    pub seq: u64,
    pub time_ns: i64,
    pub volts: f64,
    pub amps_charge_positive: Option<f64>,
    pub temp_c: Option<f64>,
}

impl Spooled {
    /// On the wire, current in the channel's sign (`to_wire` ±1).
    pub(crate) fn to_pb(&self, to_wire: f64) -> pb::Reading {
        pb::Reading {
            seq: self.seq,
            time_unix_ns: self.time_ns,
            volts: self.volts,
            amps: self.amps_charge_positive.map(|a| a * to_wire),
            temp_c: self.temp_c,
        }
    }
}

impl Spool {
    pub(crate) async fn open(
        path: &Path,
        max_rows: u64,
        max_age: Option<std::time::Duration>,
    ) -> anyhow::Result<Spool> {
        let options = SqliteConnectOptions::new()
            .filename(path)
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Full);
        // One connection: writes from the samplers and trims from the
        // uplinks take turns, and each is its own fsynced transaction.
        let pool = SqlitePoolOptions::new()
            .max_connections(1)
            .connect_with(options)
            .await
            .map_err(|e| anyhow::anyhow!("spool {}: {e}", path.display()))?;
        sqlx::raw_sql(SCHEMA)
            .execute(&pool)
            .await
            .map_err(|e| SpoolFault::of(path, &e.into()))?;
        let rows: i64 = sqlx::query("SELECT COUNT(*) AS n FROM spooled")
            .fetch_one(&pool)
            .await?
            .get("n");
        Ok(Spool {
            pool,
            path: path.to_path_buf(),
            fault: std::sync::Mutex::new(None),
            write_errors_total: AtomicU64::new(0),
            max_rows,
            max_age,
            rows: AtomicU64::new(rows as u64),
            dropped_total: AtomicU64::new(0),
            acked_total: AtomicU64::new(0),
            read_errors_total: AtomicU64::new(0),
        })
    }

    /// The next seq to give the channel's readings, once known.
    pub(crate) async fn next_seq(&self, channel_id: &str) -> anyhow::Result<Option<u64>> {
        let row = sqlx::query("SELECT next FROM next_seq WHERE channel_id = ?")
            .bind(channel_id)
            .fetch_optional(&self.pool)
            .await?;
        Ok(row.map(|r| r.get::<i64, _>("next") as u64))
    }

    /// Sets where a channel's seqs go on when the spool did not know
    /// (a new spool): after what the server has.
    pub(crate) async fn learn_next_seq(&self, channel_id: &str, next: u64) -> anyhow::Result<()> {
        let done = sqlx::query("INSERT OR IGNORE INTO next_seq (channel_id, next) VALUES (?, ?)")
            .bind(channel_id)
            .bind(next as i64)
            .execute(&self.pool)
            .await;
        self.written(done.map(|_| ()).map_err(Into::into))
    }

    /// Stores readings and the next seq together; drops the oldest
    /// readings past the bound (how many, per channel, is kept).
    pub(crate) async fn append(
        &self,
        channel_id: &str,
        rows: &[Spooled],
        next: u64,
    ) -> anyhow::Result<u64> {
        self.append_at(channel_id, rows, next, None).await
    }

    /// [`Spool::append`], with how far a followed file has been read
    /// stored in the same transaction: a restart reads on from there.
    pub(crate) async fn append_at(
        &self,
        channel_id: &str,
        rows: &[Spooled],
        next: u64,
        pos: Option<FilePos>,
    ) -> anyhow::Result<u64> {
        let done = self.append_in_one(channel_id, rows, next, pos).await;
        self.written(done)
    }

    async fn append_in_one(
        &self,
        channel_id: &str,
        rows: &[Spooled],
        next: u64,
        pos: Option<FilePos>,
    ) -> anyhow::Result<u64> {
        let mut tx = self.pool.begin().await?;
        if let Some(p) = pos {
            sqlx::query("INSERT INTO file_pos (channel_id, inode, offset) VALUES (?, ?, ?) ON CONFLICT (channel_id) DO UPDATE SET inode = excluded.inode, offset = excluded.offset")
                .bind(channel_id)
                .bind(p.inode as i64)
                .bind(p.offset as i64)
                .execute(&mut *tx)
                .await?;
        }
        let mut added = 0;
        for r in rows {
            added += sqlx::query(
                "INSERT OR IGNORE INTO spooled (channel_id, seq, time_ns, volts, amps_charge_positive, temp_c) VALUES (?, ?, ?, ?, ?, ?)",
            )
            .bind(channel_id)
            .bind(r.seq as i64)
            .bind(r.time_ns)
            .bind(r.volts)
            .bind(r.amps_charge_positive)
            .bind(r.temp_c)
            .execute(&mut *tx)
            .await?
            .rows_affected();
        }
        sqlx::query("INSERT INTO next_seq (channel_id, next) VALUES (?, ?) ON CONFLICT (channel_id) DO UPDATE SET next = excluded.next")
            .bind(channel_id)
            .bind(next as i64)
            .execute(&mut *tx)
            .await?;
        let over = (self.rows.load(SeqCst) + added).saturating_sub(self.max_rows);
        let mut dropped = drop_oldest(&mut tx, channel_id, over).await?;
        if let Some(age) = self.max_age {
            let before_ns = gibbsline::ingest::now_ns() - age.as_nanos() as i64;
            dropped += drop_older(&mut tx, channel_id, before_ns).await?;
        }
        tx.commit().await?;
        self.rows.fetch_add(added, SeqCst);
        self.rows
            .fetch_sub(dropped.min(self.rows.load(SeqCst)), SeqCst);
        self.dropped_total.fetch_add(dropped, SeqCst);
        Ok(dropped)
    }

    /// Up to `limit` readings of the channel after `after`, in seq order.
    pub(crate) async fn after(
        &self,
        channel_id: &str,
        after: u64,
        limit: u32,
    ) -> anyhow::Result<Vec<Spooled>> {
        let rows = sqlx::query(
            "SELECT seq, time_ns, volts, amps_charge_positive, temp_c FROM spooled WHERE channel_id = ? AND seq > ? ORDER BY seq LIMIT ?",
        )
        .bind(channel_id)
        .bind(after as i64)
        .bind(i64::from(limit))
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .iter()
            .map(|r| Spooled {
                seq: r.get::<i64, _>("seq") as u64,
                time_ns: r.get("time_ns"),
                volts: r.get("volts"),
                amps_charge_positive: r.get("amps_charge_positive"),
                temp_c: r.get("temp_c"),
            })
            .collect())
    }

    /// Forgets the channel's readings up to `seq` (the server has them).
    pub(crate) async fn trim(&self, channel_id: &str, seq: u64) -> anyhow::Result<()> {
        let done = sqlx::query("DELETE FROM spooled WHERE channel_id = ? AND seq <= ?")
            .bind(channel_id)
            .bind(seq as i64)
            .execute(&self.pool)
            .await;
        let gone = self.written(done.map_err(Into::into))?.rows_affected();
        self.rows
            .fetch_sub(gone.min(self.rows.load(SeqCst)), SeqCst);
        self.acked_total.fetch_add(gone, SeqCst);
        Ok(())
    }

    /// How far the channel's file was read, if it is followed.
    pub(crate) async fn file_pos(&self, channel_id: &str) -> anyhow::Result<Option<FilePos>> {
        let row = sqlx::query("SELECT inode, offset FROM file_pos WHERE channel_id = ?")
            .bind(channel_id)
            .fetch_optional(&self.pool)
            .await?;
        Ok(row.map(|r| FilePos {
            inode: r.get::<i64, _>("inode") as u64,
            offset: r.get::<i64, _>("offset") as u64,
        }))
    }

    /// Notes how a write went: a failure is kept, with the file's path,
    /// until a write succeeds again.
    fn written<T>(&self, done: anyhow::Result<T>) -> anyhow::Result<T> {
        let mut fault = self.fault.lock().expect("spool fault poisoned");
        match done {
            Ok(v) => {
                if fault.take().is_some() {
                    tracing::info!(spool = %self.path.display(), "spool writable again");
                }
                Ok(v)
            }
            Err(e) => {
                self.write_errors_total.fetch_add(1, SeqCst);
                let failed = SpoolFault::of(&self.path, &e);
                if fault.as_deref() != Some(failed.0.as_str()) {
                    tracing::error!(spool = %self.path.display(), "{failed}");
                }
                *fault = Some(failed.0.clone());
                Err(failed.into())
            }
        }
    }

    /// Why the spool cannot be written now, if it cannot.
    pub(crate) fn fault(&self) -> Option<String> {
        self.fault.lock().expect("spool fault poisoned").clone()
    }

    /// The agent's metrics, Prometheus text.
    pub(crate) fn render_metrics(&self) -> String {
        let mut page = String::new();
        let writable = u64::from(self.fault().is_none());
        for (name, kind, help, value) in [
            (
                "gibbsline_rig_spool_writable",
                "gauge",
                "1 while the spool takes writes; 0 while it cannot (nothing is measured then).",
                writable,
            ),
            (
                "gibbsline_rig_spool_write_errors_total",
                "counter",
                "Spool writes that failed (a full disk, a read-only file).",
                self.write_errors_total.load(SeqCst),
            ),
            (
                "gibbsline_rig_spooled_readings",
                "gauge",
                "Readings in the spool, waiting for the server's ack.",
                self.rows.load(SeqCst),
            ),
            (
                "gibbsline_rig_dropped_readings_total",
                "counter",
                "Readings dropped unsent by the spool's bounds.",
                self.dropped_total.load(SeqCst),
            ),
            (
                "gibbsline_rig_acked_readings_total",
                "counter",
                "Readings the server acknowledged (left the spool).",
                self.acked_total.load(SeqCst),
            ),
            (
                "gibbsline_rig_read_errors_total",
                "counter",
                "Instrument reads and file lines that gave no reading.",
                self.read_errors_total.load(SeqCst),
            ),
        ] {
            page.push_str(&format!(
                "# HELP {name} {help}\n# TYPE {name} {kind}\n{name} {value}\n"
            ));
        }
        page
    }

    pub(crate) async fn close(&self) {
        self.pool.close().await;
    }
}

/// A spool write that failed, naming the file: nothing is measured or
/// sent until the spool takes writes again (a reading is spooled first).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub(crate) struct SpoolFault(String);

impl SpoolFault {
    fn of(path: &Path, e: &anyhow::Error) -> SpoolFault {
        let disk = if e.to_string().contains("full") {
            "its disk is full"
        } else {
            "is its disk full, or the file or directory read-only?"
        };
        SpoolFault(format!(
            "spool {}: cannot write ({e}); {disk}: no reading is measured or sent until it can be written",
            path.display()
        ))
    }
}

/// The channel's readings stamped before `before_ns` go (the age bound); counted.
async fn drop_older(
    tx: &mut sqlx::Transaction<'_, sqlx::Sqlite>,
    channel_id: &str,
    before_ns: i64,
) -> anyhow::Result<u64> {
    let gone = sqlx::query("DELETE FROM spooled WHERE channel_id = ? AND time_ns < ?")
        .bind(channel_id)
        .bind(before_ns)
        .execute(&mut **tx)
        .await?
        .rows_affected();
    if gone > 0 {
        sqlx::query("INSERT INTO dropped (channel_id, n) VALUES (?, ?) ON CONFLICT (channel_id) DO UPDATE SET n = n + excluded.n")
            .bind(channel_id)
            .bind(gone as i64)
            .execute(&mut **tx)
            .await?;
    }
    Ok(gone)
}

/// The channel's `over` oldest go (the spool is past its bound); counted.
async fn drop_oldest(
    tx: &mut sqlx::Transaction<'_, sqlx::Sqlite>,
    channel_id: &str,
    over: u64,
) -> anyhow::Result<u64> {
    if over == 0 {
        return Ok(0);
    }
    let gone = sqlx::query(
        "DELETE FROM spooled WHERE channel_id = ?1 AND seq IN (SELECT seq FROM spooled WHERE channel_id = ?1 ORDER BY seq LIMIT ?2)",
    )
    .bind(channel_id)
    .bind(over as i64)
    .execute(&mut **tx)
    .await?
    .rows_affected();
    sqlx::query("INSERT INTO dropped (channel_id, n) VALUES (?, ?) ON CONFLICT (channel_id) DO UPDATE SET n = n + excluded.n")
        .bind(channel_id)
        .bind(gone as i64)
        .execute(&mut **tx)
        .await?;
    Ok(gone)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn reading(seq: u64, time_ns: i64) -> Spooled {
        Spooled {
            seq,
            time_ns,
            volts: 1.3,
            amps_charge_positive: None,
            temp_c: None,
        }
    }

    #[tokio::test]
    async fn bounds_by_count_and_by_age_drop_the_oldest_and_trims_follow_acks() {
        let dir = tempfile::tempdir().unwrap();
        let now = gibbsline::ingest::now_ns();
        let spool = Spool::open(&dir.path().join("s.db"), 5, None)
            .await
            .unwrap();
        let rows: Vec<Spooled> = (1..=7).map(|s| reading(s, now)).collect();
        assert_eq!(spool.append("a", &rows, 8).await.unwrap(), 2);
        let kept: Vec<u64> = spool
            .after("a", 0, 100)
            .await
            .unwrap()
            .iter()
            .map(|r| r.seq)
            .collect();
        assert_eq!(kept, [3, 4, 5, 6, 7]);
        spool.trim("a", 5).await.unwrap();
        assert_eq!(spool.after("a", 0, 100).await.unwrap().len(), 2);
        assert_eq!(spool.next_seq("a").await.unwrap(), Some(8));

        let aged = Spool::open(
            &dir.path().join("t.db"),
            100,
            Some(std::time::Duration::from_secs(3600)),
        )
        .await
        .unwrap();
        let old = now - 7_200_000_000_000;
        let rows = [reading(1, old), reading(2, old), reading(3, now)];
        assert_eq!(aged.append("b", &rows, 4).await.unwrap(), 2);
        assert_eq!(
            aged.after("b", 0, 100).await.unwrap(),
            vec![reading(3, now)]
        );
    }
}
