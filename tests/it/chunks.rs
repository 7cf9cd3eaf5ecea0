//! Readings in compressed chunks: a slow rig's one-reading batches are
//! merged by the upkeep task, and SIGKILLs while it merges lose and
//! double nothing.

use crate::crash::{connect, free_addr, spawn_server_with};
use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use std::collections::BTreeMap;
use std::path::Path;
use std::time::Duration;

const HOUR: i64 = 3_600_000_000_000;

fn volts(s: u64) -> f64 {
    1.02 + 1e-4 * ((s * 7919) % 1000) as f64
}

/// A server with a pass every second (the first at once).
fn spawn_compacting_server(
    dir: &Path,
    db: &Path,
    addr: &str,
    metrics: &str,
) -> std::process::Child {
    let config = dir.join("compact.toml");
    std::fs::write(&config, "[retention]\nprune_interval_s = 1\n").unwrap();
    let more = [
        "--metrics-listen".as_ref(),
        metrics.as_ref(),
        "--config".as_ref(),
        config.as_os_str(),
    ];
    spawn_server_with(db, addr, &more)
}

async fn compacted_so_far(metrics: std::net::SocketAddr) -> Option<f64> {
    crate::metrics::sample_when_up(metrics, "gibbsline_compacted_readings_total").await
}

fn chunk_rows(db: &Path) -> u64 {
    let report = tokio::task::block_in_place(|| {
        tokio::runtime::Handle::current()
            .block_on(gibbsline::store::report::storage_report(db))
            .unwrap()
    });
    report
        .tables
        .iter()
        .find(|t| t.table == "chunks")
        .map(|t| t.rows)
        .unwrap()
}

fn hourly(times: impl Iterator<Item = i64>) -> BTreeMap<i64, u64> {
    let mut out = BTreeMap::new();
    for t in times {
        *out.entry(t.div_euclid(HOUR) * HOUR).or_insert(0) += 1;
    }
    out
}

/// Every reading sent is stored once with its value, and the 1 h buckets
/// hold exactly them.
async fn assert_whole(ch: &tonic::transport::Channel, n: u64, at: &impl Fn(u64) -> i64) {
    let stored = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "slow-rig").await;
    let mut seen = BTreeMap::new();
    for r in &stored {
        *seen.entry(r.seq).or_insert(0u32) += 1;
    }
    let doubled: Vec<_> = seen
        .iter()
        .filter(|(_, c)| **c > 1)
        .map(|(s, _)| *s)
        .take(10)
        .collect();
    let lost: Vec<_> = (1..=n).filter(|s| !seen.contains_key(s)).take(10).collect();
    assert!(
        doubled.is_empty() && lost.is_empty(),
        "doubled {doubled:?}, lost {lost:?} (first ten)"
    );
    assert!(stored.windows(2).all(|w| w[0].seq < w[1].seq), "in order");
    for r in &stored {
        assert_eq!(r.volts, volts(r.seq), "seq {}", r.seq);
        assert_eq!(r.time_unix_ns, at(r.seq));
    }
    let buckets = HistoryServiceClient::new(ch.clone())
        .query_buckets(pb::QueryBucketsRequest {
            channel_id: "slow-rig".into(),
            start_unix_ns: at(1).div_euclid(HOUR) * HOUR,
            end_unix_ns: at(n) + 1,
            bucket_width_ns: HOUR,
        })
        .await
        .unwrap()
        .into_inner()
        .buckets;
    let got: BTreeMap<i64, u64> = buckets.iter().map(|b| (b.start_unix_ns, b.count)).collect();
    assert_eq!(got, hourly((1..=n).map(at)));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigkills_while_small_chunks_merge_lose_and_double_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("compact.db");
    // A slow rig: 30,000 readings 2 s apart (about 17 hours), three per
    // batch, so each commit stores a chunk of three.
    let n: u64 = 30_000;
    let t0 = (now_ns() - 2 * 86_400_000_000_000).div_euclid(HOUR) * HOUR;
    let at = move |s: u64| t0 + s as i64 * 2_000_000_000;
    {
        let server = Server::start(&db).await;
        let ch = server.channel().await;
        put_channel(&ch, channel_def("slow-rig", "daniell")).await;
        let seqs: Vec<u64> = (1..=n).collect();
        let batches = seqs
            .chunks(3)
            .enumerate()
            .map(|(i, c)| pb::ReadingBatch {
                historical: false,
                channel_id: "slow-rig".into(),
                batch_id: i as u64,
                readings: c
                    .iter()
                    .map(|&s| reading(s, at(s), volts(s), Some(0.0)))
                    .collect(),
            })
            .collect();
        let acks = send_batches(&mut IngestServiceClient::new(ch.clone()), batches).await;
        assert!(acks.iter().all(|a| a.rejected.is_empty()));
        assert_whole(&ch, n, &at).await;
        server.stop().await;
    }
    let before = chunk_rows(&db);
    assert!(
        before >= n / 3,
        "{before} chunks for {n} readings in threes"
    );
    // Kills at moments spread over the merging: each start merges at
    // once, up to 20,000 readings a step.
    let mut rng = gibbsline::sim::Rng::new(7);
    let mut merged_before_kill = Vec::new();
    for _ in 0..6 {
        let (addr, metrics) = (free_addr(), free_addr());
        let mut child = spawn_compacting_server(dir.path(), &db, &addr, &metrics);
        let metrics: std::net::SocketAddr = metrics.parse().unwrap();
        let mut answered = false;
        for _ in 0..2_000 {
            if compacted_so_far(metrics).await.is_some() {
                answered = true;
                break;
            }
            tokio::time::sleep(Duration::from_millis(2)).await;
        }
        assert!(answered, "the server never answered its metrics");
        tokio::time::sleep(Duration::from_millis((rng.uniform() * 4000.0) as u64)).await;
        merged_before_kill.push(compacted_so_far(metrics).await.unwrap_or(-1.0));
        child.kill().unwrap();
        child.wait().unwrap();
        let server = Server::start(&db).await;
        assert_whole(&server.channel().await, n, &at).await;
        server.stop().await;
    }
    eprintln!("compaction: readings merged when each kill landed: {merged_before_kill:?}");
    // A last start merges to the end.
    let (addr, metrics) = (free_addr(), free_addr());
    let mut child = spawn_compacting_server(dir.path(), &db, &addr, &metrics);
    let ch = connect(&addr).await;
    let mut after = before;
    for _ in 0..200 {
        after = chunk_rows(&db);
        if after <= 20 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    // One chunk per hour (1,800 readings each): 17 or 18 of them.
    assert!(after <= 20, "{after} chunks left of {before}");
    assert_whole(&ch, n, &at).await;
    child.kill().unwrap();
    child.wait().unwrap();
}
