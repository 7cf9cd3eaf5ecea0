//! `GET /api/v1/live`: server-sent events for the console and any
//! dashboard. `alert` events carry a `WatchAlertsResponse` (from now on,
//! or replayed after `after_event_id`); with `channel_id`, `readings`
//! events carry the channel's newly committed readings
//! (`QueryReadingsResponse`, thinned to at most [`MAX_PER_TICK`] per
//! tick, the newest always kept) every [`TICK`]. The stream ends when the
//! server stops or the client reads too slowly; clients reconnect with
//! the last `resume_after_event_id` they saw.

use super::api::{Shared, severity_param};
use super::error::ApiError;
use super::params::Params;
use crate::grpc::convert::stored_to_pb;
use crate::ingest::{ChannelRuntime, Hub, stopped};
use crate::pb;
use crate::pb::alert_service_server::AlertService;
use crate::store::{self, RunRow};
use axum::extract::{Query, State};
use axum::http::HeaderMap;
use axum::response::sse::{Event, KeepAlive, Sse};
use std::collections::HashMap;
use std::convert::Infallible;
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::{Stream, StreamExt};

/// How often a followed channel is looked at for new readings.
pub(super) const TICK: Duration = Duration::from_millis(100);
/// Readings sent per tick at most; a plot has no use for more.
pub(super) const MAX_PER_TICK: usize = 200;
/// Readings read per tick at most; a channel faster than this per tick
/// is followed from its newest on.
const READ_PER_TICK: u32 = 5_000;
/// Events waiting for a slow client; past this it is disconnected.
const CLIENT_BUFFER: usize = 64;

type EventResult = Result<Event, Infallible>;

/// The handler.
pub(super) async fn live(
    State(s): Shared,
    headers: HeaderMap,
    Query(q): Query<HashMap<String, String>>,
) -> Result<Sse<impl Stream<Item = EventResult>>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.AlertService/WatchAlerts")?;
    let mut p = Params::new(q);
    let channel_id = p.text("channel_id");
    let request = pb::WatchAlertsRequest {
        after_event_id: p
            .take("after_event_id", "a whole number")?
            .unwrap_or(u64::MAX),
        channel_id: channel_id.clone(),
        min_severity: severity_param(&mut p)?,
    };
    p.done()?;
    let follower = if channel_id.is_empty() {
        None
    } else {
        s.allow(&headers, "/gibbsline.v1.HistoryService/QueryReadings")?;
        Some(Follower::start(&s.hub, &channel_id).await?)
    };
    let alerts = s
        .apis
        .alert
        .watch_alerts(tonic::Request::new(request))
        .await?
        .into_inner();
    let (tx, rx) = mpsc::channel(CLIENT_BUFFER);
    tokio::spawn(pump(s.hub.clone(), alerts, follower, tx));
    Ok(Sse::new(ReceiverStream::new(rx))
        .keep_alive(KeepAlive::new().interval(Duration::from_secs(5))))
}

/// Moves alert events and readings to the client until one side ends.
async fn pump(
    hub: Arc<Hub>,
    mut alerts: impl Stream<Item = Result<pb::WatchAlertsResponse, tonic::Status>> + Unpin,
    mut follower: Option<Follower>,
    tx: mpsc::Sender<EventResult>,
) {
    let mut tick = tokio::time::interval(TICK);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
    loop {
        let event = tokio::select! {
            item = alerts.next() => match item {
                Some(Ok(a)) => json_event("alert", &a),
                Some(Err(e)) => json_event("end", &serde_json::json!({ "message": e.message() })),
                None => break,
            },
            _ = tick.tick(), if follower.is_some() => {
                let Some(f) = follower.as_mut() else { continue };
                match f.next_readings().await {
                    Ok(Some(page)) => json_event("readings", &page),
                    Ok(None) => continue,
                    Err(e) => json_event("end", &serde_json::json!({ "message": e.to_string() })),
                }
            },
            _ = stopped(hub.shutdown_signal()) => break,
        };
        // A client that does not keep up is let go; it reconnects.
        if tx.try_send(Ok(event)).is_err() {
            break;
        }
    }
}

