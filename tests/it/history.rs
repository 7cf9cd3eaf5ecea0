//! History over time: retention deletes exactly what it should, across a
//! restart and across SIGKILLs mid-pass; rollups stay whole where raw
//! readings are gone; odd bucket widths are answered on a rollup tier.

use crate::crash::{connect, free_addr};
use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use gibbsline::retention::RetentionPolicy;
use std::collections::BTreeMap;
use std::path::Path;
use std::time::Duration;
use tonic::transport::Channel;

const HOUR: i64 = 3_600_000_000_000;
const DAY: i64 = 24 * HOUR;

/// `n` readings `step_ns` apart ending a minute ago.
fn timeline(n: u64, step_ns: i64) -> (i64, impl Fn(u64) -> i64) {
    let t0 = now_ns() - 60_000_000_000 - n as i64 * step_ns;
    (t0, move |s: u64| t0 + s as i64 * step_ns)
}

fn volts(s: u64) -> f64 {
    1.05 + 0.01 * ((s % 17) as f64)
}

async fn send_all(ch: &Channel, channel: &str, seqs: &[u64], at: &impl Fn(u64) -> i64) {
    let mut ingest = IngestServiceClient::new(ch.clone());
    let batches = seqs
        .chunks(2000)
        .enumerate()
        .map(|(i, chunk)| pb::ReadingBatch {
            historical: false,
            channel_id: channel.into(),
            batch_id: i as u64,
            readings: chunk
                .iter()
                .map(|&s| reading(s, at(s), volts(s), Some(0.0)))
                .collect(),
        })
        .collect();
    for ack in send_batches(&mut ingest, batches).await {
        assert!(ack.rejected.is_empty(), "{:?}", ack.rejected);
    }
}

async fn buckets(ch: &Channel, channel: &str, start: i64, end: i64, width: i64) -> Vec<pb::Bucket> {
    HistoryServiceClient::new(ch.clone())
        .query_buckets(pb::QueryBucketsRequest {
            channel_id: channel.into(),
            start_unix_ns: start,
            end_unix_ns: end,
            bucket_width_ns: width,
        })
        .await
        .unwrap()
        .into_inner()
        .buckets
}

/// Readings per bucket of `width` among `times`.
fn counts(times: impl Iterator<Item = i64>, width: i64) -> BTreeMap<i64, u64> {
    let mut out = BTreeMap::new();
    for t in times {
        *out.entry(t.div_euclid(width) * width).or_default() += 1;
    }
    out
}

fn bucket_counts(b: &[pb::Bucket]) -> BTreeMap<i64, u64> {
    b.iter().map(|b| (b.start_unix_ns, b.count)).collect()
}

