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

/// What the alert courier publishes through.
pub(super) struct Link {
    client: AsyncClient,
    prefix: String,
    acks: mpsc::Receiver<u16>,
}

impl Link {
    /// Publishes one event and waits for its PUBACK. The courier sends one
    /// at a time, so the next PUBACK is this publish's.
    pub(super) async fn publish_alert(
        &mut self,
        channel_id: &str,
        body: Vec<u8>,
    ) -> Result<(), String> {
        while self.acks.try_recv().is_ok() {}
        let topic = format!("{}/alerts/{channel_id}", self.prefix);
        self.client
            .publish(topic, QoS::AtLeastOnce, false, body)
            .await
            .map_err(|e| format!("MQTT publish: {e}"))?;
        match tokio::time::timeout(ACK_LIMIT, self.acks.recv()).await {
            Ok(Some(_)) => Ok(()),
            Ok(None) => Err("MQTT connection task ended".into()),
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
    let (client, mut eventloop) = AsyncClient::new(options, 64);
    let (ack_tx, acks) = mpsc::channel(64);
    let stop = hub.shutdown_signal();
    let keeper = tokio::spawn(async move {
        let mut backoff = RECONNECT_FIRST;
        loop {
            let polled = tokio::select! {
                p = eventloop.poll() => p,
                _ = stopped(stop.clone()) => return,
            };
            match polled {
                Ok(Event::Incoming(Packet::PubAck(ack))) => {
                    let _ = ack_tx.try_send(ack.pkid);
                }
                Ok(Event::Incoming(Packet::ConnAck(_))) => {
                    tracing::info!("MQTT broker connected");
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
    });
    let mut tasks = vec![keeper];
    if spec.state_interval_s > 0 {
        let every = Duration::from_secs(spec.state_interval_s);
        tasks.push(tokio::spawn(publish_states(
            hub,
            client.clone(),
            spec.topic_prefix.clone(),
            every,
        )));
    }
    let link = Link {
        client,
        prefix: spec.topic_prefix.clone(),
        acks,
    };
    (link, tasks)
}

/// Each channel's latest stored reading with its derived state (the
/// API's `StoredReading` JSON), retained, every `every`. `try_publish`:
/// with the broker away, a state is skipped, never queued without end.
async fn publish_states(hub: Arc<Hub>, client: AsyncClient, prefix: String, every: Duration) {
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
            if client
                .try_publish(topic, QoS::AtLeastOnce, true, body)
                .is_err()
            {
                break;
            }
        }
    }
}
