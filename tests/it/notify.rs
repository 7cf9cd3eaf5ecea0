//! Alert delivery against real peers: a webhook receiver in the test
//! (axum on loopback) that checks every signature and can be told to
//! fail, across a SIGKILL of the server process; and the real Mosquitto
//! broker on 127.0.0.1:1883.

use crate::crash::{connect, free_addr, spawn_server_with};
use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use hmac::{Hmac, KeyInit, Mac};
use serde_json::Value;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};
use tokio_stream::StreamExt;

const SECRET: &str = "lab-7-webhook-secret";

#[derive(Default)]
struct Receiver {
    failing: AtomicBool,
    /// (event id, channel id) in arrival order, repeats included.
    got: Mutex<Vec<(u64, String)>>,
    bad_signatures: Mutex<u32>,
}

fn verify(headers: &axum::http::HeaderMap, body: &[u8]) -> bool {
    let get = |n: &str| headers.get(n).and_then(|v| v.to_str().ok()).unwrap_or("");
    let mut mac = <Hmac<sha2::Sha256> as KeyInit>::new_from_slice(SECRET.as_bytes()).unwrap();
    mac.update(get("gibbsline-timestamp").as_bytes());
    mac.update(b".");
    mac.update(body);
    let want: String = mac
        .finalize()
        .into_bytes()
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect();
    get("gibbsline-signature") == format!("sha256={want}")
        && get("idempotency-key") == get("gibbsline-event-id")
}

async fn start_receiver() -> (std::net::SocketAddr, Arc<Receiver>) {
    use axum::extract::State;
    use axum::http::{HeaderMap, StatusCode};
    let state = Arc::new(Receiver::default());
    let app =
        axum::Router::new()
            .route(
                "/hook",
                axum::routing::post(
                    |State(r): State<Arc<Receiver>>,
                     headers: HeaderMap,
                     body: axum::body::Bytes| async move {
                        if !verify(&headers, &body) {
                            *r.bad_signatures.lock().unwrap() += 1;
                            return StatusCode::UNAUTHORIZED;
                        }
                        if r.failing.load(Ordering::SeqCst) {
                            return StatusCode::SERVICE_UNAVAILABLE;
                        }
                        let v: Value = serde_json::from_slice(&body).unwrap();
                        assert!(
                            v["notice"]
                                .as_str()
                                .unwrap()
                                .contains("not a safety system")
                        );
                        let id = v["event_id"].as_u64().unwrap();
                        let channel = v["alert"]["channel_id"].as_str().unwrap().to_string();
                        r.got.lock().unwrap().push((id, channel));
                        StatusCode::NO_CONTENT
                    },
                ),
            )
            .with_state(state.clone());
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    tokio::spawn(async move { axum::serve(listener, app).await.unwrap() });
    (addr, state)
}

/// Daniell limit crossings: over at every 4th and 5th reading, so each
/// batch of 10 raises and clears a voltage-limit alert.
fn crossing_batch(channel: &str, t0: i64, first: u64) -> pb::ReadingBatch {
    pb::ReadingBatch {
        historical: false,
        channel_id: channel.into(),
        batch_id: first,
        readings: (first..first + 10)
            .map(|s| {
                let over = matches!(s % 10, 4 | 5);
                reading(
                    s,
                    t0 + s as i64 * 100_000_000,
                    if over { 1.35 } else { 1.10 },
                    Some(0.0),
                )
            })
            .collect(),
    }
}

