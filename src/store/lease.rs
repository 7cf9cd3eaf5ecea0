//! Leases on a shared PostgreSQL database (`migrations/postgres/0011`):
//! which server owns a channel's live state, or delivers a notify
//! target's alerts. Times are the database's clock, so servers whose
//! clocks differ still agree on expiry. SQLite has no leases: one server
//! per file (the lock file) owns everything.

use super::{Pool, StoreError, Tx};
use sqlx::Row;

/// The database's clock, ms since the Unix epoch.
const NOW_MS: &str = "CAST(EXTRACT(EPOCH FROM clock_timestamp()) * 1000 AS BIGINT)";

/// What asking for a lease gave.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Claim {
    /// Held, with this fencing token (unchanged while no other server
    /// held it in between).
    Held { token: i64 },
    /// Another server holds it for `expires_in_ms` more.
    Busy {
        owner: String,
        owner_addr: String,
        expires_in_ms: i64,
    },
}

/// The lease channel `channel_key`'s state is owned under.
pub fn channel_name(channel_key: i64) -> String {
    format!("channel:{channel_key}")
}

/// Takes or extends the lease `name` for `owner` for `lease_ms`: granted
/// when free, expired or already ours, or held by a predecessor: an
/// owner whose id starts with `host` (`<host>-`, this machine) at this
/// very address, which this server now listens on, so that one is gone.
/// The token rises only when the owner changes.
pub async fn claim(
    pool: &Pool,
    name: &str,
    owner: &str,
    owner_addr: &str,
    host: &str,
    lease_ms: i64,
) -> Result<Claim, StoreError> {
    let sql = format!(
        "INSERT INTO leases (name, owner, owner_addr, token, expires_ms) \
         VALUES ($1, $2, $3, 1, {NOW_MS} + $4) \
         ON CONFLICT (name) DO UPDATE SET \
           token = CASE WHEN leases.owner = excluded.owner THEN leases.token ELSE leases.token + 1 END, \
           owner = excluded.owner, owner_addr = excluded.owner_addr, expires_ms = excluded.expires_ms \
         WHERE leases.owner = excluded.owner OR leases.expires_ms < {NOW_MS} \
           OR (leases.owner_addr = excluded.owner_addr AND left(leases.owner, length($5)) = $5) \
         RETURNING token"
    );
    let granted = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(name)
        .bind(owner)
        .bind(owner_addr)
        .bind(lease_ms)
        .bind(format!("{host}-"))
        .fetch_optional(pool)
        .await
        .map_err(|e| sorted(e, name))?;
    if let Some(row) = granted {
        return Ok(Claim::Held {
            token: row.try_get("token")?,
        });
    }
    let sql = format!(
        "SELECT owner, owner_addr, expires_ms - {NOW_MS} AS left_ms FROM leases WHERE name = $1"
    );
    let row = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(name)
        .fetch_one(pool)
        .await?;
    Ok(Claim::Busy {
        owner: row.try_get("owner")?,
        owner_addr: row.try_get("owner_addr")?,
        expires_in_ms: row.try_get::<i64, _>("left_ms")?.max(0),
    })
}

/// A failed claim as the storage fault it is: a lease row locked by a
/// stalled server (lock timeout) or a lost connection is one a rig
/// retries (UNAVAILABLE), not an internal error.
fn sorted(e: sqlx::Error, name: &str) -> StoreError {
    match super::fault::of_sqlx(&e, super::Engine::Postgres) {
        Some(fault) => StoreError::Unwritable {
            path: std::path::PathBuf::from(format!("lease {name}")),
            fault,
            detail: e.to_string(),
        },
        None => StoreError::Database(e),
    }
}

/// Extends every lease `owner` still holds; returns them with their
/// tokens (a lease missing from the answer was taken by another server).
pub async fn renew(
    pool: &Pool,
    owner: &str,
    lease_ms: i64,
) -> Result<Vec<(String, i64)>, StoreError> {
    let sql = format!(
        "UPDATE leases SET expires_ms = {NOW_MS} + $2 WHERE owner = $1 RETURNING name, token"
    );
    let rows = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(owner)
        .bind(lease_ms)
        .fetch_all(pool)
        .await?;
    rows.iter()
        .map(|r| Ok((r.try_get("name")?, r.try_get("token")?)))
        .collect()
}

/// Gives up every lease of `owner` (a server stopping in order), so
/// another takes its channels at once rather than after expiry.
pub async fn release_all(pool: &Pool, owner: &str) -> Result<u64, StoreError> {
    let done = sqlx::query("DELETE FROM leases WHERE owner = $1")
        .bind(owner)
        .execute(pool)
        .await?;
    Ok(done.rows_affected())
}