/// Waits until the oldest stored reading is at or after `mark` (a pass done).
async fn wait_pruned_to(ch: &Channel, channel: &str, mark: i64) -> Vec<pb::StoredReading> {
    for _ in 0..300 {
        let stored = stored_readings(&mut HistoryServiceClient::new(ch.clone()), channel).await;
        if stored.first().is_none_or(|r| r.time_unix_ns >= mark) {
            return stored;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    panic!("{channel}: readings before {mark} still stored after 30 s");
}

#[tokio::test]
async fn retention_deletes_exactly_what_it_should_across_a_restart() {
    let (_dir, db) = temp_db();
    let mut config = config_for(&db);
    config.retention.prune_interval_s = 1;
    let mut server = Server::start_with(config.clone(), "127.0.0.1:0").await;
    let ch = server.channel().await;
    let mut def = channel_def("keep-2d", "vanadium-redox");
    def.retention = Some(pb::Retention {
        raw_days: Some(2.0),
        rollup_days: Some(3.0),
    });
    put_channel(&ch, def).await;
    // Five days, one reading a minute.
    let n = 5 * 24 * 60;
    let (t0, at) = timeline(n, 60_000_000_000);
    let seqs: Vec<u64> = (1..=n).collect();
    send_all(&ch, "keep-2d", &seqs, &at).await;
    let front = at(n);
    let raw_mark = (front - 2 * DAY).div_euclid(HOUR) * HOUR;
    let rollup_mark = (front - 3 * DAY).div_euclid(HOUR) * HOUR;

    let stored = wait_pruned_to(&ch, "keep-2d", raw_mark).await;
    // A pass deletes readings first, then fine rollups: wait for both.
    for _ in 0..300 {
        let minutes = buckets(&ch, "keep-2d", t0, front + 1, 60_000_000_000).await;
        if bucket_counts(&minutes)
            .keys()
            .all(|start| *start >= rollup_mark)
        {
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    let kept: Vec<u64> = seqs
        .iter()
        .copied()
        .filter(|&s| at(s) >= raw_mark)
        .collect();
    assert_eq!(
        stored.iter().map(|r| r.seq).collect::<Vec<_>>(),
        kept,
        "exactly the readings at or after the raw mark"
    );
    let check_rollups = async |ch: &Channel, extra: &[u64]| {
        let all = || seqs.iter().chain(extra).map(|&s| at(s));
        // 1 h rollups are whole for all five days.
        let hourly = buckets(ch, "keep-2d", t0, front + 1, HOUR).await;
        assert_eq!(bucket_counts(&hourly), counts(all(), HOUR));
        // 1 min rollups from the rollup mark on, whole; none before it.
        let minutes = buckets(ch, "keep-2d", t0, front + 1, 60_000_000_000).await;
        let expected: BTreeMap<i64, u64> = counts(all(), 60_000_000_000)
            .into_iter()
            .filter(|(start, _)| *start >= rollup_mark)
            .collect();
        assert_eq!(bucket_counts(&minutes), expected);
    };
    check_rollups(&ch, &[]).await;

    // Below the mark: refused, naming the field. Just above it: stored late,
    // and its hour's rollup takes it.
    let mut ingest = IngestServiceClient::new(ch.clone());
    let late = |seq: u64, time: i64| pb::ReadingBatch {
        historical: false,
        channel_id: "keep-2d".into(),
        batch_id: 900 + seq,
        readings: vec![reading(seq, time, 1.2, Some(0.0))],
    };
    let acks = send_batches(
        &mut ingest,
        vec![late(n + 1_000, raw_mark - 1), late(n + 1_001, raw_mark + 1)],
    )
    .await;
    assert_eq!(acks[0].rejected.len(), 1);
    assert_eq!(acks[0].rejected[0].field, "time_unix_ns");
    assert!(acks[0].rejected[0].reason.contains("retention"));
    assert_eq!(acks[1].accepted, 1);
    let at_with_late = |s: u64| if s == n + 1_001 { raw_mark + 1 } else { at(s) };
    let hourly = buckets(&ch, "keep-2d", t0, front + 1, HOUR).await;
    assert_eq!(
        bucket_counts(&hourly),
        counts(
            seqs.iter().chain(&[n + 1_001]).map(|&s| at_with_late(s)),
            HOUR
        )
    );

    // The storage report says where raw history now begins.
    let report = gibbsline::store::report::storage_report(&db).await.unwrap();
    let channel = report
        .channels
        .iter()
        .find(|c| c.channel_id == "keep-2d")
        .unwrap();
    assert_eq!(channel.raw_kept_from_unix_ns, Some(raw_mark));
    assert_eq!(channel.rollups_kept_from_unix_ns, Some(rollup_mark));
    // The marks survive a restart: the same reading is refused again.
    server.stop().await;
    server = Server::start_with(config, "127.0.0.1:0").await;
    let ch = server.channel().await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let acks = send_batches(&mut ingest, vec![late(n + 1_002, raw_mark - 1)]).await;
    assert_eq!(acks[0].rejected[0].field, "time_unix_ns");
    let stored = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "keep-2d").await;
    assert_eq!(stored.len(), kept.len() + 1);
    server.stop().await;
}

#[tokio::test]
async fn a_channel_without_retention_keeps_everything_beside_one_that_prunes() {
    let (_dir, db) = temp_db();
    let mut config = config_for(&db);
    config.retention.prune_interval_s = 1;
    config.retention.raw_days = Some(1.0);
    let server = Server::start_with(config, "127.0.0.1:0").await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("server-default", "daniell")).await;
    let mut long = channel_def("kept-long", "daniell");
    long.retention = Some(pb::Retention {
        raw_days: Some(30.0),
        rollup_days: None,
    });
    put_channel(&ch, long).await;
    let n = 3 * 24 * 12;
    let (_, at) = timeline(n, 300_000_000_000);
    let seqs: Vec<u64> = (1..=n).collect();
    send_all(&ch, "server-default", &seqs, &at).await;
    send_all(&ch, "kept-long", &seqs, &at).await;
    let mark = (at(n) - DAY).div_euclid(HOUR) * HOUR;
    let stored = wait_pruned_to(&ch, "server-default", mark).await;
    assert_eq!(
        stored.len(),
        seqs.iter().filter(|&&s| at(s) >= mark).count()
    );
    let long = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "kept-long").await;
    assert_eq!(
        long.len() as u64,
        n,
        "a channel's own longer retention wins"
    );
    server.stop().await;
}

#[tokio::test]
async fn bad_retention_is_refused_naming_the_field() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut def = channel_def("bad-retention", "daniell");
    def.retention = Some(pb::Retention {
        raw_days: Some(30.0),
        rollup_days: Some(7.0),
    });
    let err = pb::channel_service_client::ChannelServiceClient::new(ch)
        .put_channel(pb::PutChannelRequest { channel: Some(def) })
        .await
        .unwrap_err();
    assert_eq!(err.code(), tonic::Code::InvalidArgument);
    assert!(
        err.message().contains("retention.rollup_days"),
        "{}",
        err.message()
    );
    let policy = RetentionPolicy {
        raw_days: Some(-1.0),
        rollup_days: None,
    };
    assert!(policy.validate("retention").is_err());
    server.stop().await;
}

