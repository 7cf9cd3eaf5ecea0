//! Crash safety and graceful shutdown of the real server process.

use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use gibbsline::sim::Rng;
use std::collections::HashMap;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::Duration;
use tokio_stream::StreamExt;

pub(crate) fn free_addr() -> String {
    let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    l.local_addr().unwrap().to_string()
}

pub(crate) fn spawn_server(db: &Path, addr: &str) -> Child {
    spawn_server_with(db, addr, &[])
}

/// [`spawn_server`] with more `serve` arguments.
pub(crate) fn spawn_server_with(db: &Path, addr: &str, more: &[&std::ffi::OsStr]) -> Child {
    Command::new(env!("CARGO_BIN_EXE_gibbsline"))
        .args(["serve", "--listen", addr, "--durability", "full", "--db"])
        .arg(db)
        .args(more)
        .env("RUST_LOG", "warn")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap()
}

pub(crate) async fn connect(addr: &str) -> tonic::transport::Channel {
    for _ in 0..200 {
        if let Ok(c) = tonic::transport::Channel::from_shared(format!("http://{addr}"))
            .unwrap()
            .connect()
            .await
        {
            // The port can answer before the service is ready; ask health.
            let mut h = tonic_health::pb::health_client::HealthClient::new(c.clone());
            if h.check(tonic_health::pb::HealthCheckRequest {
                service: String::new(),
            })
            .await
            .is_ok()
            {
                return c;
            }
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    panic!("server at {addr} did not come up");
}

const CHANNELS: [&str; 3] = ["crash-a", "crash-b", "crash-c"];

/// Streams batches of 200 until the connection breaks; returns the highest
/// seq acknowledged per channel.
async fn stream_until_broken(
    ch: tonic::transport::Channel,
    next: &mut HashMap<&'static str, u64>,
    acked: &mut HashMap<&'static str, u64>,
    t0: i64,
) {
    let mut ingest = IngestServiceClient::new(ch);
    for id in CHANNELS {
        match ingest
            .get_resume_point(pb::GetResumePointRequest {
                channel_id: id.into(),
            })
            .await
        {
            Ok(p) => {
                let p = p.into_inner();
                // Everything acknowledged before must still be there.
                assert!(
                    p.last_stored_seq >= acked[id],
                    "{id}: acked {} but stored only {}",
                    acked[id],
                    p.last_stored_seq
                );
                next.insert(id, p.last_stored_seq + 1);
            }
            Err(_) => return,
        }
    }
    let (tx, rx) = tokio::sync::mpsc::channel(4);
    let Ok(resp) = ingest
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
    else {
        return;
    };
    let mut acks = resp.into_inner();
    let mut batch_id = 0u64;
    let mut sent: HashMap<u64, (&'static str, u64)> = HashMap::new();
    loop {
        for id in CHANNELS {
            let from = next[id];
            let readings: Vec<_> = (from..from + 200)
                .map(|s| {
                    // Every 997th reading breaks the voltage limit, so alerts come and go.
                    let volts = if s % 997 == 0 { 1.36 } else { 1.10 };
                    reading(s, t0 + s as i64 * 1_000_000, volts, Some(0.0))
                })
                .collect();
            sent.insert(batch_id, (id, from + 199));
            next.insert(id, from + 200);
            if tx
                .send(pb::StreamReadingsRequest {
                    batch: Some(pb::ReadingBatch {
                        historical: false,
                        channel_id: id.into(),
                        batch_id,
                        readings,
                    }),
                })
                .await
                .is_err()
            {
                return;
            }
            batch_id += 1;
        }
        for _ in 0..CHANNELS.len() {
            match acks.next().await {
                Some(Ok(m)) => {
                    let ack = m.ack.unwrap();
                    let (id, hi) = sent.remove(&ack.batch_id).unwrap();
                    assert_eq!(ack.accepted, 200);
                    acked.insert(id, hi);
                }
                _ => return,
            }
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigkill_at_random_moments_loses_and_doubles_nothing() {
    let kills: usize = std::env::var("GIBBSLINE_CRASH_KILLS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(10);
    let (_dir, db) = temp_db();
    let addr = free_addr();
    let mut server = spawn_server(&db, &addr);
    let ch = connect(&addr).await;
    for id in CHANNELS {
        ChannelServiceClient::new(ch.clone())
            .put_channel(pb::PutChannelRequest {
                channel: Some(channel_def(id, "daniell")),
            })
            .await
            .unwrap();
    }
    let t0 = now_ns() - 86_000_000_000_000;
    let mut next: HashMap<&'static str, u64> = CHANNELS.iter().map(|id| (*id, 1)).collect();
    let mut acked: HashMap<&'static str, u64> = CHANNELS.iter().map(|id| (*id, 0)).collect();
    let mut rng = Rng::new(2026);
    for round in 0..kills {
        let ch = connect(&addr).await;
        let wait = Duration::from_millis(150 + (rng.uniform() * 600.0) as u64);
        let _ =
            tokio::time::timeout(wait, stream_until_broken(ch, &mut next, &mut acked, t0)).await;
        server.kill().unwrap();
        server.wait().unwrap();
        eprintln!("kill {}: acked so far {:?}", round + 1, acked);
        server = spawn_server(&db, &addr);
    }
    let ch = connect(&addr).await;
    // Resume once more so the check below also covers a clean resend.
    let _ = tokio::time::timeout(
        Duration::from_millis(300),
        stream_until_broken(ch.clone(), &mut next, &mut acked, t0),
    )
    .await;
    let mut history = HistoryServiceClient::new(ch.clone());
    let mut readings_by_channel = HashMap::new();
    for id in CHANNELS {
        let mut seqs: Vec<u64> = stored_readings(&mut history, id)
            .await
            .into_iter()
            .map(|r| r.seq)
            .collect();
        let n = seqs.len() as u64;
        assert!(
            n >= acked[id] && acked[id] > 0,
            "{id}: {n} stored, {} acked",
            acked[id]
        );
        seqs.sort_unstable();
        assert_eq!(
            seqs,
            (1..=n).collect::<Vec<_>>(),
            "{id}: stored seqs must be exactly 1..={n}, once each"
        );
        readings_by_channel.insert(id.to_string(), n);
    }
    // Rollups were written in the readings' transactions: after every kill
    // they still equal a recomputation from what is stored.
    for id in CHANNELS {
        crate::truth::buckets_match_readings(&ch, id, (t0, now_ns()), &[10, 60, 3600]).await;
    }
    // Alerts are consistent with the readings: each names a stored reading,
    // and at most one per channel is active for each kind.
    let alerts = AlertServiceClient::new(ch)
        .list_alerts(pb::ListAlertsRequest {
            limit: 10_000,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner()
        .alerts;
    assert!(!alerts.is_empty());
    let mut active = std::collections::HashSet::new();
    for a in &alerts {
        assert!(
            a.raised_seq >= 1 && a.raised_seq <= readings_by_channel[&a.channel_id],
            "{a:?}"
        );
        assert_eq!(
            a.raised_seq % 997,
            0,
            "alert raised by a reading that was not over the limit: {a:?}"
        );
        if a.cleared_unix_ns.is_none() {
            assert!(
                active.insert((a.channel_id.clone(), a.kind)),
                "two active alerts of one kind: {a:?}"
            );
        }
    }
    eprintln!(
        "{kills} kills survived; stored {readings_by_channel:?}; {} alerts",
        alerts.len()
    );
    server.kill().unwrap();
    let _ = server.wait();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_ends_streams_with_resume_points_and_exits_zero() {
    let (_dir, db) = temp_db();
    let addr = free_addr();
    let server = spawn_server(&db, &addr);
    let ch = connect(&addr).await;
    put_channel(&ch, channel_def("term-1", "daniell")).await;
    let t0 = now_ns() - 1_000_000_000_000;
    let (tx, rx) = tokio::sync::mpsc::channel(4);
    let mut acks = IngestServiceClient::new(ch.clone())
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .unwrap()
        .into_inner();
    tx.send(pb::StreamReadingsRequest {
        batch: Some(pb::ReadingBatch {
            historical: false,
            channel_id: "term-1".into(),
            batch_id: 1,
            readings: (1..=100)
                .map(|s| reading(s, t0 + s as i64 * 1_000_000, 1.1, Some(0.0)))
                .collect(),
        }),
    })
    .await
    .unwrap();
    assert_eq!(
        acks.next().await.unwrap().unwrap().ack.unwrap().accepted,
        100
    );
    let mut watch = AlertServiceClient::new(ch.clone())
        .watch_alerts(pb::WatchAlertsRequest::default())
        .await
        .unwrap()
        .into_inner();
    let live = watch.next().await.unwrap().unwrap();
    assert_eq!(live.event, pb::AlertEventKind::Live as i32);
    use tonic_health::pb::health_check_response::ServingStatus;
    let mut health = tonic_health::pb::health_client::HealthClient::new(ch.clone())
        .watch(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        health.next().await.unwrap().unwrap().status,
        ServingStatus::Serving as i32
    );

    let status = Command::new("kill")
        .args(["-TERM", &server.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let ended = acks.next().await.unwrap().unwrap_err();
    assert_eq!(ended.code(), tonic::Code::Unavailable);
    assert!(
        ended.message().contains("last_stored_seq"),
        "{}",
        ended.message()
    );
    let ended = watch.next().await.unwrap().unwrap_err();
    assert_eq!(ended.code(), tonic::Code::Unavailable);
    assert!(ended.message().contains("after_id"), "{}", ended.message());
    // Probes see the server going away before it stops answering.
    assert_eq!(
        health.next().await.unwrap().unwrap().status,
        ServingStatus::NotServing as i32
    );
    // A new stream is refused: by the handler (UNAVAILABLE, with the
    // reason) while the connection still takes streams, or by the
    // connection itself once the server has sent GOAWAY (a transport
    // error, whose code depends on the moment).
    let (_late_tx, late_rx) = tokio::sync::mpsc::channel::<pb::StreamReadingsRequest>(1);
    let refused = match IngestServiceClient::new(ch.clone())
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(late_rx))
        .await
    {
        Err(status) => status,
        Ok(response) => response
            .into_inner()
            .next()
            .await
            .expect("a refusal, not a silent end")
            .unwrap_err(),
    };
    if std::error::Error::source(&refused).is_none() {
        assert_eq!(refused.code(), tonic::Code::Unavailable, "{refused:?}");
        assert!(refused.message().contains("shutting down"), "{refused:?}");
    }
    drop(health);
    drop(tx);
    drop(acks);
    drop(watch);
    drop(ch);
    let out = tokio::task::spawn_blocking(move || server.wait_with_output().unwrap())
        .await
        .unwrap();
    assert_eq!(out.status.code(), Some(0));

    // Everything acknowledged is there after a restart.
    let server = Server::start(&db).await;
    let mut history = HistoryServiceClient::new(server.channel().await);
    let n = stored_readings(&mut history, "term-1").await.len();
    assert_eq!(n, 100);
    server.stop().await;
}
