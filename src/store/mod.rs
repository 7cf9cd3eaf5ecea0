//! Storage: the only module that holds SQL.
//!
//! SQLite through sqlx, in WAL mode. One writer connection (the ingest
//! writer task owns all writes, so commits are serialised and alert ids
//! follow commit order); a separate read pool for history queries, which
//! WAL lets run beside the writer without blocking it.
//!
//! Durability: `synchronous = FULL` (default here) syncs the WAL on every
//! commit, so an acknowledged batch survives a process crash *and* a power
//! loss. `NORMAL` survives a process crash but may lose the last commits on
//! power loss (the database stays consistent). `OFF` is for benchmarks only.
//!
//! Every write goes through [`Store::write`]: it checks that the database
//! file is still the one opened, runs one transaction, and after any
//! failure closes the connection instead of reusing it (see there).
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

pub mod chunks;
pub mod codec;
mod fault;
pub mod lease;
mod lock;
pub mod outbox;
pub mod report;
pub mod retention;
pub mod rollup;

use crate::alerts::{AlertKind, RaisedAlert, Severity};
pub use fault::StorageFault;
use sqlx::any::{AnyConnectOptions, AnyPoolOptions};
use sqlx::{Connection, Executor, Row};
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::sync::Arc;

/// The pools, connections and rows of whichever engine the store runs on
/// (sqlx's `Any` driver: SQLite or PostgreSQL, chosen by the `db` setting).
pub type Pool = sqlx::AnyPool;
pub type Conn = sqlx::AnyConnection;
pub type DbRow = sqlx::any::AnyRow;

/// The engine below the store. SQL is written once for both where the
/// dialects agree (`$n` placeholders, `ON CONFLICT`, row values); the few
/// statements that differ ask [`Engine::of`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Engine {
    // Explicit: the values index per-engine statement caches.
    Sqlite = 0,
    Postgres = 1,
}

impl Engine {
    /// The engine behind a connection.
    pub fn of(conn: &Conn) -> Engine {
        if conn.backend_name() == "PostgreSQL" {
            Engine::Postgres
        } else {
            Engine::Sqlite
        }
    }

    /// The two-argument larger/smaller of SQL scalars (SQLite's MAX/MIN
    /// with two arguments; PostgreSQL's GREATEST/LEAST).
    pub fn greatest(self) -> &'static str {
        match self {
            Engine::Sqlite => "MAX",
            Engine::Postgres => "GREATEST",
        }
    }

    pub fn least(self) -> &'static str {
        match self {
            Engine::Sqlite => "MIN",
            Engine::Postgres => "LEAST",
        }
    }
}

/// Where the database is: a SQLite file (the default) or a PostgreSQL
/// server, told apart by the `db` setting's scheme.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Location {
    File(PathBuf),
    Postgres(String),
}

impl Location {
    /// The database `db` names, or why it names none: an empty setting
    /// (SQLite would take it for a temporary database that vanishes at
    /// exit) and schemes other than `sqlite://` and `postgres://` are
    /// refused, not read as file names.
    pub fn parse(db: &str) -> Result<Location, String> {
        if db.trim().is_empty() {
            return Err(
                "empty: name a SQLite file (e.g. /var/lib/gibbsline/gibbsline.db) or a postgres:// URL"
                    .into(),
            );
        }
        if db.starts_with("postgres://") || db.starts_with("postgresql://") {
            return Ok(Location::Postgres(db.to_string()));
        }
        let path = db.strip_prefix("sqlite://").unwrap_or(db);
        if let Some((scheme, _)) = path.split_once("://") {
            return Err(format!(
                "the scheme {scheme}:// is not served: a SQLite file path, sqlite://PATH or postgres://…"
            ));
        }
        if path.is_empty() || path == ":memory:" {
            return Err("names no file: a SQLite file path, sqlite://PATH or postgres://…".into());
        }
        Ok(Location::File(PathBuf::from(path)))
    }

    /// How logs and messages name it: the path, or the URL without its
    /// password.
    pub fn display_name(&self) -> String {
        match self {
            Location::File(p) => p.display().to_string(),
            Location::Postgres(url) => redact_url(url),
        }
    }
}

/// A URL with any password replaced by `***`.
pub fn redact_url(url: &str) -> String {
    let Some((scheme, rest)) = url.split_once("://") else {
        return url.to_string();
    };
    let (auth, host) = match rest.split_once('@') {
        Some((auth, host)) => (auth, host),
        None => return url.to_string(),
    };
    match auth.split_once(':') {
        Some((user, _)) => format!("{scheme}://{user}:***@{host}"),
        None => url.to_string(),
    }
}

/// A statement built piece by piece with its binds: `$1, $2, …` for
/// PostgreSQL (sqlx's `QueryBuilder` writes `?` for the `Any` driver,
/// which PostgreSQL refuses), plain `?` for SQLite. sqlx-sqlite looks up
/// each parameter's name in SQLite's list of named parameters, a walk of
/// the list per parameter: a rollup upsert of a thousand buckets (27,000
/// binds) spent most of its time there, and anonymous `?` have no names.
pub(crate) struct Binds {
    sql: String,
    args: sqlx::any::AnyArguments,
    n: usize,
    engine: Engine,
}

impl Binds {
    pub(crate) fn new(engine: Engine, sql: &str) -> Binds {
        Binds {
            sql: sql.to_string(),
            args: Default::default(),
            n: 0,
            engine,
        }
    }

    pub(crate) fn push(&mut self, sql: &str) -> &mut Binds {
        self.sql.push_str(sql);
        self
    }

    /// Appends the next placeholder (after a comma unless it opens a
    /// parenthesis) and binds `value` to it.
    pub(crate) fn bind<T>(&mut self, value: T) -> &mut Binds
    where
        T: for<'q> sqlx::Encode<'q, sqlx::Any> + sqlx::Type<sqlx::Any>,
    {
        use sqlx::Arguments;
        use std::fmt::Write;
        if !self.sql.ends_with('(') {
            self.sql.push_str(", ");
        }
        self.n += 1;
        match self.engine {
            Engine::Sqlite => self.sql.push('?'),
            Engine::Postgres => {
                let _ = write!(self.sql, "${}", self.n);
            }
        }
        // Encoding into `Any`'s buffer only records the value: it cannot fail.
        let _ = self.args.add(value);
        self
    }

    /// A comma-separated list of placeholders bound to `values`, in parentheses.
    pub(crate) fn list<T>(&mut self, values: impl IntoIterator<Item = T>) -> &mut Binds
    where
        T: for<'q> sqlx::Encode<'q, sqlx::Any> + sqlx::Type<sqlx::Any>,
    {
        self.push("(");
        for v in values {
            self.bind(v);
        }
        self.push(")")
    }

