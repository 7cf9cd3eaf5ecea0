//! `GET /api/v1/live`: server-sent events for the console and any
//! dashboard. `alert` events carry a `WatchAlertsResponse` (from now on,
//! or replayed after `after_event_id`); with `channel_id`, `readings`
//! events carry the channel's newly committed readings
//! (`QueryReadingsResponse`, thinned to at most [`MAX_PER_TICK`] per
//! tick, the newest always kept) every [`TICK`]. The stream ends when the
//! server stops or the client reads too slowly; clients reconnect with
//! the last `resume_after_event_id` they saw.
//!
//! Feeds are bounded: [`FEEDS_IN_ALL`] at once and [`FEEDS_PER_CLIENT`]
//! per peer address, so feeds never take the connections the API and
//! health need. A followed channel is read from the store by one tail
//! task, however many feeds follow it, and each tick's event is encoded
//! once and handed to every feed as shared bytes: a feed that does not
//! read costs a place in a bounded buffer until it is let go, never a
//! store read or a wait for anyone else.

use super::api::{Shared, severity_param};
use super::conn::Peer;
use super::error::ApiError;
use super::params::Params;
use crate::grpc::convert::stored_to_pb;
use crate::ingest::session::ClientSlots;
use crate::ingest::{ChannelRuntime, Hub, stopped};
use crate::pb;
use crate::pb::alert_service_server::AlertService;
use crate::store::{self, RunRow};
use axum::body::{Body, Bytes};
use axum::extract::{Query, State};
use axum::http::{HeaderMap, header};
use axum::response::{IntoResponse, Response};
use std::collections::HashMap;
use std::convert::Infallible;
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio::sync::{OwnedSemaphorePermit, Semaphore, broadcast, mpsc};
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
/// Live feeds open at once, server-wide.
pub const FEEDS_IN_ALL: usize = 256;
/// Live feeds one peer address may hold (a browser tab holds one).
pub const FEEDS_PER_CLIENT: u64 = 16;
/// Ticks a tail keeps for a feed that is behind; a feed further behind
/// skips to the newest (a plot loses points, nobody waits).
const TAIL_BUFFER: usize = 16;
/// A comment line every so often, so proxies and the idle limit see bytes.
const KEEP_ALIVE: Duration = Duration::from_secs(5);

/// The live feeds' places and the tails of followed channels.
pub struct Feeds {
    in_all: Arc<Semaphore>,
    per_client: ClientSlots,
    tails: Mutex<HashMap<String, broadcast::Sender<Bytes>>>,
}

impl Default for Feeds {
    fn default() -> Feeds {
        Feeds {
            in_all: Arc::new(Semaphore::new(FEEDS_IN_ALL)),
            per_client: ClientSlots::default(),
            tails: Mutex::new(HashMap::new()),
        }
    }
}

/// What a feed holds until it ends.
struct Place {
    _in_all: OwnedSemaphorePermit,
    _client: crate::ingest::session::ClientSlot,
}

impl Feeds {
    fn take(&self, peer: Option<Peer>) -> Result<Place, ApiError> {
        let client = peer.map_or_else(|| "unknown".to_string(), |p| p.0.ip().to_string());
        let busy = |what: String| ApiError::from(tonic::Status::resource_exhausted(what));
        let in_all = self.in_all.clone().try_acquire_owned().map_err(|_| {
            busy(format!(
                "{FEEDS_IN_ALL} live feeds are open already; retry later"
            ))
        })?;
        let client_slot = self
            .per_client
            .take(client.clone(), FEEDS_PER_CLIENT)
            .ok_or_else(|| {
                busy(format!(
                    "client {client}: {FEEDS_PER_CLIENT} live feeds open already; close a tab or share one feed"
                ))
            })?;
        Ok(Place {
            _in_all: in_all,
            _client: client_slot,
        })
    }

    /// The channel's tail, started if no feed follows it yet.
    async fn follow(
        self: &Arc<Feeds>,
        hub: &Arc<Hub>,
        channel_id: &str,
    ) -> Result<broadcast::Receiver<Bytes>, ApiError> {
        if let Some(tx) = self.tails.lock().expect("tails poisoned").get(channel_id) {
            return Ok(tx.subscribe());
        }
        let tail = Tail::start(hub, channel_id).await?;
        let mut tails = self.tails.lock().expect("tails poisoned");
        // Another feed may have started one meanwhile: join it.
        if let Some(tx) = tails.get(channel_id) {
            return Ok(tx.subscribe());
        }
        let (tx, rx) = broadcast::channel(TAIL_BUFFER);
        tails.insert(channel_id.to_string(), tx.clone());
        Ok(tail.spawn(hub.clone(), self.clone(), tx, rx))
    }

    /// Ends a tail nobody follows; false if a feed joined meanwhile.
    fn retire(&self, channel_id: &str, tx: &broadcast::Sender<Bytes>) -> bool {
        let mut tails = self.tails.lock().expect("tails poisoned");
        if tx.receiver_count() > 0 {
            return false;
        }
        tails.remove(channel_id);
        true
    }
}

