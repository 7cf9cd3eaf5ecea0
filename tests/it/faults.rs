//! The fault suite: a disk that fills and frees, a deleted database file,
//! a second server on one file, garbled timelines. Each test asserts the
//! outside promise (an acknowledged reading is stored exactly once and
//! readable after a restart; health tells the truth), not an internal.

use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use std::collections::HashSet;
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};
use tokio_stream::StreamExt;
use tonic::transport::Channel;

type Health = tonic_health::pb::health_client::HealthClient<Channel>;
const SERVING: i32 = tonic_health::pb::health_check_response::ServingStatus::Serving as i32;
const NOT_SERVING: i32 = tonic_health::pb::health_check_response::ServingStatus::NotServing as i32;

/// One batch on its own stream: its ack, or the status that ended the stream.
async fn try_batch(
    ingest: &mut IngestServiceClient<Channel>,
    batch: pb::ReadingBatch,
) -> Result<pb::BatchAck, tonic::Status> {
    let outbound = tokio_stream::iter(vec![pb::StreamReadingsRequest { batch: Some(batch) }]);
    let mut inbound = ingest.stream_readings(outbound).await?.into_inner();
    match inbound.next().await {
        Some(Ok(m)) => Ok(m.ack.expect("a response carries an ack")),
        Some(Err(status)) => Err(status),
        None => Err(tonic::Status::unknown("stream ended without an answer")),
    }
}

fn batch(channel: &str, seqs: std::ops::Range<u64>, t0: i64) -> pb::ReadingBatch {
    pb::ReadingBatch {
        historical: false,
        channel_id: channel.into(),
        batch_id: seqs.start,
        readings: seqs
            .map(|s| reading(s, t0 + s as i64 * 1_000_000, 1.10, Some(0.0)))
            .collect(),
    }
}