/// Of the leases `held` (name, token) a write relies on, the names no
/// longer ours at that token. The rows stay locked (shared) until the
/// transaction ends, so a server taking one over waits for this commit
/// and then reads what it wrote.
pub async fn fenced_out(
    tx: &mut Tx<'_>,
    owner: &str,
    held: &[(String, i64)],
) -> Result<Vec<String>, StoreError> {
    if held.is_empty() {
        return Ok(Vec::new());
    }
    let mut q = super::Binds::new(
        super::Engine::Postgres,
        "SELECT name, owner, token FROM leases WHERE name IN ",
    );
    q.list(held.iter().map(|(name, _)| name.clone()));
    q.push(" FOR SHARE");
    let rows = q.query().fetch_all(&mut **tx).await?;
    let mut current = std::collections::HashMap::new();
    for r in &rows {
        let name: String = r.try_get("name")?;
        current.insert(
            name,
            (
                r.try_get::<String, _>("owner")?,
                r.try_get::<i64, _>("token")?,
            ),
        );
    }
    Ok(held
        .iter()
        .filter(|(name, token)| {
            current
                .get(name)
                .is_none_or(|(o, t)| o != owner || t != token)
        })
        .map(|(name, _)| name.clone())
        .collect())
}

/// Alert and event ids in commit order across servers: takes the
/// database-wide lock that every transaction storing alert events holds
/// until it commits, then reads the next free ids under it (so ids rise
/// in commit order and a reader of "events after n" never skips one
/// committed later with a lower id).
pub async fn next_ids_locked(tx: &mut Tx<'_>) -> Result<(u64, u64), StoreError> {
    // Any constant works: it only has to be the same for every server.
    sqlx::query("SELECT pg_advisory_xact_lock(7130001)")
        .execute(&mut **tx)
        .await?;
    let row = sqlx::query(
        "SELECT COALESCE((SELECT MAX(alert_id) FROM alerts), 0) AS a, \
                COALESCE((SELECT MAX(event_id) FROM alert_events), 0) AS e",
    )
    .fetch_one(&mut **tx)
    .await?;
    let a: i64 = row.try_get("a")?;
    let e: i64 = row.try_get("e")?;
    Ok((a as u64 + 1, e as u64 + 1))
}

/// Wakes every server listening for alert events (delivered at commit).
pub async fn notify_events(tx: &mut Tx<'_>) -> Result<(), StoreError> {
    sqlx::query("SELECT pg_notify('gibbsline_events', '')")
        .execute(&mut **tx)
        .await?;
    Ok(())
}

/// The newest event id stored (where a relay starts).
pub async fn last_event_id(pool: &Pool) -> Result<u64, StoreError> {
    let row = sqlx::query("SELECT COALESCE(MAX(event_id), 0) AS e FROM alert_events")
        .fetch_one(pool)
        .await?;
    Ok(row.try_get::<i64, _>("e")? as u64)
}

/// Wakes when another server (or this one) commits alert events: a
/// connection LISTENing on the channel the writers NOTIFY. A broken
/// connection is opened again at the next wait; waits also end after
/// their timeout, so a lost notification costs at most that delay.
pub struct EventWaker {
    url: String,
    listener: Option<sqlx::postgres::PgListener>,
}

impl EventWaker {
    /// For a PostgreSQL store; `None` on SQLite.
    pub fn for_store(store: &super::Store) -> Option<EventWaker> {
        Some(EventWaker {
            url: store.url.as_deref()?.clone(),
            listener: None,
        })
    }

    /// Until a notification or `timeout`, whichever is first.
    pub async fn wait(&mut self, timeout: std::time::Duration) {
        if self.listener.is_none() {
            match self.listen().await {
                Ok(l) => self.listener = Some(l),
                Err(e) => {
                    tracing::warn!(error = %e, "cannot listen for alert events; polling");
                    tokio::time::sleep(timeout).await;
                    return;
                }
            }
        }
        let Some(listener) = self.listener.as_mut() else {
            return;
        };
        match tokio::time::timeout(timeout, listener.recv()).await {
            Ok(Ok(_)) | Err(_) => {}
            Ok(Err(e)) => {
                tracing::warn!(error = %e, "alert event listener lost; listening again");
                self.listener = None;
            }
        }
    }

    async fn listen(&self) -> Result<sqlx::postgres::PgListener, sqlx::Error> {
        let mut l = sqlx::postgres::PgListener::connect(&self.url).await?;
        l.listen("gibbsline_events").await?;
        Ok(l)
    }
}