#[tokio::test]
async fn an_odd_bucket_width_is_answered_on_a_rollup_tier_and_says_so() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("odd-width", "daniell")).await;
    let n = 2_000;
    let (t0, at) = timeline(n, 2_000_000_000);
    let seqs: Vec<u64> = (1..=n).collect();
    send_all(&ch, "odd-width", &seqs, &at).await;
    // 4,000 s over ~38 buckets: 105.26 s asked, 120 s (2 × 1 min) answered.
    let response = HistoryServiceClient::new(ch.clone())
        .query_buckets(pb::QueryBucketsRequest {
            channel_id: "odd-width".into(),
            start_unix_ns: t0,
            end_unix_ns: at(n) + 1,
            bucket_width_ns: 105_263_157_894,
        })
        .await
        .unwrap()
        .into_inner();
    let width = response.bucket_width_ns;
    assert_eq!(width, 120_000_000_000);
    assert_eq!(
        bucket_counts(&response.buckets),
        counts(seqs.iter().map(|&s| at(s)), width),
        "buckets on the answered width hold exactly their readings"
    );
    server.stop().await;
}

/// A subprocess server whose config keeps `raw_days` of channel `kill-prune`.
fn spawn_pruning_server(
    dir: &Path,
    db: &Path,
    addr: &str,
    metrics: &str,
    raw_days: f64,
) -> std::process::Child {
    let config = dir.join("prune.toml");
    std::fs::write(
        &config,
        format!(
            "[retention]\nprune_interval_s = 1\n\n[[channel]]\nchannel_id = \"kill-prune\"\n\
             chemistry_id = \"daniell\"\ncells_in_series = 1\ncurrent_sign = \"charge_positive\"\n\
             plausible_min_cell_volts = 0.5\nplausible_max_cell_volts = 1.6\n\
             retention = {{ raw_days = {raw_days:.1}, rollup_days = {raw_days:.1} }}\n"
        ),
    )
    .unwrap();
    let more = [
        "--metrics-listen".as_ref(),
        metrics.as_ref(),
        "--config".as_ref(),
        config.as_os_str(),
    ];
    crate::crash::spawn_server_with(db, addr, &more)
}

/// The pruned-readings counter of a server still starting.
async fn pruned_so_far(metrics: std::net::SocketAddr) -> Option<f64> {
    crate::metrics::sample_when_up(metrics, "gibbsline_pruned_readings_total").await
}