async fn health_of(ch: &Channel) -> i32 {
    Health::new(ch.clone())
        .check(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .unwrap()
        .into_inner()
        .status
}

async fn wait_for_health(ch: &Channel, want: i32) {
    let deadline = Instant::now() + Duration::from_secs(15);
    while health_of(ch).await != want {
        assert!(Instant::now() < deadline, "health never became {want}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

async fn resume_point(ch: &Channel, channel: &str) -> u64 {
    IngestServiceClient::new(ch.clone())
        .get_resume_point(pb::GetResumePointRequest {
            channel_id: channel.into(),
        })
        .await
        .unwrap()
        .into_inner()
        .last_stored_seq
}

/// A small tmpfs: the real "disk full", as root. Elsewhere the test says
/// why it did not run (CI runs as root).
pub(crate) struct SmallDisk {
    dir: tempfile::TempDir,
}

impl SmallDisk {
    pub(crate) fn mount(size: &str) -> Option<SmallDisk> {
        let dir = tempfile::tempdir().unwrap();
        let ok = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(dir.path())
            .status()
            .is_ok_and(|s| s.success());
        if !ok {
            eprintln!("skipped: cannot mount a tmpfs here (needs root)");
            return None;
        }
        Some(SmallDisk { dir })
    }

    fn resize(&self, size: &str) {
        let ok = Command::new("mount")
            .args(["-o", &format!("remount,size={size}")])
            .arg(self.dir.path())
            .status()
            .unwrap()
            .success();
        assert!(ok, "remount failed");
    }

    pub(crate) fn path(&self) -> &Path {
        self.dir.path()
    }
}

impl Drop for SmallDisk {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(self.dir.path()).status();
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_full_disk_loses_no_acknowledged_reading() {
    let Some(disk) = SmallDisk::mount("4m") else {
        return;
    };
    let db = disk.path().join("lab.db");
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("full-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 3_600_000_000_000;
    let mut acked = HashSet::new();
    let mut next = 1u64;
    // Fill the disk: stream until the store refuses.
    let refusal = loop {
        match try_batch(&mut ingest, batch("full-1", next..next + 1000, t0)).await {
            Ok(ack) => {
                assert!(ack.rejected.is_empty(), "{:?}", ack.rejected);
                acked.extend(next..next + 1000);
                assert_eq!(ack.last_stored_seq, next + 999);
                next += 1000;
                assert!(next < 2_000_000, "a 4 MiB disk never filled");
            }
            Err(status) => break status,
        }
    };
    assert_eq!(
        refusal.code(),
        tonic::Code::ResourceExhausted,
        "{refusal:?}"
    );
    assert!(refusal.message().contains("is full"), "{refusal:?}");
    assert!(refusal.message().contains("lab.db"), "{refusal:?}");
    // More writes while full: a PutChannel (small: it may still fit) and
    // a batch, which is refused.
    let _ = ChannelServiceClient::new(ch.clone())
        .put_channel(pb::PutChannelRequest {
            channel: Some(channel_def("full-2", "daniell")),
        })
        .await;
    assert!(
        try_batch(&mut ingest, batch("full-1", next..next + 1000, t0))
            .await
            .is_err()
    );
    wait_for_health(&ch, NOT_SERVING).await;
    // The resume point is what was committed, not what was attempted.
    assert_eq!(resume_point(&ch, "full-1").await, next - 1);

    disk.resize("64m");
    wait_for_health(&ch, SERVING).await;
    let resume = resume_point(&ch, "full-1").await;
    assert_eq!(resume, next - 1);
    for _ in 0..10 {
        let ack = try_batch(&mut ingest, batch("full-1", next..next + 1000, t0))
            .await
            .expect("writes succeed again once there is room");
        assert_eq!((ack.accepted, ack.last_stored_seq), (1000, next + 999));
        acked.extend(next..next + 1000);
        next += 1000;
    }
    server.stop().await;

    // Every acknowledged reading is stored exactly once, after a restart.
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let stored = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "full-1").await;
    let seqs: Vec<u64> = stored.iter().map(|r| r.seq).collect();
    let unique: HashSet<u64> = seqs.iter().copied().collect();
    assert_eq!(seqs.len(), unique.len(), "a reading was stored twice");
    let missing: Vec<_> = acked.difference(&unique).take(5).collect();
    assert!(
        missing.is_empty(),
        "acknowledged but not stored: {missing:?} ..."
    );
    assert_eq!(unique.len(), acked.len());
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_second_server_on_one_file_is_refused_naming_the_holder() {
    let (_dir, db) = temp_db();
    let first = Server::start(&db).await;
    let ch = first.channel().await;
    assert_eq!(health_of(&ch).await, SERVING);
    let message = refusal_at_start(&db).await;
    assert!(
        message.contains("in use by another gibbsline server"),
        "{message}"
    );
    assert!(
        message.contains(&format!("pid {}", std::process::id())),
        "{message}"
    );
    assert!(message.contains(&first.addr.to_string()), "{message}");
    // Through a symlink it is still the same file, and still refused.
    let link = db.with_file_name("through-a-link.db");
    std::os::unix::fs::symlink(&db, &link).unwrap();
    let message = refusal_at_start(&link).await;
    assert!(
        message.contains("in use by another gibbsline server"),
        "through a symlink: {message}"
    );
    first.stop().await;
    // Once the holder has stopped, the file is free again.
    let again = Server::start(&db).await;
    let _ = again.channel().await;
    again.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_deleted_database_file_is_detected_not_written_into_the_void() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("gone-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 3_600_000_000_000;
    try_batch(&mut ingest, batch("gone-1", 1..101, t0))
        .await
        .unwrap();
    std::fs::remove_file(&db).unwrap();
    let refusal = try_batch(&mut ingest, batch("gone-1", 101..201, t0))
        .await
        .expect_err("a batch for a deleted file must not be acknowledged");
    assert_eq!(
        refusal.code(),
        tonic::Code::FailedPrecondition,
        "{refusal:?}"
    );
    assert!(
        refusal.message().contains("deleted or replaced"),
        "{refusal:?}"
    );
    wait_for_health(&ch, NOT_SERVING).await;
    assert_eq!(resume_point(&ch, "gone-1").await, 100);
    server.stop().await;
}

/// Alerts of a channel, as an operator lists them.
async fn alert_kinds(ch: &Channel, channel: &str) -> Vec<i32> {
    AlertServiceClient::new(ch.clone())
        .list_alerts(pb::ListAlertsRequest {
            channel_id: channel.into(),
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner()
        .alerts
        .iter()
        .map(|a| a.kind)
        .collect()
}

/// Daniell at 150 °C: the temperature limit must fire on real readings
/// after a garbled one (time or seq), and the garbling raises its own alert.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn one_garbled_reading_does_not_silence_alerts() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let now = now_ns();
    for (channel, garbled) in [
        (
            "poison-time",
            reading(2, now + 20 * 3_600_000_000_000, 1.10, Some(0.0)),
        ),
        (
            "poison-seq",
            reading(i64::MAX as u64, now - 9_000_000_000, 1.10, Some(0.0)),
        ),
    ] {
        put_channel(&ch, channel_def(channel, "daniell")).await;
        let first = reading(1, now - 10_000_000_000, 1.10, Some(0.0));
        let ack = try_batch(
            &mut ingest,
            pb::ReadingBatch {
                historical: false,
                channel_id: channel.into(),
                batch_id: 1,
                readings: vec![first, garbled],
            },
        )
        .await
        .unwrap();
        assert_eq!(ack.accepted, 1, "{channel}: {ack:?}");
        assert_eq!(ack.rejected.len(), 1, "{channel}: {ack:?}");
        assert!(ack.rejected[0].reason.contains("quarantined"), "{ack:?}");
        assert_eq!(
            ack.last_stored_seq, 1,
            "{channel}: the garbled reading moved the front"
        );
        let hot: Vec<_> = (0..20)
            .map(|i| pb::Reading {
                seq: 3 + i,
                time_unix_ns: now - 8_000_000_000 + i as i64 * 100_000_000,
                volts: 1.10,
                amps: Some(0.0),
                temp_c: Some(150.0),
            })
            .collect();
        let ack = try_batch(
            &mut ingest,
            pb::ReadingBatch {
                historical: false,
                channel_id: channel.into(),
                batch_id: 2,
                readings: hot,
            },
        )
        .await
        .unwrap();
        assert_eq!(
            (ack.accepted, ack.out_of_order),
            (20, 0),
            "{channel}: {ack:?}"
        );
        let kinds = alert_kinds(&ch, channel).await;
        assert!(
            kinds.contains(&(pb::AlertKind::TemperatureLimit as i32)),
            "{channel}: {kinds:?}"
        );
        assert!(
            kinds.contains(&(pb::AlertKind::Timeline as i32)),
            "{channel}: {kinds:?}"
        );
    }
    server.stop().await;
}

/// A reading 200 s ahead (inside the 300 s tolerance) moves the front;
/// the cell's next readings, over its safe window and behind it in time, must still
/// raise the voltage limit at its own severity beside the timeline alert.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_garble_inside_the_tolerances_keeps_the_limit_alerts() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("ahead-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let now = now_ns();
    let send = |readings: Vec<pb::Reading>| pb::ReadingBatch {
        historical: false,
        channel_id: "ahead-1".into(),
        batch_id: 0,
        readings,
    };
    let ack = try_batch(
        &mut ingest,
        send(vec![
            reading(1, now - 10_000_000_000, 1.10, Some(0.0)),
            reading(2, now + 200_000_000_000, 1.10, Some(0.0)),
        ]),
    )
    .await
    .unwrap();
    assert_eq!(ack.accepted, 2, "inside the tolerance: {ack:?}");
    let over: Vec<_> = (3..23)
        .map(|s| {
            reading(
                s,
                now - 8_000_000_000 + s as i64 * 100_000_000,
                1.35,
                Some(0.0),
            )
        })
        .collect();
    let ack = try_batch(&mut ingest, send(over)).await.unwrap();
    assert_eq!(ack.accepted, 20, "{ack:?}");
    let alerts = AlertServiceClient::new(ch.clone())
        .list_alerts(pb::ListAlertsRequest {
            channel_id: "ahead-1".into(),
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner()
        .alerts;
    let limit = alerts
        .iter()
        .find(|a| a.kind == pb::AlertKind::VoltageLimit as i32)
        .unwrap_or_else(|| panic!("no voltage limit alert: {alerts:?}"));
    assert_eq!(limit.severity, pb::Severity::Critical as i32, "{limit:?}");
    assert_eq!(
        limit.raised_seq, 3,
        "raised on the first reading over: {limit:?}"
    );
    assert!(
        alerts
            .iter()
            .any(|a| a.kind == pb::AlertKind::Timeline as i32),
        "{alerts:?}"
    );
    server.stop().await;
}

/// A seq jump inside the bound still moves the front; the real readings
/// behind it raise the timeline alert, and an operator's reset brings them
/// back to the rules, across a restart too.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_reset_timeline_brings_real_readings_back_to_the_rules() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("reset-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 600_000_000_000;
    let at = |seq: u64, i: i64, temp_c: f64| pb::Reading {
        seq,
        time_unix_ns: t0 + i * 100_000_000,
        volts: 1.10,
        amps: Some(0.0),
        temp_c: Some(temp_c),
    };
    let send = |readings: Vec<pb::Reading>| pb::ReadingBatch {
        historical: false,
        channel_id: "reset-1".into(),
        batch_id: 0,
        readings,
    };
    let ack = try_batch(
        &mut ingest,
        send(vec![at(1, 1, 25.0), at(500_001, 2, 25.0)]),
    )
    .await
    .unwrap();
    assert_eq!((ack.accepted, ack.last_stored_seq), (2, 500_001));
    let ack = try_batch(
        &mut ingest,
        send((2..22).map(|s| at(s, s as i64 + 2, 150.0)).collect()),
    )
    .await
    .unwrap();
    assert_eq!(ack.out_of_order, 20, "{ack:?}");
    let kinds = alert_kinds(&ch, "reset-1").await;
    assert!(
        kinds.contains(&(pb::AlertKind::Timeline as i32)),
        "{kinds:?}"
    );
    // Limit rules judge each reading on its own values, in the channel's
    // order or not: 150 °C behind a jumped seq is still 150 °C.
    assert!(
        kinds.contains(&(pb::AlertKind::TemperatureLimit as i32)),
        "{kinds:?}"
    );

    let reset = ChannelServiceClient::new(ch.clone())
        .reset_timeline(pb::ResetTimelineRequest {
            channel_id: "reset-1".into(),
            after_seq: None,
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(reset.last_stored_seq, 21);
    assert_eq!(resume_point(&ch, "reset-1").await, 21);
    server.stop().await;

    let server = Server::start(&db).await;
    let ch = server.channel().await;
    assert_eq!(
        resume_point(&ch, "reset-1").await,
        21,
        "a restart lost the reset"
    );
    let mut ingest = IngestServiceClient::new(ch.clone());
    let ack = try_batch(
        &mut ingest,
        send((22..42).map(|s| at(s, s as i64 + 2, 150.0)).collect()),
    )
    .await
    .unwrap();
    assert_eq!((ack.accepted, ack.out_of_order), (20, 0), "{ack:?}");
    let kinds = alert_kinds(&ch, "reset-1").await;
    assert!(
        kinds.contains(&(pb::AlertKind::TemperatureLimit as i32)),
        "{kinds:?}"
    );
    // Nothing to reset on a channel in step: the refusal names the field.
    let refused = ChannelServiceClient::new(ch.clone())
        .reset_timeline(pb::ResetTimelineRequest {
            channel_id: "reset-1".into(),
            after_seq: Some(999),
        })
        .await
        .unwrap_err();
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    assert!(refused.message().contains("after_seq = 999"), "{refused:?}");
    server.stop().await;
}

fn tight_limits(db: &Path) -> gibbsline::config::ServerConfig {
    let mut config = config_for(db);
    config.limits.stream_idle_timeout_s = 1;
    config.limits.connection_idle_timeout_s = 1;
    config.limits.max_streams_per_client = 2;
    config
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn idle_streams_and_connections_are_closed_and_one_client_cannot_take_every_slot() {
    use tokio::io::AsyncReadExt;
    let (_dir, db) = temp_db();
    let server = Server::start_with(tight_limits(&db), "127.0.0.1:0").await;
    let ch = server.channel().await;

    // A connection that never speaks is closed.
    let mut mute = tokio::net::TcpStream::connect(server.addr).await.unwrap();
    let mut buf = [0u8; 64];
    let closed = tokio::time::timeout(Duration::from_secs(10), async {
        loop {
            match mute.read(&mut buf).await {
                Ok(0) | Err(_) => return,
                Ok(_) => {}
            }
        }
    })
    .await;
    assert!(closed.is_ok(), "a mute connection was never closed");

    // Two idle streams take this client's two slots; a third is refused.
    let mut idle = Vec::new();
    for _ in 0..2 {
        let (tx, rx) = tokio::sync::mpsc::channel::<pb::StreamReadingsRequest>(1);
        let acks = IngestServiceClient::new(ch.clone())
            .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
            .await
            .unwrap()
            .into_inner();
        idle.push((tx, acks));
    }
    let (_tx3, rx3) = tokio::sync::mpsc::channel::<pb::StreamReadingsRequest>(1);
    let third = IngestServiceClient::new(ch.clone())
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx3))
        .await
        .unwrap_err();
    assert_eq!(third.code(), tonic::Code::ResourceExhausted, "{third:?}");
    assert!(
        third.message().contains("max_streams_per_client"),
        "{third:?}"
    );
    // One of them sends messages without readings, every 200 ms: that is
    // not activity, and must not keep the slot.
    let chatter = idle[0].0.clone();
    tokio::spawn(async move {
        while chatter
            .send(pb::StreamReadingsRequest { batch: None })
            .await
            .is_ok()
        {
            tokio::time::sleep(Duration::from_millis(200)).await;
        }
    });
    // An idle stream is ended, naming the limit; its slot comes back.
    for (_tx, acks) in &mut idle {
        // The chatty one's empty messages are answered in its acks.
        let ended = tokio::time::timeout(Duration::from_secs(10), async {
            loop {
                match acks.next().await {
                    Some(Ok(_)) => continue,
                    Some(Err(status)) => return status,
                    None => panic!("an idle stream ended without a status"),
                }
            }
        })
        .await
        .expect("an idle stream was never ended");
        assert_eq!(ended.code(), tonic::Code::DeadlineExceeded, "{ended:?}");
        assert!(ended.message().contains("no readings for"), "{ended:?}");
        assert!(
            ended.message().contains("stream_idle_timeout_s"),
            "{ended:?}"
        );
    }
    drop(idle);
    tokio::time::sleep(Duration::from_millis(200)).await;
    put_channel(&ch, channel_def("idle-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let ack = try_batch(
        &mut ingest,
        batch("idle-1", 1..11, now_ns() - 60_000_000_000),
    )
    .await
    .unwrap();
    assert_eq!(ack.accepted, 10);
    server.stop().await;
}

/// Fills a channel of a server process with `n` readings.
pub(crate) async fn fill(ch: &Channel, channel: &str, n: u64) {
    put_channel(ch, channel_def(channel, "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 3_600_000_000_000;
    let batches: Vec<_> = (0..n / 10_000)
        .map(|b| batch(channel, b * 10_000 + 1..(b + 1) * 10_000 + 1, t0))
        .collect();
    let acks = send_batches(&mut ingest, batches).await;
    assert!(acks.iter().all(|a| a.accepted == 10_000));
}

/// Opens a QueryReadings asking for everything, reads one page, then stops reading.
async fn unread_query(ch: &Channel, channel: &str) -> tonic::Streaming<pb::QueryReadingsResponse> {
    let mut pages = HistoryServiceClient::new(ch.clone())
        .query_readings(pb::QueryReadingsRequest {
            channel_id: channel.into(),
            limit: u32::MAX,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    assert!(!pages.next().await.unwrap().unwrap().readings.is_empty());
    pages
}

fn rss_mib(pid: u32) -> f64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    let kib: f64 = status
        .lines()
        .find(|l| l.starts_with("VmRSS:"))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|v| v.parse().ok())
        .unwrap();
    kib / 1024.0
}

/// Bound on the server's resident memory with 8 unread full-range queries
/// (README, "Limits and promises"); before paging, 8 reached 2 GiB.
const UNREAD_QUERIES_RSS_BOUND_MIB: f64 = 150.0;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn unread_queries_hold_bounded_memory_and_sigterm_still_exits_in_time() {
    let (_dir, db) = temp_db();
    let addr = crate::crash::free_addr();
    let mut server = crate::crash::spawn_server(&db, &addr);
    let ch = crate::crash::connect(&addr).await;
    fill(&ch, "mem-1", 200_000).await;
    // Eight viewers, each on its own connection (unread data on one
    // connection would exhaust that connection's HTTP/2 window first).
    let mut open = Vec::new();
    for _ in 0..8 {
        let viewer = crate::crash::connect(&addr).await;
        open.push(unread_query(&viewer, "mem-1").await);
    }
    tokio::time::sleep(Duration::from_secs(1)).await;
    let rss = rss_mib(server.id());
    let peak = crate::flood::peak_rss_mib(server.id());
    eprintln!(
        "8 unread queries over 200,000 readings: server RSS {rss:.0} MiB, peak {peak:.0} MiB"
    );
    assert!(rss < UNREAD_QUERIES_RSS_BOUND_MIB, "RSS {rss:.0} MiB");

    // An idle TCP connection and the unread queries stay open; SIGTERM
    // must still end the process within the shutdown budget (10 s).
    let _mute = tokio::net::TcpStream::connect(&addr).await.unwrap();
    let started = Instant::now();
    let status = Command::new("kill")
        .args(["-TERM", &server.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let exit = tokio::task::spawn_blocking(move || {
        let deadline = Instant::now() + Duration::from_secs(30);
        loop {
            if let Some(status) = server.try_wait().unwrap() {
                return Some(status);
            }
            if Instant::now() > deadline {
                let _ = server.kill();
                return None;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
    })
    .await
    .unwrap();
    let took = started.elapsed();
    eprintln!("exit after SIGTERM with clients attached: {took:?}");
    let exit = exit.expect("the server was still running 30 s after SIGTERM");
    assert_eq!(exit.code(), Some(0));
    // 10 s budget plus a margin for a loaded CI machine.
    assert!(took < Duration::from_secs(15), "exit took {took:?}");
    drop(open);
}

/// Operating mode from the current under both instrument conventions,
/// SOC unknown under load until an operator's entry anchors it, the
/// entry surviving a restart.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn modes_follow_the_current_and_an_operator_soc_anchors_the_count() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut flipped = channel_def("mode-dis", "vanadium-redox");
    flipped.current_sign = pb::CurrentSign::DischargePositive as i32;
    put_channel(&ch, channel_def("mode-chg", "vanadium-redox")).await;
    put_channel(&ch, flipped).await;
    put_channel(&ch, channel_def("mode-h2", "hydrogen-oxygen")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 600_000_000_000;
    let send =
        |channel: &str, seqs: std::ops::Range<u64>, volts: f64, amps: f64| pb::ReadingBatch {
            historical: false,
            channel_id: channel.into(),
            batch_id: seqs.start,
            readings: seqs
                .map(|s| reading(s, t0 + s as i64 * 1_000_000_000, volts, Some(amps)))
                .collect(),
        };
    // The instrument says +1 A on both; the flipped channel is discharging.
    try_batch(&mut ingest, send("mode-chg", 1..11, 1.45, 1.0))
        .await
        .unwrap();
    try_batch(&mut ingest, send("mode-dis", 1..11, 1.30, 1.0))
        .await
        .unwrap();
    try_batch(&mut ingest, send("mode-h2", 1..11, 1.80, 1.0))
        .await
        .unwrap();
    let mut history = HistoryServiceClient::new(ch.clone());
    let mode_of = |r: &pb::StoredReading| r.derived.as_ref().unwrap().operating_mode;
    for (channel, want) in [
        ("mode-chg", pb::OperatingMode::Charge),
        ("mode-dis", pb::OperatingMode::Discharge),
        ("mode-h2", pb::OperatingMode::Electrolysis),
    ] {
        let rows = stored_readings(&mut history, channel).await;
        assert!(rows.iter().all(|r| mode_of(r) == want as i32), "{channel}");
    }
    // Under load with no known resistance: SOC unknown, not guessed.
    let rows = stored_readings(&mut history, "mode-chg").await;
    assert!(
        rows.iter()
            .all(|r| r.derived.as_ref().unwrap().soc_fused.is_none())
    );

    ChannelServiceClient::new(ch.clone())
        .set_channel_soc(pb::SetChannelSocRequest {
            channel_id: "mode-chg".into(),
            soc: 0.40,
            set_by: "R. Okafor".into(),
            note: "titrated".into(),
        })
        .await
        .unwrap();
    server.stop().await;
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    // 100 s more at 1 A into 2 Ah: +0.0139 SOC (trapezoid, charge positive).
    try_batch(&mut ingest, send("mode-chg", 11..111, 1.45, 1.0))
        .await
        .unwrap();
    let rows = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "mode-chg").await;
    let last = rows.last().unwrap().derived.clone().unwrap();
    let want = 0.40 + 100.0 / 3600.0 / 2.0;
    assert!((last.soc_fused.unwrap() - want).abs() < 1e-6, "{last:?}");
    assert!((last.soc_counted_unclamped.unwrap() - want).abs() < 1e-6);
    let refused = ChannelServiceClient::new(ch.clone())
        .set_channel_soc(pb::SetChannelSocRequest {
            channel_id: "mode-chg".into(),
            soc: 1.5,
            set_by: "R. Okafor".into(),
            note: String::new(),
        })
        .await
        .unwrap_err();
    assert!(refused.message().contains("soc = 1.5"), "{refused:?}");
    server.stop().await;
}

/// A channel whose chemistry came from the config: a restart without that
/// chemistry must refuse to start and say which channel and why, not call
/// the database corrupt.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_stored_channel_whose_chemistry_is_gone_is_named_at_start() {
    let (_dir, db) = temp_db();
    let daniell = gibbsline::electrochem::builtin::builtin_files()
        .find(|(id, _)| *id == "daniell")
        .map(|(_, text)| text.replace("id = \"daniell\"", "id = \"lab-zinc-copper\""))
        .unwrap();
    let mut config = config_for(&db);
    config.chemistry =
        gibbsline::electrochem::chemistry::read_chemistry_specs("lab.toml", &daniell).unwrap();
    let server = Server::start_with(config, "127.0.0.1:0").await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("zc-1", "lab-zinc-copper")).await;
    server.stop().await;

    let refused = refusal_at_start(&db).await;
    assert!(
        refused.contains("channel zc-1")
            && refused.contains("lab-zinc-copper")
            && !refused.contains("corrupt"),
        "{refused}"
    );
}

/// Why a server on `db` refuses to start; it must refuse within 10 s,
/// not serve.
async fn refusal_at_start(db: &Path) -> String {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    tokio::time::timeout(
        Duration::from_secs(10),
        gibbsline::app::run(
            config_for(db),
            gibbsline::app::Listeners::grpc_only(listener),
            std::future::pending(),
        ),
    )
    .await
    .expect("the server must refuse at once, not serve")
    .unwrap_err()
    .to_string()
}

/// A PostgreSQL URL whose port nobody listens on is reported as such,
/// with the server's address, not with advice about SQLite directories.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_refused_postgres_port_is_named_as_a_connection_failure() {
    let port = crate::crash::free_addr();
    let url = format!("postgres://gibbsline@{port}/test");
    let location = gibbsline::store::Location::parse(&url).unwrap();
    let opened =
        gibbsline::store::Store::open_location(&location, gibbsline::store::Durability::Normal)
            .await;
    let Err(e) = opened else {
        panic!("opened a store where nothing listens");
    };
    let e = e.to_string();
    assert!(
        e.contains(&port) && e.contains("cannot connect within 5 s"),
        "{e}"
    );
    assert!(e.contains("is PostgreSQL running there"), "{e}");
    assert!(!e.contains("directory"), "{e}");
}