    pub(crate) fn query(self) -> sqlx::query::Query<'static, sqlx::Any, sqlx::any::AnyArguments> {
        sqlx::query_with(sqlx::AssertSqlSafe(self.sql), self.args)
    }

    pub(crate) async fn execute(
        self,
        conn: &mut Conn,
    ) -> Result<sqlx::any::AnyQueryResult, sqlx::Error> {
        self.query().execute(conn).await
    }
}

/// A statement written in SQLite's words as PostgreSQL takes it: SQLite's
/// `CROSS JOIN … ON` (a join order the planner must keep) is a plain
/// `JOIN` there, and SQLite's `instr` is `strpos`.
pub(crate) fn dialect(engine: Engine, sql: &str) -> String {
    match engine {
        Engine::Sqlite => sql.to_string(),
        Engine::Postgres => sql
            .replace("CROSS JOIN", "JOIN")
            .replace("instr(", "strpos("),
    }
}

/// The engine behind a pool.
pub fn pool_engine(pool: &Pool) -> Engine {
    if pool
        .connect_options()
        .database_url
        .scheme()
        .starts_with("postgres")
    {
        Engine::Postgres
    } else {
        Engine::Sqlite
    }
}

pub(crate) fn install_drivers() {
    static ONCE: std::sync::Once = std::sync::Once::new();
    ONCE.call_once(sqlx::any::install_default_drivers);
}
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("database: {0}")]
    Database(#[from] sqlx::Error),
    #[error("migration: {0}")]
    Migrate(#[from] sqlx::migrate::MigrateError),
    #[error("stored data is corrupt: {0}")]
    Corrupt(String),
    /// The database file could not be opened or created at all.
    #[error("database {}: cannot open it ({reason}); does its directory exist and may this user write there?", path.display())]
    Open { path: PathBuf, reason: String },
    /// A database server that did not answer or refused the connection.
    #[error(
        "database server {url}: cannot connect within {seconds} s ({reason}); is PostgreSQL running there and is the address, port and user right?"
    )]
    Connect {
        url: String,
        seconds: u64,
        reason: String,
    },
    /// A write the database could not take, classified (see [`StorageFault`]).
    #[error("{}", fault.describe(path, detail))]
    Unwritable {
        path: PathBuf,
        fault: StorageFault,
        detail: String,
    },
    #[error(
        "database {} is in use by another gibbsline server ({holder}); lock file {}: stop that server or give this one another database",
        path.display(),
        lock.display()
    )]
    InUse {
        path: PathBuf,
        lock: PathBuf,
        holder: String,
    },
    /// Several servers on one database: this server lost the leases
    /// named (another took the channels over) and its write for them was
    /// refused by the fencing check.
    #[error("this server no longer holds {}: another gibbsline server took the channel over; nothing of this request was stored, reconnect and resend from the resume point", .0.join(", "))]
    Fenced(Vec<String>),
    /// A failure that is neither a storage fault nor corruption, as told
    /// to each job of a failed group commit.
    #[error("database write failed: {0}")]
    Failed(String),
}

impl StoreError {
    /// The same error for another waiter (a group commit fails every job
    /// in it; sqlx errors cannot be cloned).
    pub fn replicate(&self) -> StoreError {
        match self {
            StoreError::Unwritable {
                path,
                fault,
                detail,
            } => StoreError::Unwritable {
                path: path.clone(),
                fault: *fault,
                detail: detail.clone(),
            },
            StoreError::InUse { path, lock, holder } => StoreError::InUse {
                path: path.clone(),
                lock: lock.clone(),
                holder: holder.clone(),
            },
            StoreError::Corrupt(m) => StoreError::Corrupt(m.clone()),
            StoreError::Fenced(names) => StoreError::Fenced(names.clone()),
            other => StoreError::Failed(other.to_string()),
        }
    }
}

/// How hard each commit is pushed to disk (see the module comment).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Deserialize, serde::Serialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum Durability {
    #[default]
    Full,
    Normal,
    Off,
}

impl FromStr for Durability {
    type Err = crate::error::UnknownChoice;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s {
            "full" => Ok(Durability::Full),
            "normal" => Ok(Durability::Normal),
            "off" => Ok(Durability::Off),
            other => Err(crate::error::UnknownChoice {
                value: other.into(),
                expected: "full, normal or off",
            }),
        }
    }
}

/// The database: a writer pool of one connection, a read pool, and what
/// keeps them honest (the file's identity, the lock, the write health).
#[derive(Debug, Clone)]
pub struct Store {
    pub writer: Pool,
    pub reader: Pool,
    engine: Engine,
    /// The file, or the redacted URL, as messages name it.
    path: Arc<PathBuf>,
    /// (device, inode) of the file at open: a deleted or replaced file is
    /// detected before a write, not written into the void.
    identity: Option<(u64, u64)>,
    /// SQLite only: one server per file. On PostgreSQL several servers
    /// share the database and channel leases keep them apart.
    lock: Option<Arc<lock::DbLock>>,
    /// PostgreSQL: the URL, for the connection that listens for other
    /// servers' alert events.
    url: Option<Arc<String>>,
    /// `None` while writes succeed; the fault of the last failed write until
    /// one succeeds again (health follows it).
    health: Arc<tokio::sync::watch::Sender<Option<StorageFault>>>,
}

/// The WAL is truncated to this after a checkpoint (SQLite's
/// `journal_size_limit`), bytes.
const WAL_LIMIT_BYTES: u64 = 64 * 1024 * 1024;

/// Readings moved from rows into chunks per transaction when a database
/// from before chunks is first opened.
const ADOPT_ROWS_PER_TX: u32 = 50_000;

/// Read connections per server.
const READERS: u32 = 4;

impl Store {
    /// Opens (creating and migrating) the database at `db`: a SQLite file
    /// (its lock taken: a second server on the same file is refused,
    /// naming the holder) or a PostgreSQL URL.
    pub async fn open_location(db: &Location, durability: Durability) -> Result<Store, StoreError> {
        match db {
            Location::File(path) => Store::open(path, durability).await,
            Location::Postgres(url) => Store::open_postgres(url, durability).await,
        }
    }

    /// Opens a SQLite file (see [`Store::open_location`]).
    pub async fn open(path: &Path, durability: Durability) -> Result<Store, StoreError> {
        install_drivers();
        let lock = lock::DbLock::acquire(path)?;
        let url = sqlite_url(path);
        let sync = match durability {
            Durability::Full => "FULL",
            Durability::Normal => "NORMAL",
            Durability::Off => "OFF",
        };
        // The WAL is cut back to 64 MiB after each checkpoint instead of
        // keeping its largest size for ever. No auto-vacuum: pages freed
        // by retention go to SQLite's free list and new readings fill them
        // before the file grows, so the file stays flat at steady load;
        // incremental auto-vacuum would hand them back, but its pointer
        // map cost 10 % of ingest here (README, Performance).
        let pragmas = format!(
            "PRAGMA busy_timeout = 10000; PRAGMA synchronous = {sync}; \
             PRAGMA journal_size_limit = {WAL_LIMIT_BYTES};"
        );
        let writer = connect(&format!("{url}?mode=rwc"), 1, pragmas.clone())
            .await
            .map_err(|e| StoreError::Open {
                path: path.to_path_buf(),
                reason: e.to_string(),
            })?;
        sqlx::query("PRAGMA journal_mode = WAL")
            .execute(&writer)
            .await?;
        sqlx::migrate!("./migrations").run(&writer).await?;
        adopt_rows(&writer).await?;
        let reader = connect(&format!("{url}?mode=ro"), READERS, pragmas).await?;
        Ok(Store {
            writer,
            reader,
            engine: Engine::Sqlite,
            identity: fault::file_identity(path),
            path: Arc::new(path.to_path_buf()),
            lock: Some(Arc::new(lock)),
            url: None,
            health: Arc::new(tokio::sync::watch::channel(None).0),
        })
    }

