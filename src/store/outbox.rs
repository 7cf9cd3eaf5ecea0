//! The alert outbox: which targets (webhooks, MQTT) want which events, and
//! each event's delivery to each target. A delivery row is written by the
//! statement that stores the event ([`enqueue`], called from the event
//! insert), so it is in the same transaction; senders read pending rows
//! in event order and record each attempt through the writer.

use super::Pool;
use super::{ALERT_COLUMNS, AlertEvent, EventKind, StoreError, Tx, alert_from_row};
use sqlx::Row;

/// A target as the server was started with it.
#[derive(Debug, Clone, PartialEq)]
pub struct Target {
    /// Unique name (`[[notify.webhook]]` name, or `mqtt`).
    pub name: String,
    /// `webhook` or `mqtt`.
    pub kind: &'static str,
    /// Least severity code delivered.
    pub min_severity: i64,
    /// Channel ids delivered; empty: every channel.
    pub channels: Vec<String>,
}

/// Replaces the stored targets with the configured ones (at start): an
/// event from now on gets a delivery row for each target that wants it.
/// Pending deliveries of a target no longer configured stay, undelivered.
pub async fn set_targets(tx: &mut Tx<'_>, targets: &[Target]) -> Result<(), StoreError> {
    sqlx::query("DELETE FROM notify_targets")
        .execute(&mut **tx)
        .await?;
    for t in targets {
        let channels = if t.channels.is_empty() {
            String::new()
        } else {
            format!(",{},", t.channels.join(","))
        };
        sqlx::query(
            "INSERT INTO notify_targets (name, kind, min_severity, channels) VALUES ($1, $2, $3, $4)",
        )
        .bind(&t.name)
        .bind(t.kind)
        .bind(t.min_severity)
        .bind(channels)
        .execute(&mut **tx)
        .await?;
    }
    Ok(())
}

/// One delivery row per target that wants the event `event_id` (of alert
/// `alert_id`), in the event's transaction.
pub(super) async fn enqueue(
    tx: &mut Tx<'_>,
    event_id: u64,
    alert_id: u64,
    now_ns: i64,
) -> Result<(), StoreError> {
    let sql = super::dialect(
        super::Engine::of(tx),
        "INSERT INTO deliveries (target, event_id, created_ns, next_attempt_ns) \
         SELECT t.name, $1, $2, $2 FROM notify_targets t, alerts a JOIN channels c ON c.channel_key = a.channel_key \
         WHERE a.alert_id = $3 AND a.historical = 0 AND a.severity >= t.min_severity \
           AND (t.channels = '' OR instr(t.channels, ',' || c.channel_id || ',') > 0) \
         ON CONFLICT DO NOTHING",
    );
    sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(event_id as i64)
        .bind(now_ns)
        .bind(alert_id as i64)
        .execute(&mut **tx)
        .await?;
    Ok(())
}

/// A delivery waiting to be made, with its event.
#[derive(Debug, Clone)]
pub struct Pending {
    /// Attempts so far.
    pub attempts: u32,
    /// Not before this (server clock, ns).
    pub next_attempt_ns: i64,
    /// When the event was stored.
    pub created_ns: i64,
    /// The event, as subscribers see it.
    pub event: AlertEvent,
}

/// The oldest pending deliveries of `target`, in event order.
pub async fn pending(pool: &Pool, target: &str, limit: u32) -> Result<Vec<Pending>, StoreError> {
    let sql = format!(
        "SELECT d.attempts, d.next_attempt_ns, d.created_ns, e.event_id, e.event_kind, {ALERT_COLUMNS} \
         FROM deliveries d JOIN alert_events e ON e.event_id = d.event_id \
         JOIN alerts a ON a.alert_id = e.alert_id JOIN channels c ON c.channel_key = a.channel_key \
         WHERE d.target = $1 AND d.delivered_ns IS NULL ORDER BY d.event_id LIMIT $2"
    );
    let rows = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(target)
        .bind(i64::from(limit))
        .fetch_all(pool)
        .await?;
    rows.iter()
        .map(|r| {
            Ok(Pending {
                attempts: r.try_get::<i64, _>("attempts")? as u32,
                next_attempt_ns: r.try_get("next_attempt_ns")?,
                created_ns: r.try_get("created_ns")?,
                event: AlertEvent {
                    event_id: r.try_get::<i64, _>("event_id")? as u64,
                    kind: EventKind::from_code(r.try_get("event_kind")?),
                    alert: alert_from_row(r)?,
                },
            })
        })
        .collect()
}

