//! The lab's MQTT broker: alert events published with QoS 1 to
//! `<prefix>/alerts/<channel_id>` (the courier counts one delivered when
//! the broker's PUBACK comes back), and, if asked, each channel's latest
//! state to `<prefix>/state/<channel_id>` on a timer. The connection is
//! kept by rumqttc's event loop, polled by its own task, which reconnects
//! with backoff; a slow or absent broker delays only these tasks.

use super::MqttSpec;
use crate::ingest::{Hub, stopped};
use rumqttc::{AsyncClient, Event, MqttOptions, Packet, QoS};
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::mpsc;

/// How long a publish waits for the broker's PUBACK.
const ACK_LIMIT: Duration = Duration::from_secs(10);
/// Reconnect backoff bounds.
const RECONNECT_FIRST: Duration = Duration::from_millis(500);
const RECONNECT_MAX: Duration = Duration::from_secs(30);

/// `host:port`.
pub(super) fn split_broker(broker: &str) -> Result<(String, u16), &'static str> {
    let (host, port) = broker.rsplit_once(':').ok_or("expected host:port")?;
    let port = port.parse().map_err(|_| "the port is not a number")?;
    if host.is_empty() {
        return Err("no host");
    }
    Ok((host.to_string(), port))
}

/// What a publish was, so its PUBACK can be told apart: the alert the
/// courier waits for, or a state message nobody waits for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Tag {
    Alert(u64),
    State,
}

/// Packet ids to publishes. rumqttc gives a publish its packet id only
/// when its event loop sends it, in the order requests were queued, and
/// says so with `Outgoing::Publish(pkid)`; so tags are queued in request
/// order (under this lock, with the request) and matched to ids as the
/// loop reports them. An id still unacknowledged that is sent again is a
/// retransmission after a reconnect, not a new publish.
#[derive(Debug, Default)]
struct Tracker {
    queued: std::collections::VecDeque<Tag>,
    inflight: std::collections::HashMap<u16, Tag>,
}

impl Tracker {
    fn sent(&mut self, pkid: u16) {
        if pkid == 0 || self.inflight.contains_key(&pkid) {
            return;
        }
        if let Some(tag) = self.queued.pop_front() {
            self.inflight.insert(pkid, tag);
        }
    }

    /// The alert (if any) a PUBACK acknowledges.
    fn acked(&mut self, pkid: u16) -> Option<u64> {
        match self.inflight.remove(&pkid) {
            Some(Tag::Alert(n)) => Some(n),
            _ => None,
        }
    }

    /// A new session (the broker kept nothing): unacknowledged publishes
    /// are dropped by the client and their ids are free again.
    fn session_lost(&mut self) {
        self.inflight.clear();
    }
}

type Shared = Arc<std::sync::Mutex<Tracker>>;

/// Queues a publish with its tag; the tag is taken back if the request
/// queue is full (nothing was queued).
fn publish(
    client: &AsyncClient,
    tracker: &Shared,
    tag: Tag,
    topic: String,
    retain: bool,
    body: Vec<u8>,
) -> Result<(), rumqttc::ClientError> {
    let mut t = tracker.lock().expect("MQTT tracker poisoned");
    t.queued.push_back(tag);
    client
        .try_publish(topic, QoS::AtLeastOnce, retain, body)
        .inspect_err(|_| {
            t.queued.pop_back();
        })
}

/// What the alert courier publishes through.
pub(super) struct Link {
    client: AsyncClient,
    prefix: String,
    tracker: Shared,
    acks: mpsc::Receiver<u64>,
    next: u64,
}

impl Link {
    /// Publishes one event and waits for the PUBACK of its own packet id
    /// (a state message's PUBACK, or a late one of an earlier attempt,
    /// does not count).
    pub(super) async fn publish_alert(
        &mut self,
        channel_id: &str,
        body: Vec<u8>,
    ) -> Result<(), String> {
        self.next += 1;
        let me = self.next;
        let topic = format!("{}/alerts/{channel_id}", self.prefix);
        publish(
            &self.client,
            &self.tracker,
            Tag::Alert(me),
            topic,
            false,
            body,
        )
        .map_err(|e| format!("MQTT publish: {e}"))?;
        let wait = async {
            while let Some(n) = self.acks.recv().await {
                if n == me {
                    return Ok(());
                }
            }
            Err("MQTT connection task ended".to_string())
        };
        match tokio::time::timeout(ACK_LIMIT, wait).await {
            Ok(done) => done,
            Err(_) => Err(format!(
                "no PUBACK from the broker within {} s",
                ACK_LIMIT.as_secs()
            )),
        }
    }
}