    /// Opens a PostgreSQL database by URL (created tables: its own
    /// migrations, `migrations/postgres/`). `durability` maps to
    /// `synchronous_commit`: full → on; normal and off → off (a server
    /// crash may lose the last commits, never consistency).
    async fn open_postgres(url: &str, durability: Durability) -> Result<Store, StoreError> {
        install_drivers();
        let sync = match durability {
            Durability::Full => "on",
            Durability::Normal | Durability::Off => "off",
        };
        let name = redact_url(url);
        // A server stopped mid-transaction (SIGSTOP, a frozen VM) must not
        // hold lease rows for ever: its session is ended after 5 s idle in
        // a transaction; and a claim waits for a lease row at most 3 s.
        let setup = format!(
            "SET synchronous_commit = {sync}; SET idle_in_transaction_session_timeout = 5000; \
             SET lock_timeout = 3000"
        );
        // sqlx's `Any` declares a NULL f64 as float4; a statement cached
        // after such a first use then takes a later 8-byte f64 as float4
        // and PostgreSQL refuses it ("incorrect binary data format").
        // Unnamed statements, typed at each use, avoid that.
        let sep = if url.contains('?') { '&' } else { '?' };
        let url = &format!("{url}{sep}statement-cache-capacity=0");
        probe(url).await.map_err(|reason| StoreError::Connect {
            url: name.clone(),
            seconds: PG_CONNECT.as_secs(),
            reason,
        })?;
        let writer = connect(url, 1, setup.clone())
            .await
            .map_err(|e| StoreError::Connect {
                url: name.clone(),
                seconds: PG_CONNECT.as_secs(),
                reason: e.to_string(),
            })?;
        sqlx::migrate!("./migrations/postgres").run(&writer).await?;
        let reader = connect(url, READERS, setup).await?;
        Ok(Store {
            writer,
            reader,
            engine: Engine::Postgres,
            identity: None,
            path: Arc::new(PathBuf::from(name)),
            lock: None,
            url: Some(Arc::new(url.clone())),
            health: Arc::new(tokio::sync::watch::channel(None).0),
        })
    }

    pub fn engine(&self) -> Engine {
        self.engine
    }

    /// Where a channel's state is restored from: the writer's connection
    /// on SQLite; on PostgreSQL a read connection (every connection sees
    /// every commit there, and the writer's one connection stays free for
    /// commits while other servers' channels are re-read).
    pub fn state_pool(&self) -> &Pool {
        match self.engine {
            Engine::Sqlite => &self.writer,
            Engine::Postgres => &self.reader,
        }
    }

    /// The SQLite file, or the PostgreSQL URL without its password.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Records what the server listens on in the lock file, so a second
    /// server's refusal can name it.
    pub fn note_holder(&self, listen: &str) {
        if let Some(lock) = &self.lock {
            lock.note(listen);
        }
    }

    /// Follows write health: `None` while writes succeed.
    pub fn health(&self) -> tokio::sync::watch::Receiver<Option<StorageFault>> {
        self.health.subscribe()
    }