/// What one attempt came to.
#[derive(Debug, Clone, PartialEq)]
pub enum Attempt {
    /// The target took it at this time.
    Delivered { at_ns: i64 },
    /// It failed; try again at `retry_at_ns`.
    Failed { error: String, retry_at_ns: i64 },
}

/// Records an attempt (in the writer's transaction).
pub async fn record(
    tx: &mut Tx<'_>,
    target: &str,
    event_id: u64,
    attempt: &Attempt,
) -> Result<(), StoreError> {
    let q = match attempt {
        Attempt::Delivered { at_ns } => sqlx::query(
            "UPDATE deliveries SET attempts = attempts + 1, delivered_ns = $1, last_error = NULL WHERE target = $2 AND event_id = $3",
        )
        .bind(*at_ns),
        Attempt::Failed { error, retry_at_ns } => sqlx::query(
            "UPDATE deliveries SET attempts = attempts + 1, last_error = $1, next_attempt_ns = $2 WHERE target = $3 AND event_id = $4",
        )
        .bind(error.clone())
        .bind(*retry_at_ns),
    };
    q.bind(target)
        .bind(event_id as i64)
        .execute(&mut **tx)
        .await?;
    Ok(())
}

/// A delivery as `alerts deliveries` lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct DeliveryRow {
    /// Target name.
    pub target: String,
    /// The alert event.
    pub event_id: u64,
    /// Its alert and channel.
    pub alert_id: u64,
    /// Channel id.
    pub channel_id: String,
    /// When the event was stored.
    pub created_ns: i64,
    /// Attempts so far.
    pub attempts: u32,
    /// Next attempt (pending only).
    pub next_attempt_ns: i64,
    /// When it was delivered.
    pub delivered_ns: Option<i64>,
    /// The last failure, if the last attempt failed.
    pub last_error: Option<String>,
}

/// Deliveries after `after` (target, event id) in that order; only the
/// pending ones if asked.
pub async fn list(
    pool: &Pool,
    pending_only: bool,
    after: (&str, u64),
    limit: u32,
) -> Result<Vec<DeliveryRow>, StoreError> {
    let rows = sqlx::query(
        "SELECT d.target, d.event_id, e.alert_id, c.channel_id, d.created_ns, d.attempts, d.next_attempt_ns, \
         d.delivered_ns, d.last_error FROM deliveries d JOIN alert_events e ON e.event_id = d.event_id \
         JOIN alerts a ON a.alert_id = e.alert_id JOIN channels c ON c.channel_key = a.channel_key \
         WHERE (d.target, d.event_id) > ($1, $2) AND ($3 = 0 OR d.delivered_ns IS NULL) \
         ORDER BY d.target, d.event_id LIMIT $4",
    )
    .bind(after.0)
    .bind(after.1 as i64)
    .bind(i64::from(pending_only))
    .bind(i64::from(limit))
    .fetch_all(pool)
    .await?;
    rows.iter()
        .map(|r| {
            Ok(DeliveryRow {
                target: r.try_get("target")?,
                event_id: r.try_get::<i64, _>("event_id")? as u64,
                alert_id: r.try_get::<i64, _>("alert_id")? as u64,
                channel_id: r.try_get("channel_id")?,
                created_ns: r.try_get("created_ns")?,
                attempts: r.try_get::<i64, _>("attempts")? as u32,
                next_attempt_ns: r.try_get("next_attempt_ns")?,
                delivered_ns: r.try_get("delivered_ns")?,
                last_error: r.try_get("last_error")?,
            })
        })
        .collect()
}

/// Pending deliveries per target (for metrics).
pub async fn pending_counts(pool: &Pool) -> Result<Vec<(String, u64)>, StoreError> {
    let rows = sqlx::query(
        "SELECT target, COUNT(*) AS n FROM deliveries WHERE delivered_ns IS NULL GROUP BY target ORDER BY target",
    )
    .fetch_all(pool)
    .await?;
    rows.iter()
        .map(|r| Ok((r.try_get("target")?, r.try_get::<i64, _>("n")? as u64)))
        .collect()
}
