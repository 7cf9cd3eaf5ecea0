//! A flood from several rigs at once keeps the server's memory bounded;
//! excess streams are refused with RESOURCE_EXHAUSTED, nothing is dropped.

use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use std::process::{Command, Stdio};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};
use tokio_stream::StreamExt;

pub(crate) fn peak_rss_mib(pid: u32) -> f64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    let kib: f64 = status
        .lines()
        .find(|l| l.starts_with("VmHWM:"))
        .unwrap()
        .split_whitespace()
        .nth(1)
        .unwrap()
        .parse()
        .unwrap();
    kib / 1024.0
}

/// The bound this test holds the server to (README, Operations).
const RSS_BOUND_MIB: f64 = 200.0;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn flood_keeps_memory_bounded() {
    let (_dir, db) = temp_db();
    let addr = {
        let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
        l.local_addr().unwrap().to_string()
    };
    let mut server = Command::new(env!("CARGO_BIN_EXE_gibbsline"))
        .args(["serve", "--listen", &addr, "--durability", "normal", "--db"])
        .arg(&db)
        .env("RUST_LOG", "error")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let pid = server.id();
    let mut connection = None;
    for _ in 0..200 {
        if let Ok(c) = tonic::transport::Channel::from_shared(format!("http://{addr}"))
            .unwrap()
            .connect()
            .await
        {
            connection = Some(c);
            break;
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    let first = connection.expect("server up");
    let mut channels = pb::channel_service_client::ChannelServiceClient::new(first.clone());
    let ids: Vec<String> = (0..60).map(|i| format!("flood-{i:02}")).collect();
    for id in &ids {
        channels
            .put_channel(pb::PutChannelRequest {
                channel: Some(channel_def(id, "daniell")),
            })
            .await
            .unwrap();
    }
    let acked = Arc::new(AtomicU64::new(0));
    let t0 = now_ns() - 80_000_000_000_000;
    let deadline = Instant::now() + Duration::from_secs(6);
    let mut tasks = Vec::new();
    // Three rigs, each on its own connection from its own address (the
    // server holds each address to limits.max_streams_per_client, 32),
    // twenty streams each, batches of 10,000 readings sent as fast as the
    // server takes them.
    for rig in 0..3 {
        let source = std::net::Ipv4Addr::new(127, 0, 2, 1 + rig as u8);
        let conn = tonic::transport::Channel::from_shared(format!("http://{addr}"))
            .unwrap()
            .local_address(Some(source.into()))
            .connect()
            .await
            .unwrap();
        for id in &ids[rig * 20..rig * 20 + 20] {
            let id = id.clone();
            let conn = conn.clone();
            let acked = acked.clone();
            tasks.push(tokio::spawn(async move {
                let mut ingest =
                    IngestServiceClient::new(conn).max_encoding_message_size(4 * 1024 * 1024);
                let (tx, rx) = tokio::sync::mpsc::channel(2);
                let mut acks = ingest
                    .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
                    .await
                    .unwrap()
                    .into_inner();
                let producer = tokio::spawn(async move {
                    let mut seq = 1u64;
                    while Instant::now() < deadline {
                        let readings = (seq..seq + 10_000)
                            .map(|s| reading(s, t0 + s as i64 * 1_000_000, 1.1, Some(0.0)))
                            .collect();
                        seq += 10_000;
                        if tx
                            .send(pb::StreamReadingsRequest {
                                batch: Some(pb::ReadingBatch {
                                    historical: false,
                                    channel_id: id.clone(),
                                    batch_id: seq,
                                    readings,
                                }),
                            })
                            .await
                            .is_err()
                        {
                            break;
                        }
                    }
                });
                while let Some(Ok(m)) = acks.next().await {
                    acked.fetch_add(u64::from(m.ack.unwrap().accepted), Ordering::Relaxed);
                }
                let _ = producer.await;
            }));
        }
    }
    // Meanwhile, a greedy client tries to open 150 more streams: past the
    // server-wide limit they are refused, not queued.
    tokio::time::sleep(Duration::from_secs(1)).await;
    // Fifty per connection: below the 128 streams one HTTP/2 connection may
    // carry, so the refusals come from the server-wide limit.
    let mut greedy_connections = Vec::new();
    for _ in 0..3 {
        greedy_connections.push(
            tonic::transport::Channel::from_shared(format!("http://{addr}"))
                .unwrap()
                .connect()
                .await
                .unwrap(),
        );
    }
    let mut refused = 0;
    let mut held = Vec::new();
    for i in 0..150 {
        let greedy = &greedy_connections[i % 3];
        let (tx, rx) = tokio::sync::mpsc::channel::<pb::StreamReadingsRequest>(1);
        match IngestServiceClient::new(greedy.clone())
            .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
            .await
        {
            Ok(r) => held.push((tx, r)),
            Err(s) => {
                assert_eq!(s.code(), tonic::Code::ResourceExhausted, "{s:?}");
                refused += 1;
            }
        }
    }
    assert!(refused > 0, "no stream was refused past the limit");
    drop(held);
    for t in tasks {
        t.await.unwrap();
    }
    let rss = peak_rss_mib(pid);
    let total = acked.load(Ordering::Relaxed);
    eprintln!(
        "flood: {total} readings acknowledged, {refused} streams refused, server peak RSS {rss:.0} MiB (bound {RSS_BOUND_MIB})"
    );
    assert!(total > 100_000);
    assert!(rss < RSS_BOUND_MIB, "server peak RSS {rss:.0} MiB");
    // Nothing acknowledged was dropped: each stream stored 1..=N contiguously.
    let mut ingest = IngestServiceClient::new(first);
    let mut stored = 0u64;
    for id in &ids {
        stored += ingest
            .get_resume_point(pb::GetResumePointRequest {
                channel_id: id.clone(),
            })
            .await
            .unwrap()
            .into_inner()
            .last_stored_seq;
    }
    assert_eq!(stored, total);
    server.kill().unwrap();
    let _ = server.wait();
}