/// Every event the store holds, as (event id, channel).
async fn stored_events(ch: tonic::transport::Channel) -> Vec<(u64, String)> {
    let mut watch = AlertServiceClient::new(ch)
        .watch_alerts(pb::WatchAlertsRequest::default())
        .await
        .unwrap()
        .into_inner();
    let mut out = Vec::new();
    while let Some(m) = watch.next().await {
        let m = m.unwrap();
        if m.event == pb::AlertEventKind::Live as i32 {
            return out;
        }
        out.push((m.resume_after_event_id, m.alert.unwrap().channel_id));
    }
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn webhook_gets_every_event_in_order_across_failures_and_a_kill() {
    let (dir, db) = temp_db();
    let (hook, receiver) = start_receiver().await;
    let config = dir.path().join("gibbsline.toml");
    std::fs::write(
        &config,
        format!(
            "[[notify.webhook]]\nname = \"lab-7\"\nurl = \"http://{hook}/hook\"\nmin_severity = \"info\"\nsecret = \"{SECRET}\"\n"
        ),
    )
    .unwrap();
    let addr = free_addr();
    let args = [
        std::ffi::OsStr::new("--config"),
        config.as_os_str(),
        "--http-listen".as_ref(),
        "off".as_ref(),
    ];
    let mut server = spawn_server_with(&db, &addr, &args);
    let ch = connect(&addr).await;
    for id in ["hook-a", "hook-b"] {
        put_channel(&ch, channel_def(id, "daniell")).await;
    }
    let t0 = now_ns() - 3_600_000_000_000;
    let mut next = 1;
    let mut send_round = |ch: tonic::transport::Channel| {
        let first = next;
        next += 10;
        async move {
            let mut ingest = IngestServiceClient::new(ch);
            for id in ["hook-a", "hook-b"] {
                send_batches(&mut ingest, vec![crossing_batch(id, t0, first)]).await;
            }
        }
    };
    send_round(ch.clone()).await;
    // The receiver fails for a while: events wait, in order.
    receiver.failing.store(true, Ordering::SeqCst);
    for _ in 0..3 {
        send_round(ch.clone()).await;
    }
    tokio::time::sleep(Duration::from_millis(1500)).await;
    // Killed with deliveries pending; restarted, it sends them.
    server.kill().unwrap();
    server.wait().unwrap();
    receiver.failing.store(false, Ordering::SeqCst);
    let mut server = spawn_server_with(&db, &addr, &args);
    let ch = connect(&addr).await;
    for _ in 0..2 {
        send_round(ch.clone()).await;
    }
    let stored = stored_events(ch.clone()).await;
    assert_eq!(
        stored.len(),
        2 * 6 * 2,
        "a raise and a clear per channel per round"
    );
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        let got = receiver.got.lock().unwrap().clone();
        let mut ids: Vec<u64> = got.iter().map(|(id, _)| *id).collect();
        ids.sort();
        ids.dedup();
        if ids == stored.iter().map(|(id, _)| *id).collect::<Vec<_>>() {
            break;
        }
        assert!(
            Instant::now() < deadline,
            "not every event arrived: {ids:?} of {stored:?}"
        );
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    let got = receiver.got.lock().unwrap().clone();
    for channel in ["hook-a", "hook-b"] {
        // First arrivals per channel in event order; repeats only of what
        // came before (at least once, never out of order).
        let mut seen = std::collections::BTreeSet::new();
        let mut last = 0;
        for (id, c) in got.iter().filter(|(_, c)| c == channel) {
            assert_eq!(c, channel);
            if seen.insert(*id) {
                assert!(*id > last, "{channel}: event {id} after {last}");
                last = *id;
            }
        }
    }
    assert_eq!(*receiver.bad_signatures.lock().unwrap(), 0);

    // The outbox as operators see it: each event delivered once recorded,
    // some after failed attempts.
    let deadline = Instant::now() + Duration::from_secs(30);
    let deliveries = loop {
        let out = tokio::task::spawn_blocking({
            let addr = addr.clone();
            move || {
                std::process::Command::new(env!("CARGO_BIN_EXE_gibbsline"))
                    .args([
                        "alerts",
                        "deliveries",
                        "--connect",
                        &addr,
                        "--format",
                        "json",
                    ])
                    .output()
                    .unwrap()
            }
        })
        .await
        .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let v: Value = serde_json::from_slice(&out.stdout).unwrap();
        let rows = v.as_array().unwrap().clone();
        if rows.iter().all(|d| !d["delivered_unix_ns"].is_null()) {
            break rows;
        }
        assert!(
            Instant::now() < deadline,
            "deliveries still pending: {rows:?}"
        );
        tokio::time::sleep(Duration::from_millis(200)).await;
    };
    assert_eq!(deliveries.len(), stored.len());
    assert!(
        deliveries
            .iter()
            .all(|d| d["target"] == "lab-7" && d["last_error"].is_null())
    );
    assert!(
        deliveries
            .iter()
            .any(|d| d["attempts"].as_u64().unwrap() >= 2),
        "the failing receiver made some deliveries take more than one attempt"
    );
    server.kill().unwrap();
    server.wait().unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn mqtt_carries_alert_events_and_channel_state() {
    use rumqttc::{AsyncClient, Event, MqttOptions, Packet, QoS};
    assert!(
        std::net::TcpStream::connect("127.0.0.1:1883").is_ok(),
        "needs the Mosquitto broker on 127.0.0.1:1883 (mosquitto -d; .ci/run starts it)"
    );
    let prefix = format!("gibbsline-test-{}", std::process::id());
    let mut options = MqttOptions::new(format!("{prefix}-listener"), "127.0.0.1", 1883);
    options.set_keep_alive(Duration::from_secs(5));
    let (listener, mut events) = AsyncClient::new(options, 16);
    listener
        .subscribe(format!("{prefix}/#"), QoS::AtLeastOnce)
        .await
        .unwrap();
    // Wait for the subscription before anything is published.
    loop {
        if let Event::Incoming(Packet::SubAck(_)) = events.poll().await.unwrap() {
            break;
        }
    }

    let (_dir, db) = temp_db();
    let mut config = config_for(&db);
    config.notify.mqtt = Some(gibbsline::notify::MqttSpec {
        broker: "127.0.0.1:1883".into(),
        client_id: format!("{prefix}-server"),
        topic_prefix: prefix.clone(),
        min_severity: gibbsline::alerts::Severity::Warning,
        channels: vec![],
        state_interval_s: 1,
    });
    let server = Server::start_with(config, "127.0.0.1:0").await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("bus-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    send_batches(
        &mut ingest,
        vec![crossing_batch("bus-1", now_ns() - 60_000_000_000, 1)],
    )
    .await;

    let mut alert = None;
    let mut state = None;
    let deadline = Instant::now() + Duration::from_secs(20);
    while alert.is_none() || state.is_none() {
        let left = deadline.saturating_duration_since(Instant::now());
        let event = tokio::time::timeout(left, events.poll())
            .await
            .expect("an alert and a state within 20 s")
            .unwrap();
        if let Event::Incoming(Packet::Publish(p)) = event {
            let body: Value = serde_json::from_slice(&p.payload).unwrap();
            if p.topic == format!("{prefix}/alerts/bus-1") && alert.is_none() {
                alert = Some(body);
            } else if p.topic == format!("{prefix}/state/bus-1") {
                state = Some(body);
            }
        }
    }
    let alert = alert.unwrap();
    assert_eq!(alert["event"], "raised");
    assert_eq!(alert["alert"]["kind"], "voltage_limit");
    assert!(
        alert["notice"]
            .as_str()
            .unwrap()
            .contains("not a safety system")
    );
    assert_eq!(state.unwrap()["seq"], 10);
    server.stop().await;
}

/// A broker of a few lines: accepts one client, acknowledges every QoS-1
/// publish to a state topic, and those to other topics only once told to.
/// It records (topic, acknowledged) in arrival order.
#[derive(Default)]
struct PickyBroker {
    ack_all: AtomicBool,
    seen: Mutex<Vec<(String, bool)>>,
}

impl PickyBroker {
    async fn start() -> (std::net::SocketAddr, Arc<PickyBroker>) {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let broker = Arc::new(PickyBroker::default());
        let b = broker.clone();
        tokio::spawn(async move {
            while let Ok((conn, _)) = listener.accept().await {
                let b = b.clone();
                tokio::spawn(async move {
                    let _ = b.serve(conn).await;
                });
            }
        });
        (addr, broker)
    }

    async fn serve(&self, mut conn: tokio::net::TcpStream) -> std::io::Result<()> {
        use tokio::io::{AsyncReadExt, AsyncWriteExt};
        loop {
            let first = conn.read_u8().await?;
            let (mut len, mut shift) = (0usize, 0);
            loop {
                let b = conn.read_u8().await?;
                len |= usize::from(b & 0x7f) << shift;
                shift += 7;
                if b & 0x80 == 0 {
                    break;
                }
            }
            let mut body = vec![0u8; len];
            conn.read_exact(&mut body).await?;
            match first >> 4 {
                1 => conn.write_all(&[0x20, 0x02, 0x00, 0x00]).await?,
                3 => {
                    let topic_len = usize::from(u16::from_be_bytes([body[0], body[1]]));
                    let topic = String::from_utf8_lossy(&body[2..2 + topic_len]).to_string();
                    let qos = (first >> 1) & 3;
                    let ack = qos == 1
                        && (topic.contains("/state/") || self.ack_all.load(Ordering::SeqCst));
                    if ack {
                        let pkid = &body[2 + topic_len..4 + topic_len];
                        conn.write_all(&[0x40, 0x02, pkid[0], pkid[1]]).await?;
                    }
                    self.seen.lock().unwrap().push((topic, ack));
                }
                12 => conn.write_all(&[0xd0, 0x00]).await?,
                14 => return Ok(()),
                _ => {}
            }
        }
    }

    /// State messages acknowledged after the first alert publish.
    fn state_acks_after_alert(&self) -> usize {
        let seen = self.seen.lock().unwrap();
        let Some(first) = seen.iter().position(|(t, _)| t.contains("/alerts/")) else {
            return 0;
        };
        seen[first..]
            .iter()
            .filter(|(t, acked)| t.contains("/state/") && *acked)
            .count()
    }
}

async fn mqtt_delivery(ch: tonic::transport::Channel) -> pb::Delivery {
    let deliveries = AlertServiceClient::new(ch)
        .list_deliveries(pb::ListDeliveriesRequest::default())
        .await
        .unwrap()
        .into_inner()
        .deliveries;
    deliveries
        .into_iter()
        .find(|d| d.target.contains("mqtt"))
        .unwrap_or_else(|| panic!("no MQTT delivery"))
}

/// With state messages on a timer, their PUBACKs arrive while an alert
/// waits for its own: only the alert's packet id may count it delivered.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_alert_is_delivered_on_its_own_puback_not_a_state_message() {
    let (addr, broker) = PickyBroker::start().await;
    let (_dir, db) = temp_db();
    let mut config = config_for(&db);
    config.notify.mqtt = Some(gibbsline::notify::MqttSpec {
        broker: addr.to_string(),
        client_id: "picky-test".into(),
        topic_prefix: "lab".into(),
        min_severity: gibbsline::alerts::Severity::Critical,
        channels: vec![],
        state_interval_s: 1,
    });
    let server = Server::start_with(config, "127.0.0.1:0").await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("bus-2", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let mut one = crossing_batch("bus-2", now_ns() - 60_000_000_000, 1);
    // One raise, no clear: a single event to deliver.
    one.readings.truncate(5);
    send_batches(&mut ingest, vec![one]).await;

    let deadline = Instant::now() + Duration::from_secs(8);
    while broker.state_acks_after_alert() < 2 {
        assert!(
            Instant::now() < deadline,
            "the alert and two acknowledged state messages within 8 s: {:?}",
            broker.seen.lock().unwrap()
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let waiting = mqtt_delivery(ch.clone()).await;
    assert_eq!(
        waiting.delivered_unix_ns, None,
        "counted delivered on a state message's PUBACK: {waiting:?}"
    );

    // Once the broker acknowledges alerts too, the retry is delivered.
    broker.ack_all.store(true, Ordering::SeqCst);
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let d = mqtt_delivery(ch.clone()).await;
        if d.delivered_unix_ns.is_some() {
            break;
        }
        assert!(Instant::now() < deadline, "not delivered in 30 s: {d:?}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    server.stop().await;
}