#[tokio::test]
async fn a_sigkill_during_pruning_loses_nothing_it_should_not() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("kill.db");
    // Three days, one reading every 2 s: 129,600 readings, so a pass that
    // drops half a day runs through about 11 transactions.
    let n = 3 * 24 * 1800;
    let (t0, at) = timeline(n, 2_000_000_000);
    let seqs: Vec<u64> = (1..=n).collect();
    {
        let server = Server::start(&db).await;
        let ch = server.channel().await;
        let mut def = channel_def("kill-prune", "daniell");
        def.plausible_min_cell_volts = 0.5;
        def.plausible_max_cell_volts = 1.6;
        put_channel(&ch, def).await;
        send_all(&ch, "kill-prune", &seqs, &at).await;
        server.stop().await;
    }
    let front = at(n);
    let mark_of = |days: f64| (front - (days * DAY as f64) as i64).div_euclid(HOUR) * HOUR;
    let hourly_sent = counts(seqs.iter().map(|&s| at(s)), HOUR);
    // Kills that landed after a pass's first deletion and before its end.
    let mut cut_passes = 0;
    // Each start keeps half a day less, so every start has something to
    // prune, and is killed as soon as its pass has deleted anything.
    let keep_days = [2.5, 2.0, 1.5, 1.0];
    for (i, &days) in keep_days.iter().enumerate() {
        let (addr, metrics) = (free_addr(), free_addr());
        let mut child = spawn_pruning_server(dir.path(), &db, &addr, &metrics, days);
        let metrics: std::net::SocketAddr = metrics.parse().unwrap();
        let mut pruned = 0.0;
        for _ in 0..20_000 {
            pruned = pruned_so_far(metrics).await.unwrap_or(0.0);
            if pruned > 0.0 {
                break;
            }
            tokio::time::sleep(Duration::from_micros(200)).await;
        }
        child.kill().unwrap();
        child.wait().unwrap();
        let previous = if i == 0 { 3.0 } else { keep_days[i - 1] };
        let due = seqs
            .iter()
            .filter(|&&s| at(s) >= mark_of(previous) && at(s) < mark_of(days))
            .count();
        if pruned > 0.0 && pruned < due as f64 {
            cut_passes += 1;
        }
        // What the killed pass left: nothing at or after its mark is missing.
        let server = Server::start(&db).await;
        let stored = stored_readings(
            &mut HistoryServiceClient::new(server.channel().await),
            "kill-prune",
        )
        .await;
        let mark = mark_of(days);
        let must_keep = seqs.iter().filter(|&&s| at(s) >= mark).count();
        let kept = stored.iter().filter(|r| r.time_unix_ns >= mark).count();
        assert_eq!(kept, must_keep, "{days} d: readings after the mark lost");
        server.stop().await;
    }
    eprintln!(
        "kill-prune: {cut_passes} of {} kills cut a pass short",
        keep_days.len()
    );
    assert!(cut_passes > 0, "no kill landed inside a pass");
    // A last start runs its pass to the end.
    let (addr, metrics) = (free_addr(), free_addr());
    let mut child = spawn_pruning_server(dir.path(), &db, &addr, &metrics, 0.5);
    let ch = connect(&addr).await;
    let mark = mark_of(0.5);
    let stored = wait_pruned_to(&ch, "kill-prune", mark).await;
    let kept: Vec<u64> = seqs.iter().copied().filter(|&s| at(s) >= mark).collect();
    assert_eq!(stored.iter().map(|r| r.seq).collect::<Vec<_>>(), kept);
    for r in &stored {
        assert_eq!(r.volts, volts(r.seq), "seq {}", r.seq);
    }
    let hourly = buckets(&ch, "kill-prune", t0, front + 1, HOUR).await;
    assert_eq!(
        bucket_counts(&hourly),
        hourly_sent,
        "1 h rollups whole after kills"
    );
    child.kill().unwrap();
    child.wait().unwrap();
}