    /// Runs `work` in one write transaction and commits it; `Ok` means
    /// committed. After any failure the connection is closed rather than
    /// returned to the pool: after SQLITE_FULL and its kin SQLite may have
    /// rolled the transaction back itself, and a reused connection whose
    /// transaction depth disagrees with SQLite's turns later "commits" into
    /// savepoint releases that never reach the file (readings acknowledged,
    /// never stored). The pool opens a fresh connection for the next write.
    pub async fn write<T>(
        &self,
        work: impl AsyncFnOnce(&mut Tx<'_>) -> Result<T, StoreError>,
    ) -> Result<T, StoreError> {
        if let Err(fault) = fault::check_identity(&self.path, self.identity) {
            return Err(self.failed(fault, String::new()));
        }
        let mut conn = match self.writer.acquire().await {
            Ok(conn) => conn,
            Err(e) => return Err(self.classify(StoreError::Database(e))),
        };
        let result = async {
            let mut tx = conn.begin().await?;
            let value = work(&mut tx).await?;
            tx.commit().await?;
            Ok::<T, StoreError>(value)
        }
        .await;
        match result {
            Ok(value) => {
                self.health.send_if_modified(|h| h.take().is_some());
                Ok(value)
            }
            Err(e) => {
                if let Err(close) = conn.close().await {
                    tracing::warn!(error = %close, "closing the failed writer connection");
                }
                Err(self.classify(e))
            }
        }
    }

    /// A small real write, to learn whether writes succeed again.
    pub async fn probe_write(&self, now_ns: i64) -> Result<(), StoreError> {
        self.write(async |tx| {
            sqlx::query(
                "INSERT INTO server_meta (key, value) VALUES ('write_probe_ns', $1) \
                 ON CONFLICT (key) DO UPDATE SET value = excluded.value",
            )
            .bind(now_ns.to_string())
            .execute(&mut **tx)
            .await?;
            Ok(())
        })
        .await
    }

    /// Sorts a failed write's error into a fault with the path, and
    /// records it for health.
    fn classify(&self, e: StoreError) -> StoreError {
        match &e {
            StoreError::Database(db) => match fault::of_sqlx(db, self.engine) {
                Some(fault) => self.failed(fault, db.to_string()),
                None => e,
            },
            StoreError::Unwritable { fault, .. } => {
                let fault = *fault;
                self.health.send_replace(Some(fault));
                e
            }
            _ => e,
        }
    }

    fn failed(&self, fault: StorageFault, detail: String) -> StoreError {
        tracing::error!(db = %self.path.display(), ?fault, %detail, "database write failed");
        self.health.send_replace(Some(fault));
        StoreError::Unwritable {
            path: self.path.to_path_buf(),
            fault,
            detail,
        }
    }

    /// Closes both pools and releases the lock, so a server started again
    /// in the same process may take it.
    pub async fn close(&self) {
        self.reader.close().await;
        self.writer.close().await;
        if let Some(lock) = &self.lock {
            lock.release();
        }
    }
}

/// How long opening a PostgreSQL store waits for its server: a refused or
/// silent port is reported in seconds, not after the pool's 30 s of retries.
const PG_CONNECT: std::time::Duration = std::time::Duration::from_secs(5);

/// One plain connection to `url` within [`PG_CONNECT`], before any pool.
async fn probe(url: &str) -> Result<(), String> {
    let options = AnyConnectOptions::from_str(url).map_err(|e| e.to_string())?;
    match tokio::time::timeout(PG_CONNECT, sqlx::AnyConnection::connect_with(&options)).await {
        Ok(Ok(conn)) => conn.close().await.map_err(|e| e.to_string()),
        Ok(Err(e)) => Err(e.to_string()),
        Err(_) => Err("no answer".into()),
    }
}

/// A pool whose every new connection first runs `setup`.
async fn connect(url: &str, max: u32, setup: String) -> Result<Pool, sqlx::Error> {
    let options = AnyConnectOptions::from_str(url)?;
    AnyPoolOptions::new()
        .max_connections(max)
        .after_connect(move |conn, _| {
            let setup = setup.clone();
            Box::pin(async move {
                conn.execute(sqlx::AssertSqlSafe(setup)).await?;
                Ok(())
            })
        })
        .connect_with(options)
        .await
}

/// A SQLite URL for a file path (`%`, `?` and `#` escaped: SQLite's
/// URL parser decodes them).
fn sqlite_url(path: &Path) -> String {
    let mut escaped = String::new();
    for c in path.display().to_string().chars() {
        match c {
            '%' => escaped.push_str("%25"),
            '?' => escaped.push_str("%3F"),
            '#' => escaped.push_str("%23"),
            c => escaped.push(c),
        }
    }
    format!("sqlite://{escaped}")
}

/// Moves readings a server before chunks stored one per row into
/// chunks, a transaction at a time (a crash in between leaves each
/// reading in exactly one of the two; the next open goes on).
async fn adopt_rows(writer: &Pool) -> Result<(), StoreError> {
    let mut moved = 0u64;
    loop {
        let mut tx = writer.begin().await?;
        let n = chunks::adopt_rows(&mut tx, ADOPT_ROWS_PER_TX).await?;
        tx.commit().await?;
        if n == 0 {
            break;
        }
        moved += n;
    }
    if moved > 0 {
        tracing::info!(readings = moved, "readings moved into compressed chunks");
        // The rows' pages are free now, a few times what the chunks take:
        // once, hand them back to the file system rather than keep a file
        // that stays at its old size until history grows into it.
        sqlx::query("VACUUM").execute(writer).await?;
        tracing::info!("database file compacted after the move");
    }
    Ok(())
}

/// One reading as stored.
#[derive(Debug, Clone, PartialEq)]
pub struct ReadingRow {
    pub channel_key: i64,
    pub seq: u64,
    pub run_id: i64,
    pub time_ns: i64,
    pub volts: f64,
    pub amps: Option<f64>,
    pub temp_c: Option<f64>,
    pub cell_volts_used: f64,
    pub soc_model: Option<f64>,
    pub soc_fused: Option<f64>,
    pub charge_ah: f64,
    pub energy_wh: f64,
    pub flags: i64,
    /// The coulomb count before clamping; `None` while SOC is unknown.
    pub soc_counted_unclamped: Option<f64>,
}

pub mod flags {
    pub const OUT_OF_ORDER: i64 = 1;
    pub const SOC_CLAMPED: i64 = 2;
    pub const RESTING: i64 = 4;
    pub const REST_SETTLED: i64 = 8;
    pub const OCV_OHMIC: i64 = 16;
    pub const OCV_COUNTED: i64 = 32;
    pub const GAP_BEFORE: i64 = 64;
    /// The coulomb count left [0, 1] and was clamped.
    pub const COUNT_CLAMPED: i64 = 128;
    /// Operating mode from the current (neither bit: rest, or no current).
    pub const CHARGING: i64 = 256;
    pub const DISCHARGING: i64 = 512;
    /// Open-circuit voltage source beyond the first two bits (none of the
    /// five bits: the terminal voltage, no current reported).
    pub const OCV_REST: i64 = 1024;
    pub const OCV_REVERSIBLE: i64 = 2048;
    /// Under current with no open-circuit estimate: thermodynamics absent.
    pub const OCV_NONE: i64 = 4096;

    use crate::estimator::OcvSource;

    pub fn of_ocv_source(source: OcvSource) -> i64 {
        match source {
            OcvSource::Terminal => 0,
            OcvSource::Rest => OCV_REST,
            OcvSource::OhmicCompensated => OCV_OHMIC,
            OcvSource::CountedSoc => OCV_COUNTED,
            OcvSource::Reversible => OCV_REVERSIBLE,
            OcvSource::None => OCV_NONE,
        }
    }