/// The client, the task that keeps its connection, and the state
/// publisher if asked for.
pub(super) fn connect(hub: Arc<Hub>, spec: &MqttSpec) -> (Link, Vec<tokio::task::JoinHandle<()>>) {
    let (host, port) = split_broker(&spec.broker).expect("validated with the config");
    let mut options = MqttOptions::new(spec.client_id.clone(), host, port);
    options.set_keep_alive(Duration::from_secs(15));
    options.set_clean_session(false);
    let (client, eventloop) = AsyncClient::new(options, 64);
    let (ack_tx, acks) = mpsc::channel(64);
    let tracker = Shared::default();
    let stop = hub.shutdown_signal();
    let keeper = tokio::spawn(keep(eventloop, tracker.clone(), ack_tx, stop));
    let mut tasks = vec![keeper];
    if spec.state_interval_s > 0 {
        let every = Duration::from_secs(spec.state_interval_s);
        tasks.push(tokio::spawn(publish_states(
            hub,
            client.clone(),
            tracker.clone(),
            spec.topic_prefix.clone(),
            every,
        )));
    }
    let link = Link {
        client,
        prefix: spec.topic_prefix.clone(),
        tracker,
        acks,
        next: 0,
    };
    (link, tasks)
}

/// Polls the event loop (which reconnects), matching packet ids to tags.
async fn keep(
    mut eventloop: rumqttc::EventLoop,
    tracker: Shared,
    ack_tx: mpsc::Sender<u64>,
    stop: tokio::sync::watch::Receiver<bool>,
) {
    let mut backoff = RECONNECT_FIRST;
    loop {
        let polled = tokio::select! {
            p = eventloop.poll() => p,
            _ = stopped(stop.clone()) => return,
        };
        match polled {
            Ok(Event::Outgoing(rumqttc::Outgoing::Publish(pkid))) => {
                tracker.lock().expect("MQTT tracker poisoned").sent(pkid);
            }
            Ok(Event::Incoming(Packet::PubAck(ack))) => {
                let alert = tracker
                    .lock()
                    .expect("MQTT tracker poisoned")
                    .acked(ack.pkid);
                if let Some(n) = alert {
                    let _ = ack_tx.try_send(n);
                }
            }
            Ok(Event::Incoming(Packet::ConnAck(ack))) => {
                tracing::info!("MQTT broker connected");
                if !ack.session_present {
                    tracker
                        .lock()
                        .expect("MQTT tracker poisoned")
                        .session_lost();
                }
                backoff = RECONNECT_FIRST;
            }
            Ok(_) => {}
            Err(e) => {
                tracing::warn!(error = %e, retry_ms = backoff.as_millis() as u64, "MQTT connection");
                tokio::time::sleep(backoff).await;
                backoff = (backoff * 2).min(RECONNECT_MAX);
            }
        }
    }
}

/// Each channel's latest stored reading with its derived state (the
/// API's `StoredReading` JSON), retained, every `every`. `try_publish`:
/// with the broker away, a state is skipped, never queued without end.
async fn publish_states(
    hub: Arc<Hub>,
    client: AsyncClient,
    tracker: Shared,
    prefix: String,
    every: Duration,
) {
    let mut tick = tokio::time::interval(every);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
    let stop = hub.shutdown_signal();
    loop {
        tokio::select! {
            _ = tick.tick() => {}
            _ = stopped(stop.clone()) => return,
        }
        for (channel_id, runtime) in hub.runtimes() {
            let key = runtime.lock().expect("channel state poisoned").key;
            let reader = &hub.store().reader;
            let Ok(Some(row)) = crate::store::latest_reading(reader, key).await else {
                continue;
            };
            let runs = crate::store::get_runs(reader, key)
                .await
                .unwrap_or_default();
            let run = runs.iter().find(|r| r.run_id == row.run_id);
            let pb = crate::grpc::convert::stored_to_pb(&row, run);
            let Ok(body) = serde_json::to_vec(&pb) else {
                continue;
            };
            let topic = format!("{prefix}/state/{channel_id}");
            if publish(&client, &tracker, Tag::State, topic, true, body).is_err() {
                break;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_puback_counts_only_for_the_publish_of_its_packet_id() {
        let mut t = Tracker::default();
        t.queued.extend([Tag::State, Tag::Alert(1), Tag::State]);
        t.sent(1);
        t.sent(2);
        t.sent(3);
        assert_eq!(t.acked(1), None, "a state message's ack");
        assert_eq!(t.acked(3), None);
        // Resent after a reconnect: the id is still unacknowledged.
        t.sent(2);
        assert!(t.queued.is_empty());
        assert_eq!(t.acked(2), Some(1));
        assert_eq!(t.acked(2), None, "a duplicate PUBACK");
        // A reused id after its ack is a new publish.
        t.queued.push_back(Tag::Alert(2));
        t.sent(1);
        assert_eq!(t.acked(1), Some(2));
    }

    #[test]
    fn a_lost_session_frees_the_ids_it_held() {
        let mut t = Tracker::default();
        t.queued.extend([Tag::Alert(1), Tag::Alert(2)]);
        t.sent(1);
        t.session_lost();
        // The client dropped publish 1; id 1 now belongs to the next.
        t.sent(1);
        assert_eq!(t.acked(1), Some(2));
    }
}