fn json_event(name: &str, body: &impl serde::Serialize) -> Event {
    Event::default()
        .event(name)
        .data(serde_json::to_string(body).unwrap_or_else(|e| format!("{{\"error\":\"{e}\"}}")))
}

/// One channel's committed readings, picked up tick by tick.
struct Follower {
    runtime: Arc<Mutex<ChannelRuntime>>,
    reader: store::Pool,
    channel_key: i64,
    runs: HashMap<i64, RunRow>,
    /// The last reading sent, as (time, seq).
    cursor: (i64, i64),
    seen_seq: Option<u64>,
}

impl Follower {
    /// Starts after the channel's newest stored reading.
    async fn start(hub: &Hub, channel_id: &str) -> Result<Follower, ApiError> {
        let runtime = hub.channel(channel_id).map_err(tonic::Status::from)?;
        let (channel_key, seen_seq) = {
            let g = runtime.lock().expect("channel state poisoned");
            (g.key, g.committed_seq)
        };
        let reader = hub.store().reader.clone();
        let latest = store::latest_reading(&reader, channel_key)
            .await
            .map_err(tonic::Status::from)?;
        let cursor = latest.map_or((i64::MIN, -1), |r| (r.time_ns, r.seq as i64));
        Ok(Follower {
            runtime,
            reader,
            channel_key,
            runs: HashMap::new(),
            cursor,
            seen_seq,
        })
    }

    /// The readings committed since the last call, thinned; none when
    /// nothing new was committed.
    async fn next_readings(
        &mut self,
    ) -> Result<Option<pb::QueryReadingsResponse>, store::StoreError> {
        let committed = self
            .runtime
            .lock()
            .expect("channel state poisoned")
            .committed_seq;
        if committed == self.seen_seq {
            return Ok(None);
        }
        let rows = store::query_readings_page(
            &self.reader,
            self.channel_key,
            self.cursor.0.max(0),
            i64::MAX,
            self.cursor,
            READ_PER_TICK,
        )
        .await?;
        let Some(last) = rows.last() else {
            self.seen_seq = committed;
            return Ok(None);
        };
        self.cursor = (last.time_ns, last.seq as i64);
        if rows.len() < READ_PER_TICK as usize {
            self.seen_seq = committed;
        }
        if rows.iter().any(|r| !self.runs.contains_key(&r.run_id)) {
            self.runs = store::get_runs(&self.reader, self.channel_key)
                .await?
                .into_iter()
                .map(|r| (r.run_id, r))
                .collect();
        }
        let readings = thin(&rows, MAX_PER_TICK)
            .map(|r| stored_to_pb(r, self.runs.get(&r.run_id)))
            .collect();
        Ok(Some(pb::QueryReadingsResponse {
            readings,
            columns: None,
        }))
    }
}

/// At most `keep` of `rows`, evenly spaced, the last always among them.
fn thin<T>(rows: &[T], keep: usize) -> impl Iterator<Item = &T> {
    let n = rows.len();
    let step = n.div_ceil(keep.max(1)).max(1);
    // Counted from the end, so the newest is kept.
    rows.iter()
        .rev()
        .step_by(step)
        .collect::<Vec<_>>()
        .into_iter()
        .rev()
}

#[cfg(test)]
mod tests {
    use super::thin;

    #[test]
    fn thinning_keeps_the_newest_and_at_most_the_limit() {
        let rows: Vec<u32> = (0..1000).collect();
        let kept: Vec<u32> = thin(&rows, 200).copied().collect();
        assert!(kept.len() <= 200, "{}", kept.len());
        assert_eq!(kept.last(), Some(&999));
        assert!(kept.windows(2).all(|w| w[0] < w[1]));
        let few: Vec<u32> = thin(&rows[..5], 200).copied().collect();
        assert_eq!(few, vec![0, 1, 2, 3, 4]);
    }
}