/// The handler.
pub(super) async fn live(
    State(s): Shared,
    headers: HeaderMap,
    peer: Option<axum::Extension<Peer>>,
    Query(q): Query<HashMap<String, String>>,
) -> Result<Response, ApiError> {
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
    let place = match s.feeds.take(peer.map(|p| p.0)) {
        Ok(place) => place,
        // The connection is closed after the refusal: a client that
        // asked for a feed and does not read the answer must not keep a
        // connection the API needs.
        Err(refused) => {
            let mut answer = refused.into_response();
            let h = answer.headers_mut();
            h.insert(
                header::CONNECTION,
                header::HeaderValue::from_static("close"),
            );
            h.insert(header::RETRY_AFTER, header::HeaderValue::from_static("5"));
            return Ok(answer);
        }
    };
    let readings = if channel_id.is_empty() {
        None
    } else {
        s.allow(&headers, "/gibbsline.v1.HistoryService/QueryReadings")?;
        Some(s.feeds.follow(&s.hub, &channel_id).await?)
    };
    let alerts = s
        .apis
        .alert
        .watch_alerts(tonic::Request::new(request))
        .await?
        .into_inner();
    let (tx, rx) = mpsc::channel(CLIENT_BUFFER);
    tokio::spawn(pump(s.hub.clone(), alerts, readings, tx, place));
    let body = Body::from_stream(ReceiverStream::new(rx).map(Ok::<Bytes, Infallible>));
    Ok((
        [
            (header::CONTENT_TYPE, "text/event-stream"),
            (header::CACHE_CONTROL, "no-cache"),
        ],
        body,
    )
        .into_response())
}

/// Moves alert events and readings to the client until one side ends.
async fn pump(
    hub: Arc<Hub>,
    mut alerts: impl Stream<Item = Result<pb::WatchAlertsResponse, tonic::Status>> + Unpin,
    mut readings: Option<broadcast::Receiver<Bytes>>,
    tx: mpsc::Sender<Bytes>,
    _place: Place,
) {
    let mut keep_alive = tokio::time::interval(KEEP_ALIVE);
    keep_alive.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
    loop {
        let event = tokio::select! {
            item = alerts.next() => match item {
                Some(Ok(a)) => sse("alert", &a),
                Some(Err(e)) => sse("end", &serde_json::json!({ "message": e.message() })),
                None => break,
            },
            tick = next_tick(&mut readings), if readings.is_some() => match tick {
                Some(event) => event,
                None => break,
            },
            _ = keep_alive.tick() => Bytes::from_static(b":\n\n"),
            // The connection went (its body was dropped): give the place
            // back now, not at the next event.
            _ = tx.closed() => break,
            _ = stopped(hub.shutdown_signal()) => break,
        };
        // A client that does not keep up is let go; it reconnects.
        if tx.try_send(event).is_err() {
            break;
        }
    }
}

/// The tail's next event; a feed that fell behind skips to the newest.
async fn next_tick(readings: &mut Option<broadcast::Receiver<Bytes>>) -> Option<Bytes> {
    let rx = readings.as_mut()?;
    loop {
        match rx.recv().await {
            Ok(event) => return Some(event),
            Err(broadcast::error::RecvError::Lagged(_)) => continue,
            Err(broadcast::error::RecvError::Closed) => return None,
        }
    }
}

/// One server-sent event: its name and its JSON on one `data:` line
/// (serde_json writes no newlines).
fn sse(name: &str, body: &impl serde::Serialize) -> Bytes {
    let data = serde_json::to_string(body).unwrap_or_else(|e| format!("{{\"error\":\"{e}\"}}"));
    Bytes::from(format!("event: {name}\ndata: {data}\n\n"))
}

/// One channel's committed readings, picked up tick by tick for every
/// feed that follows it.
struct Tail {
    channel_id: String,
    runtime: Arc<Mutex<ChannelRuntime>>,
    reader: store::Pool,
    channel_key: i64,
    runs: HashMap<i64, RunRow>,
    /// The last reading sent, as (time, seq).
    cursor: (i64, i64),
    seen_seq: Option<u64>,
}

impl Tail {
    /// Starts after the channel's newest stored reading.
    async fn start(hub: &Hub, channel_id: &str) -> Result<Tail, ApiError> {
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
        Ok(Tail {
            channel_id: channel_id.to_string(),
            runtime,
            reader,
            channel_key,
            runs: HashMap::new(),
            cursor,
            seen_seq,
        })
    }

    /// Runs the tail on a task of its own; hands back the first feed's
    /// receiver. The tail ends when no feed follows it any more.
    fn spawn(
        mut self,
        hub: Arc<Hub>,
        feeds: Arc<Feeds>,
        tx: broadcast::Sender<Bytes>,
        first: broadcast::Receiver<Bytes>,
    ) -> broadcast::Receiver<Bytes> {
        tokio::spawn(async move {
            let mut tick = tokio::time::interval(TICK);
            tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
            loop {
                tokio::select! {
                    _ = tick.tick() => {}
                    _ = stopped(hub.shutdown_signal()) => return,
                }
                if tx.receiver_count() == 0 && feeds.retire(&self.channel_id, &tx) {
                    return;
                }
                let event = match self.next_readings().await {
                    Ok(Some(page)) => sse("readings", &page),
                    Ok(None) => continue,
                    Err(e) => sse("end", &serde_json::json!({ "message": e.to_string() })),
                };
                let _ = tx.send(event);
            }
        });
        first
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