    pub fn ocv_source(flags: i64) -> OcvSource {
        [
            (OCV_REST, OcvSource::Rest),
            (OCV_OHMIC, OcvSource::OhmicCompensated),
            (OCV_COUNTED, OcvSource::CountedSoc),
            (OCV_REVERSIBLE, OcvSource::Reversible),
            (OCV_NONE, OcvSource::None),
        ]
        .into_iter()
        .find(|(bit, _)| flags & bit != 0)
        .map_or(OcvSource::Terminal, |(_, source)| source)
    }
}

/// The definition a run was computed with.
#[derive(Debug, Clone, PartialEq)]
pub struct RunRow {
    pub run_id: i64,
    pub channel_key: i64,
    pub chemistry_id: String,
    pub n_electrons: u32,
    pub e_standard_298_v: f64,
    pub de_dt_v_per_k: f64,
    pub cells_in_series: u32,
    pub default_temp_c: f64,
    pub equilibrium_tolerance_v: f64,
    pub soc_model: String,
    /// The channel definition as JSON (runs since migration 0004).
    pub definition_json: Option<String>,
    /// The run's definition carries a model of this cell (an E° override
    /// or an apparent n), not only the chemistry's.
    pub ocv_model_of_cell: bool,
}

impl RunRow {
    /// Whether a definition (JSON) carries a model of its own cell.
    pub fn definition_models_cell(definition_json: Option<&str>) -> bool {
        definition_json
            .and_then(|j| serde_json::from_str::<serde_json::Value>(j).ok())
            .is_some_and(|v| {
                !v["e_standard_298_override_v"].is_null() || !v["n_apparent"].is_null()
            })
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct ChannelRow {
    pub channel_key: i64,
    pub channel_id: String,
    pub definition_json: String,
    pub rules_json: Option<String>,
    pub current_run_id: i64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct AlertRow {
    pub alert_id: u64,
    pub channel_id: String,
    pub run_id: i64,
    pub kind: AlertKind,
    pub severity: Severity,
    pub raised_ns: i64,
    pub raised_seq: u64,
    pub trigger_value: f64,
    pub threshold: f64,
    pub unit: String,
    pub message: String,
    pub seconds_to_target: Option<f64>,
    pub cleared_ns: Option<i64>,
    pub ack_by: Option<String>,
    pub ack_ns: Option<i64>,
    pub ack_note: Option<String>,
    /// Raised by an imported recording: never pushed or delivered.
    pub historical: bool,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EventKind {
    Raised = 1,
    Cleared = 2,
    Acknowledged = 3,
}

impl EventKind {
    fn from_code(code: i64) -> EventKind {
        match code {
            2 => EventKind::Cleared,
            3 => EventKind::Acknowledged,
            _ => EventKind::Raised,
        }
    }
}

/// An alert event as published to subscribers.
#[derive(Debug, Clone, PartialEq)]
pub struct AlertEvent {
    pub event_id: u64,
    pub kind: EventKind,
    pub alert: AlertRow,
}

const ALERT_COLUMNS: &str = "a.alert_id, c.channel_id, a.run_id, a.kind, a.severity, a.raised_ns, a.raised_seq, \
     a.trigger_value, a.threshold, a.unit, a.message, a.seconds_to_target, a.cleared_ns, a.ack_by, a.ack_ns, a.ack_note, a.historical";

fn alert_from_row(row: &DbRow) -> Result<AlertRow, StoreError> {
    let kind_code: i64 = row.try_get("kind")?;
    Ok(AlertRow {
        alert_id: row.try_get::<i64, _>("alert_id")? as u64,
        channel_id: row.try_get("channel_id")?,
        run_id: row.try_get("run_id")?,
        kind: AlertKind::from_code(kind_code)
            .ok_or_else(|| StoreError::Corrupt(format!("alert kind {kind_code}")))?,
        severity: Severity::from_code(row.try_get("severity")?),
        raised_ns: row.try_get("raised_ns")?,
        raised_seq: row.try_get::<i64, _>("raised_seq")? as u64,
        trigger_value: row
            .try_get::<Option<f64>, _>("trigger_value")?
            .unwrap_or(f64::NAN),
        threshold: row.try_get("threshold")?,
        unit: row.try_get("unit")?,
        message: row.try_get("message")?,
        seconds_to_target: row.try_get("seconds_to_target")?,
        cleared_ns: row.try_get("cleared_ns")?,
        ack_by: row.try_get("ack_by")?,
        ack_ns: row.try_get("ack_ns")?,
        ack_note: row.try_get("ack_note")?,
        historical: row.try_get::<i64, _>("historical")? != 0,
    })
}

fn reading_from_row(row: &DbRow) -> Result<ReadingRow, StoreError> {
    Ok(ReadingRow {
        channel_key: row.try_get("channel_key")?,
        seq: row.try_get::<i64, _>("seq")? as u64,
        run_id: row.try_get("run_id")?,
        time_ns: row.try_get("time_ns")?,
        volts: row.try_get("volts")?,
        amps: row.try_get("amps")?,
        temp_c: row.try_get("temp_c")?,
        cell_volts_used: row.try_get("cell_volts_used")?,
        soc_model: row.try_get("soc_model")?,
        soc_fused: row.try_get("soc_fused")?,
        charge_ah: row.try_get("charge_ah")?,
        energy_wh: row.try_get("energy_wh")?,
        flags: row.try_get("flags")?,
        soc_counted_unclamped: row.try_get("soc_counted_unclamped")?,
    })
}

fn run_from_row(row: &DbRow) -> Result<RunRow, StoreError> {
    Ok(RunRow {
        run_id: row.try_get("run_id")?,
        channel_key: row.try_get("channel_key")?,
        chemistry_id: row.try_get("chemistry_id")?,
        n_electrons: row.try_get::<i64, _>("n_electrons")? as u32,
        e_standard_298_v: row.try_get("e_standard_298_v")?,
        de_dt_v_per_k: row.try_get("de_dt_v_per_k")?,
        cells_in_series: row.try_get::<i64, _>("cells_in_series")? as u32,
        default_temp_c: row.try_get("default_temp_c")?,
        equilibrium_tolerance_v: row.try_get("equilibrium_tolerance_v")?,
        soc_model: row.try_get("soc_model")?,
        ocv_model_of_cell: RunRow::definition_models_cell(
            row.try_get::<Option<String>, _>("definition_json")?
                .as_deref(),
        ),
        definition_json: row.try_get("definition_json")?,
    })
}

// ---- channels, runs, chemistries -------------------------------------------------

macro_rules! channel_select {
    ($rest:literal) => {
        concat!(
            "SELECT channel_key, channel_id, definition_json, rules_json, current_run_id FROM channels ",
            $rest
        )
    };
}

fn channel_from_row(r: &DbRow) -> Result<ChannelRow, StoreError> {
    Ok(ChannelRow {
        channel_key: r.try_get("channel_key")?,
        channel_id: r.try_get("channel_id")?,
        definition_json: r.try_get("definition_json")?,
        rules_json: r.try_get("rules_json")?,
        current_run_id: r.try_get("current_run_id")?,
    })
}

pub async fn list_channels(pool: &Pool) -> Result<Vec<ChannelRow>, StoreError> {
    let rows = sqlx::query(channel_select!("ORDER BY channel_id"))
        .fetch_all(pool)
        .await?;
    rows.iter().map(channel_from_row).collect()
}

/// One channel by id, through the unique index (cost independent of the
/// number of channels).
pub async fn get_channel(pool: &Pool, channel_id: &str) -> Result<Option<ChannelRow>, StoreError> {
    let row = sqlx::query(channel_select!("WHERE channel_id = $1"))
        .bind(channel_id)
        .fetch_optional(pool)
        .await?;
    row.as_ref().map(channel_from_row).transpose()
}

/// Inserts or replaces a channel; with `new_run` a run row is added and made current.
pub async fn put_channel(
    store: &Store,
    channel_id: &str,
    definition_json: &str,
    run: Option<RunRow>,
    now_ns: i64,
) -> Result<(i64, i64), StoreError> {
    store
        .write(async |tx| put_channel_in(tx, channel_id, definition_json, run, now_ns).await)
        .await
}

async fn put_channel_in(
    tx: &mut Tx<'_>,
    channel_id: &str,
    definition_json: &str,
    run: Option<RunRow>,
    now_ns: i64,
) -> Result<(i64, i64), StoreError> {
    let existing =
        sqlx::query("SELECT channel_key, current_run_id FROM channels WHERE channel_id = $1")
            .bind(channel_id)
            .fetch_optional(&mut **tx)
            .await?;
    let channel_key = match &existing {
        Some(row) => {
            let key: i64 = row.try_get("channel_key")?;
            sqlx::query("UPDATE channels SET definition_json = $1, updated_ns = $2 WHERE channel_key = $3")
                .bind(definition_json)
                .bind(now_ns)
                .bind(key)
                .execute(&mut **tx)
                .await?;
            key
        }
        None => sqlx::query("INSERT INTO channels (channel_id, definition_json, current_run_id, updated_ns) VALUES ($1, $2, 0, $3) RETURNING channel_key")
            .bind(channel_id)
            .bind(definition_json)
            .bind(now_ns)
            .fetch_one(&mut **tx)
            .await?
            .try_get("channel_key")?,
    };
    let run_id = match run {
        Some(run) => {
            let run_id: i64 = sqlx::query(
                "INSERT INTO runs (channel_key, started_ns, chemistry_id, n_electrons, e_standard_298_v, de_dt_v_per_k, \
                 cells_in_series, default_temp_c, equilibrium_tolerance_v, soc_model, definition_json) \
                 VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11) RETURNING run_id",
            )
            .bind(channel_key)
            .bind(now_ns)
            .bind(&run.chemistry_id)
            .bind(i64::from(run.n_electrons))
            .bind(run.e_standard_298_v)
            .bind(run.de_dt_v_per_k)
            .bind(i64::from(run.cells_in_series))
            .bind(run.default_temp_c)
            .bind(run.equilibrium_tolerance_v)
            .bind(&run.soc_model)
            .bind(&run.definition_json)
            .fetch_one(&mut **tx)
            .await?
            .try_get("run_id")?;
            sqlx::query("UPDATE channels SET current_run_id = $1 WHERE channel_key = $2")
                .bind(run_id)
                .bind(channel_key)
                .execute(&mut **tx)
                .await?;
            run_id
        }
        None => existing
            .map(|r| r.try_get::<i64, _>("current_run_id"))
            .transpose()?
            .unwrap_or(0),
    };
    Ok((channel_key, run_id))
}

pub async fn put_rules(
    store: &Store,
    channel_key: i64,
    rules_json: &str,
) -> Result<(), StoreError> {
    store
        .write(async |tx| {
            sqlx::query("UPDATE channels SET rules_json = $1 WHERE channel_key = $2")
                .bind(rules_json)
                .bind(channel_key)
                .execute(&mut **tx)
                .await?;
            Ok(())
        })
        .await
}

pub async fn get_runs(pool: &Pool, channel_key: i64) -> Result<Vec<RunRow>, StoreError> {
    let rows = sqlx::query("SELECT * FROM runs WHERE channel_key = $1 ORDER BY run_id")
        .bind(channel_key)
        .fetch_all(pool)
        .await?;
    rows.iter().map(run_from_row).collect()
}

pub async fn put_chemistry(
    store: &Store,
    id: &str,
    spec_json: &str,
    now_ns: i64,
) -> Result<(), StoreError> {
    store.write(async |tx| {
        sqlx::query("INSERT INTO chemistries (chemistry_id, spec_json, updated_ns) VALUES ($1, $2, $3) \
                     ON CONFLICT (chemistry_id) DO UPDATE SET spec_json = excluded.spec_json, updated_ns = excluded.updated_ns")
            .bind(id)
            .bind(spec_json)
            .bind(now_ns)
            .execute(&mut **tx)
            .await?;
        Ok(())
    })
    .await
}

pub async fn list_chemistry_specs(pool: &Pool) -> Result<Vec<String>, StoreError> {
    let rows = sqlx::query("SELECT spec_json FROM chemistries ORDER BY chemistry_id")
        .fetch_all(pool)
        .await?;
    rows.iter().map(|r| Ok(r.try_get("spec_json")?)).collect()
}

// ---- restart state ---------------------------------------------------------------

#[derive(Debug, Clone, PartialEq)]
pub struct ResumeState {
    pub max_seq: Option<u64>,
    pub estimator: Option<(i64, i64, f64, String)>,
    pub active_kinds: Vec<AlertKind>,
    /// Where the channel's kept history begins.
    pub marks: crate::retention::RetentionMarks,
}

pub async fn load_resume_state(pool: &Pool, channel_key: i64) -> Result<ResumeState, StoreError> {
    let est = sqlx::query("SELECT run_id, last_seq, last_time_ns, usual_interval_s, state_json FROM estimator_state WHERE channel_key = $1")
        .bind(channel_key)
        .fetch_optional(pool)
        .await?;
    // The front is what the running server kept in its snapshot (a reset
    // timeline moves it below readings already stored); a database from
    // before snapshots falls back to the highest stored seq.
    let max_seq: Option<i64> = match &est {
        Some(r) => Some(r.try_get("last_seq")?),
        None => chunks::max_seq(&mut *pool.begin().await?, channel_key)
            .await?
            .map(|m| m as i64),
    };
    let estimator = est
        .map(|r| -> Result<_, StoreError> {
            Ok((
                r.try_get("run_id")?,
                r.try_get("last_time_ns")?,
                r.try_get("usual_interval_s")?,
                r.try_get("state_json")?,
            ))
        })
        .transpose()?;
    let kinds =
        sqlx::query("SELECT kind FROM alerts WHERE channel_key = $1 AND cleared_ns IS NULL")
            .bind(channel_key)
            .fetch_all(pool)
            .await?;
    let active_kinds = kinds
        .iter()
        .filter_map(|r| {
            r.try_get::<i64, _>("kind")
                .ok()
                .and_then(AlertKind::from_code)
        })
        .collect();
    Ok(ResumeState {
        max_seq: max_seq.map(|m| m as u64),
        estimator,
        active_kinds,
        marks: retention::load_marks(pool, channel_key).await?,
    })
}

pub async fn next_ids(pool: &Pool) -> Result<(u64, u64), StoreError> {
    let a: Option<i64> = sqlx::query("SELECT MAX(alert_id) AS m FROM alerts")
        .fetch_one(pool)
        .await?
        .try_get("m")?;
    let e: Option<i64> = sqlx::query("SELECT MAX(event_id) AS m FROM alert_events")
        .fetch_one(pool)
        .await?
        .try_get("m")?;
    Ok((a.unwrap_or(0) as u64 + 1, e.unwrap_or(0) as u64 + 1))
}

// ---- the write transaction -------------------------------------------------------

pub type Tx<'a> = sqlx::Transaction<'a, sqlx::Any>;

/// Stores the rows of one channel's batch that are new (not stored, not
/// repeated in the batch); for each row, whether it was.
pub async fn insert_new(tx: &mut Tx<'_>, rows: &[ReadingRow]) -> Result<Vec<bool>, StoreError> {
    let Some(key) = rows.first().map(|r| r.channel_key) else {
        return Ok(Vec::new());
    };
    chunks::insert_new(tx, key, rows).await
}

pub async fn save_estimator(
    tx: &mut Tx<'_>,
    channel_key: i64,
    run_id: i64,
    last_seq: u64,
    last_time_ns: i64,
    usual_interval_s: f64,
    state_json: &str,
) -> Result<(), StoreError> {
    sqlx::query(
        "INSERT INTO estimator_state (channel_key, run_id, last_seq, last_time_ns, usual_interval_s, state_json) VALUES ($1, $2, $3, $4, $5, $6) \
         ON CONFLICT (channel_key) DO UPDATE SET run_id = excluded.run_id, last_seq = excluded.last_seq, \
         last_time_ns = excluded.last_time_ns, usual_interval_s = excluded.usual_interval_s, state_json = excluded.state_json",
    )
    .bind(channel_key)
    .bind(run_id)
    .bind(last_seq as i64)
    .bind(last_time_ns)
    .bind(usual_interval_s)
    .bind(state_json)
    .execute(&mut **tx)
    .await?;
    Ok(())
}

pub async fn insert_cycle(
    tx: &mut Tx<'_>,
    channel_key: i64,
    run_id: i64,
    index: u32,
    json: &str,
) -> Result<(), StoreError> {
    sqlx::query(
        "INSERT INTO cycles (channel_key, run_id, cycle_index, record_json) VALUES ($1, $2, $3, $4) \
         ON CONFLICT (channel_key, run_id, cycle_index) DO UPDATE SET record_json = excluded.record_json",
    )
        .bind(channel_key)
        .bind(run_id)
        .bind(i64::from(index))
        .bind(json)
        .execute(&mut **tx)
        .await?;
    Ok(())
}

async fn insert_event(
    tx: &mut Tx<'_>,
    event_id: u64,
    alert_id: u64,
    kind: EventKind,
    time_ns: i64,
) -> Result<(), StoreError> {
    sqlx::query(
        "INSERT INTO alert_events (event_id, alert_id, event_kind, time_ns) VALUES ($1, $2, $3, $4)",
    )
    .bind(event_id as i64)
    .bind(alert_id as i64)
    .bind(kind as i64)
    .bind(time_ns)
    .execute(&mut **tx)
    .await?;
    // The wall clock: when it was stored, whatever the rig's clock says.
    let now_ns = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as i64);
    outbox::enqueue(tx, event_id, alert_id, now_ns).await
}

async fn fetch_alert(tx: &mut Tx<'_>, alert_id: u64) -> Result<Option<AlertRow>, StoreError> {
    let sql = format!(
        "SELECT {ALERT_COLUMNS} FROM alerts a JOIN channels c ON c.channel_key = a.channel_key WHERE a.alert_id = $1"
    );
    let row = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(alert_id as i64)
        .fetch_optional(&mut **tx)
        .await?;
    row.as_ref().map(alert_from_row).transpose()
}

#[allow(clippy::too_many_arguments)]
pub async fn raise_alert(
    tx: &mut Tx<'_>,
    alert_id: u64,
    event_id: u64,
    channel_key: i64,
    run_id: i64,
    a: &RaisedAlert,
    historical: bool,
) -> Result<AlertEvent, StoreError> {
    sqlx::query(
        "INSERT INTO alerts (alert_id, channel_key, run_id, kind, severity, raised_ns, raised_seq, trigger_value, threshold, unit, message, seconds_to_target, historical) \
         VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13)",
    )
    .bind(alert_id as i64)
    .bind(channel_key)
    .bind(run_id)
    .bind(a.kind.code())
    .bind(a.severity.code())
    .bind(a.time_ns)
    .bind(a.seq as i64)
    .bind(a.trigger_value.is_finite().then_some(a.trigger_value))
    .bind(a.threshold)
    .bind(a.unit)
    .bind(&a.message)
    .bind(a.seconds_to_target)
    .bind(i64::from(historical))
    .execute(&mut **tx)
    .await?;
    insert_event(tx, event_id, alert_id, EventKind::Raised, a.time_ns).await?;
    let alert = fetch_alert(tx, alert_id)
        .await?
        .ok_or_else(|| StoreError::Corrupt("raised alert vanished".into()))?;
    Ok(AlertEvent {
        event_id,
        kind: EventKind::Raised,
        alert,
    })
}

/// Clears the active alert of `kind` on a channel, if there is one.
pub async fn clear_alert(
    tx: &mut Tx<'_>,
    event_id: u64,
    channel_key: i64,
    kind: AlertKind,
    time_ns: i64,
) -> Result<Option<AlertEvent>, StoreError> {
    let row = sqlx::query("UPDATE alerts SET cleared_ns = $1 WHERE channel_key = $2 AND kind = $3 AND cleared_ns IS NULL RETURNING alert_id")
        .bind(time_ns)
        .bind(channel_key)
        .bind(kind.code())
        .fetch_optional(&mut **tx)
        .await?;
    let Some(row) = row else { return Ok(None) };
    let alert_id = row.try_get::<i64, _>("alert_id")? as u64;
    insert_event(tx, event_id, alert_id, EventKind::Cleared, time_ns).await?;
    let alert = fetch_alert(tx, alert_id)
        .await?
        .ok_or_else(|| StoreError::Corrupt("cleared alert vanished".into()))?;
    Ok(Some(AlertEvent {
        event_id,
        kind: EventKind::Cleared,
        alert,
    }))
}

pub async fn acknowledge_alert(
    tx: &mut Tx<'_>,
    event_id: u64,
    alert_id: u64,
    by: &str,
    note: &str,
    time_ns: i64,
) -> Result<Option<AlertEvent>, StoreError> {
    let done = sqlx::query(
        "UPDATE alerts SET ack_by = $1, ack_ns = $2, ack_note = $3 WHERE alert_id = $4",
    )
    .bind(by)
    .bind(time_ns)
    .bind(note)
    .bind(alert_id as i64)
    .execute(&mut **tx)
    .await?;
    if done.rows_affected() == 0 {
        return Ok(None);
    }
    insert_event(tx, event_id, alert_id, EventKind::Acknowledged, time_ns).await?;
    let alert = fetch_alert(tx, alert_id)
        .await?
        .ok_or_else(|| StoreError::Corrupt("acknowledged alert vanished".into()))?;
    Ok(Some(AlertEvent {
        event_id,
        kind: EventKind::Acknowledged,
        alert,
    }))
}

// ---- reads -----------------------------------------------------------------------

pub async fn query_readings(
    pool: &Pool,
    channel_key: i64,
    start_ns: i64,
    end_ns: i64,
    limit: u32,
) -> Result<Vec<ReadingRow>, StoreError> {
    query_readings_page(
        pool,
        channel_key,
        start_ns,
        end_ns,
        (i64::MIN, i64::MIN),
        limit,
    )
    .await
}

/// One page of readings in (time, seq) order, after the row `after`
/// (a keyset: each page costs the same however deep into the range).
pub async fn query_readings_page(
    pool: &Pool,
    channel_key: i64,
    start_ns: i64,
    end_ns: i64,
    after: (i64, i64),
    limit: u32,
) -> Result<Vec<ReadingRow>, StoreError> {
    let mut conn = pool.begin().await?;
    chunks::page(
        &mut conn,
        channel_key,
        start_ns,
        end_ns,
        after,
        limit as usize,
    )
    .await
}

/// Records what an operator did to a channel (in the transaction that
/// applies it).
/// A run's operator events of one kind, oldest first: (time, detail JSON).
pub async fn operator_events(
    pool: &Pool,
    channel_key: i64,
    run_id: i64,
    kind: &str,
) -> Result<Vec<(i64, String)>, StoreError> {
    let rows = sqlx::query(
        "SELECT time_ns, detail_json FROM operator_events \
         WHERE channel_key = $1 AND run_id = $2 AND kind = $3 ORDER BY time_ns",
    )
    .bind(channel_key)
    .bind(run_id)
    .bind(kind)
    .fetch_all(pool)
    .await?;
    rows.iter()
        .map(|r| Ok((r.try_get("time_ns")?, r.try_get("detail_json")?)))
        .collect()
}

pub async fn insert_operator_event(
    tx: &mut Tx<'_>,
    channel_key: i64,
    run_id: i64,
    time_ns: i64,
    kind: &str,
    by: &str,
    detail_json: &str,
) -> Result<(), StoreError> {
    sqlx::query(
        "INSERT INTO operator_events (channel_key, run_id, time_ns, kind, by_name, detail_json) \
         VALUES ($1, $2, $3, $4, $5, $6)",
    )
    .bind(channel_key)
    .bind(run_id)
    .bind(time_ns)
    .bind(kind)
    .bind(by)
    .bind(detail_json)
    .execute(&mut **tx)
    .await?;
    Ok(())
}

/// The reading a reset timeline resumes after: `after_seq` if stored,
/// else the highest-seq reading stored out of order. (seq, time_ns).
pub async fn timeline_anchor(
    pool: &Pool,
    channel_key: i64,
    after_seq: Option<u64>,
) -> Result<Option<(u64, i64)>, StoreError> {
    let mut conn = pool.begin().await?;
    let row = match after_seq {
        Some(seq) => chunks::find_seq(&mut conn, channel_key, seq).await?,
        None => chunks::last_flagged(&mut conn, channel_key, flags::OUT_OF_ORDER).await?,
    };
    Ok(row.map(|r| (r.seq, r.time_ns)))
}

pub async fn latest_reading(
    pool: &Pool,
    channel_key: i64,
) -> Result<Option<ReadingRow>, StoreError> {
    chunks::latest(&mut *pool.begin().await?, channel_key).await
}

/// One bucket of a channel's history: statistics as min, max, mean, last;
/// a value some readings lack is none when no reading in the bucket had
/// it, and its `last` NaN when the last reading lacked it.
#[derive(Debug, Clone, PartialEq)]
pub struct BucketRow {
    /// Widths after the query's start.
    pub bucket: i64,
    pub count: u64,
    /// Stack terminal volts.
    pub volts: [f64; 4],
    pub soc: Option<[f64; 4]>,
    /// Per-cell equilibrium voltage, over readings with an open-circuit estimate.
    pub equilibrium_cell_volts: Option<[f64; 4]>,
    /// Per-cell driving force V/cells − E_eq, over readings that have one.
    pub driving_force_v: Option<[f64; 4]>,
    /// The last reading's coulomb and energy counts (its run's).
    pub charge_ah_last: f64,
    pub energy_wh_last: f64,
    pub last_run_id: i64,
}

/// A channel's run and counts at its last stored reading before a time:
/// where the first bucket's charge and energy deltas start from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CountsBefore {
    pub run_id: i64,
    pub charge_ah: f64,
    pub energy_wh: f64,
}

/// The run and counts of the channel's last stored reading before `time_ns`.
pub async fn counts_before(
    pool: &Pool,
    channel_key: i64,
    time_ns: i64,
) -> Result<Option<CountsBefore>, StoreError> {
    let row = chunks::last_before(&mut *pool.begin().await?, channel_key, time_ns).await?;
    Ok(row.map(|r| CountsBefore {
        run_id: r.run_id,
        charge_ah: r.charge_ah,
        energy_wh: r.energy_wh,
    }))
}

/// Downsampled history: from the rollups when a tier tiles the width
/// ([`rollup::tier_for`]), from the readings otherwise. `last` is the
/// reading with the latest time (the highest seq among equal times).
pub async fn query_buckets(
    pool: &Pool,
    channel_key: i64,
    start_ns: i64,
    end_ns: i64,
    width_ns: i64,
    max_buckets: u32,
) -> Result<Vec<BucketRow>, StoreError> {
    match rollup::tier_for(width_ns) {
        Some(tier_s) => {
            rollup::query(
                pool,
                channel_key,
                start_ns,
                end_ns,
                width_ns,
                tier_s,
                max_buckets,
            )
            .await
        }
        None => {
            rollup::query_readings(pool, channel_key, start_ns, end_ns, width_ns, max_buckets).await
        }
    }
}

pub async fn list_alerts(
    pool: &Pool,
    channel_key: Option<i64>,
    min_severity: i64,
    active_only: bool,
    after_id: u64,
    limit: u32,
) -> Result<Vec<AlertRow>, StoreError> {
    let sql = format!(
        "SELECT {ALERT_COLUMNS} FROM alerts a JOIN channels c ON c.channel_key = a.channel_key \
         WHERE a.alert_id > $1 AND ($2 IS NULL OR a.channel_key = $3) AND a.severity >= $4 AND ($5 = 0 OR a.cleared_ns IS NULL) \
         ORDER BY a.alert_id LIMIT $6"
    );
    let rows = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(after_id as i64)
        .bind(channel_key)
        .bind(channel_key)
        .bind(min_severity)
        .bind(i64::from(active_only))
        .bind(i64::from(limit))
        .fetch_all(pool)
        .await?;
    rows.iter().map(alert_from_row).collect()
}

/// Stored events after `after_event_id`, oldest first, for replay.
pub async fn events_after(
    pool: &Pool,
    after_event_id: u64,
    limit: u32,
) -> Result<Vec<AlertEvent>, StoreError> {
    let sql = format!(
        "SELECT e.event_id, e.event_kind, {ALERT_COLUMNS} FROM alert_events e JOIN alerts a ON a.alert_id = e.alert_id \
         JOIN channels c ON c.channel_key = a.channel_key WHERE e.event_id > $1 ORDER BY e.event_id LIMIT $2"
    );
    let rows = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(after_event_id as i64)
        .bind(i64::from(limit))
        .fetch_all(pool)
        .await?;
    rows.iter()
        .map(|r| {
            Ok(AlertEvent {
                event_id: r.try_get::<i64, _>("event_id")? as u64,
                kind: EventKind::from_code(r.try_get("event_kind")?),
                alert: alert_from_row(r)?,
            })
        })
        .collect()
}

pub async fn list_cycles(pool: &Pool, channel_key: i64) -> Result<Vec<(i64, String)>, StoreError> {
    let rows = sqlx::query(
        "SELECT run_id, record_json FROM cycles WHERE channel_key = $1 ORDER BY run_id, cycle_index",
    )
    .bind(channel_key)
    .fetch_all(pool)
    .await?;
    rows.iter()
        .map(|r| Ok((r.try_get("run_id")?, r.try_get("record_json")?)))
        .collect()
}

pub async fn count_readings(pool: &Pool, channel_key: i64) -> Result<u64, StoreError> {
    chunks::count(&mut *pool.begin().await?, channel_key).await
}