/// One random rig session: readings `step_ms` apart, sent in random
/// batches with some held back and sent late, some batches resent, and
/// the server restarted between some batches.
async fn random_session(seed: u64, n: u64, step_ms: i64) {
    let mut rng = gibbsline::sim::Rng::new(seed);
    let (_dir, db) = temp_db();
    let mut server = Server::start(&db).await;
    let mut def = channel_def("prop-1", "vanadium-redox");
    def.capacity_ah = 0.5;
    put_channel(&server.channel().await, def).await;
    let (t0, at) = timeline(n, step_ms * 1_000_000);
    // Current in segments of 40 readings: charge, discharge or rest.
    let amps = |s: u64| [1.2, -1.2, 0.0][((s / 40) * 7 + seed % 3) as usize % 3];
    let volts = |s: u64| 1.32 + 0.05 * ((s as f64) * 0.11).sin();
    let (mut fresh, mut late): (Vec<u64>, Vec<u64>) =
        (1..=n).partition(|_| !rng.next_u64().is_multiple_of(10));
    late.reverse();
    let mut sent: Vec<Vec<u64>> = Vec::new();
    while !fresh.is_empty() || !late.is_empty() {
        let batch: Vec<u64> = match rng.next_u64() % 6 {
            0 if !late.is_empty() => {
                let k = (1 + rng.next_u64() % 20).min(late.len() as u64) as usize;
                late.drain(..k).collect()
            }
            1 if !sent.is_empty() => sent[(rng.next_u64() % sent.len() as u64) as usize].clone(),
            _ if !fresh.is_empty() => {
                let k = (1 + rng.next_u64() % 300).min(fresh.len() as u64) as usize;
                fresh.drain(..k).collect()
            }
            _ => std::mem::take(&mut late),
        };
        if rng.next_u64().is_multiple_of(12) {
            server.stop().await;
            server = Server::start(&db).await;
        }
        let mut ingest = IngestServiceClient::new(server.channel().await);
        let readings = batch
            .iter()
            .map(|&s| reading(s, at(s), volts(s), Some(amps(s))))
            .collect();
        send_batches(
            &mut ingest,
            vec![pb::ReadingBatch {
                historical: false,
                channel_id: "prop-1".into(),
                batch_id: sent.len() as u64,
                readings,
            }],
        )
        .await;
        sent.push(batch);
    }
    let ch = server.channel().await;
    let stored = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "prop-1").await;
    assert_eq!(
        stored.len() as u64,
        n,
        "seed {seed}: every reading stored once"
    );
    let window = (t0 + (n as i64 / 3) * step_ms * 1_000_000, at(n) + 1);
    crate::truth::buckets_match_readings(&ch, "prop-1", window, &[4, 10, 60, 3600]).await;
    server.stop().await;
}

#[test]
fn rollups_equal_a_recomputation_over_random_batches_late_readings_and_restarts() {
    use proptest::prelude::*;
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let config = ProptestConfig {
        cases: 10,
        failure_persistence: None,
        ..ProptestConfig::default()
    };
    proptest!(config, |(seed in any::<u64>(), n in 200u64..1500, step_ms in prop_oneof![Just(137i64), Just(900), Just(3_100)])| {
        runtime.block_on(random_session(seed, n, step_ms));
    });
}

/// PostgreSQL with several servers: a channel no rig streams to (so no
/// server owns it) is still pruned, by the server whose pass claims it.
#[tokio::test]
async fn an_unowned_channel_is_pruned_by_a_server_that_claims_it() {
    if !on_postgres() {
        return;
    }
    let (_dir, db) = temp_db();
    // A server without retention stores three days and stops (its
    // leases given up): nobody owns the channel.
    let writer = Server::start(&db).await;
    let ch = writer.channel().await;
    put_channel(&ch, channel_def("orphan", "daniell")).await;
    let n = 3 * 24 * 12;
    let (_, at) = timeline(n, 300_000_000_000);
    let seqs: Vec<u64> = (1..=n).collect();
    send_all(&ch, "orphan", &seqs, &at).await;
    writer.stop().await;
    // Another server, keeping one day, prunes it without any rig.
    let mut config = config_for(&db);
    config.retention.prune_interval_s = 1;
    config.retention.raw_days = Some(1.0);
    let pruner = Server::start_with(config, "127.0.0.1:0").await;
    let ch = pruner.channel().await;
    let mark = (at(n) - DAY).div_euclid(HOUR) * HOUR;
    let stored = wait_pruned_to(&ch, "orphan", mark).await;
    assert_eq!(
        stored.len(),
        seqs.iter().filter(|&&s| at(s) >= mark).count()
    );
    pruner.stop().await;
}

/// Every reading of `channel` in columns (READING_LAYOUT_COLUMNS), at most `limit`.
async fn stored_columns(ch: &Channel, channel: &str, limit: u32) -> pb::ReadingColumns {
    use tokio_stream::StreamExt;
    let mut pages = HistoryServiceClient::new(ch.clone())
        .query_readings(pb::QueryReadingsRequest {
            channel_id: channel.into(),
            limit,
            layout: pb::ReadingLayout::Columns as i32,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    let mut all = pb::ReadingColumns::default();
    while let Some(page) = pages.next().await {
        let page = page.unwrap();
        assert!(page.readings.is_empty(), "columns only");
        let c = page.columns.expect("a columns message");
        assert!(
            c.seq.len() <= 8_192,
            "{} readings in one message",
            c.seq.len()
        );
        all.seq.extend(c.seq);
        all.time_unix_ns.extend(c.time_unix_ns);
        all.volts.extend(c.volts);
        all.amps_charge_positive.extend(c.amps_charge_positive);
        all.temp_c.extend(c.temp_c);
        all.run_id.extend(c.run_id);
        all.equilibrium_cell_volts.extend(c.equilibrium_cell_volts);
        all.ocv_source.extend(c.ocv_source);
        all.soc_from_model.extend(c.soc_from_model);
        all.soc_fused.extend(c.soc_fused);
        all.charge_ah.extend(c.charge_ah);
        all.energy_wh.extend(c.energy_wh);
    }
    all
}

/// NaN for an absent value, bit for bit otherwise.
fn same(column: f64, row: Option<f64>) -> bool {
    match row {
        Some(v) => column.to_bits() == v.to_bits(),
        None => column.is_nan(),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn columns_carry_what_rows_carry_across_store_pages_late_readings_and_limits() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("columns", "daniell")).await;
    // 20,000 readings (three store pages), some without current or
    // temperature, under current and at rest; every 1,000th held back
    // and sent late, so stored chunks overlap in time.
    let n = 20_000u64;
    let (_, at) = timeline(n, 100_000_000);
    let make = |s: u64| pb::Reading {
        seq: s,
        time_unix_ns: at(s),
        volts: volts(s),
        amps: (!s.is_multiple_of(7)).then_some(if (s / 3_000).is_multiple_of(2) {
            0.5
        } else {
            0.0
        }),
        temp_c: s.is_multiple_of(2).then_some(24.0 + (s % 10) as f64 * 0.1),
    };
    let (late, on_time): (Vec<u64>, Vec<u64>) = (1..=n).partition(|s| s % 1_000 == 500);
    let mut ingest = IngestServiceClient::new(ch.clone());
    for (i, seqs) in [on_time, late].iter().enumerate() {
        let batches = seqs
            .chunks(2_000)
            .enumerate()
            .map(|(j, part)| pb::ReadingBatch {
                historical: false,
                channel_id: "columns".into(),
                batch_id: (i * 100 + j) as u64,
                readings: part.iter().map(|&s| make(s)).collect(),
            })
            .collect();
        for ack in send_batches(&mut ingest, batches).await {
            assert!(ack.rejected.is_empty(), "{:?}", ack.rejected);
        }
    }
    let rows = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "columns").await;
    let c = stored_columns(&ch, "columns", 10_000_000).await;
    assert_eq!(rows.len(), n as usize);
    assert_eq!(c.seq.len(), rows.len());
    for (i, r) in rows.iter().enumerate() {
        let d = r.derived.as_ref().expect("derived");
        assert_eq!(
            (c.seq[i], c.time_unix_ns[i], c.run_id[i]),
            (r.seq, r.time_unix_ns, r.run_id)
        );
        assert!(same(c.volts[i], Some(r.volts)), "volts of seq {}", r.seq);
        assert!(
            same(c.amps_charge_positive[i], r.amps_charge_positive),
            "amps of seq {}",
            r.seq
        );
        assert!(same(c.temp_c[i], r.temp_c), "temp_c of seq {}", r.seq);
        assert!(same(
            c.equilibrium_cell_volts[i],
            Some(d.equilibrium_cell_volts)
        ));
        assert_eq!(c.ocv_source[i], d.ocv_source, "ocv_source of seq {}", r.seq);
        assert!(
            same(c.soc_from_model[i], d.soc_from_model),
            "soc of seq {}",
            r.seq
        );
        assert!(
            same(c.soc_fused[i], d.soc_fused),
            "fused soc of seq {}",
            r.seq
        );
        assert!(same(c.charge_ah[i], Some(d.charge_ah)));
        assert!(same(c.energy_wh[i], Some(d.energy_wh)));
    }
    assert!(
        c.amps_charge_positive.iter().any(|a| a.is_nan()),
        "absent current is NaN"
    );
    assert!(
        c.soc_from_model.iter().any(|s| !s.is_nan()),
        "some SOC known"
    );
    // A limit ends the answer at exactly that many, in time order.
    let first = stored_columns(&ch, "columns", 9_000).await;
    assert_eq!(first.seq, c.seq[..9_000]);
    // An unknown layout is refused naming the field.
    let refused = HistoryServiceClient::new(ch.clone())
        .query_readings(pb::QueryReadingsRequest {
            channel_id: "columns".into(),
            layout: 7,
            ..Default::default()
        })
        .await
        .unwrap_err();
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    assert!(
        refused.message().contains("layout"),
        "{}",
        refused.message()
    );
    server.stop().await;
}
