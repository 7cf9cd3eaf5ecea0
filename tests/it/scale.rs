//! Several servers on one PostgreSQL database (run with
//! `GIBBSLINE_TEST_ENGINE=postgres`; `.ci/test` does): owners SIGKILLed
//! at random while rigs stream, and an owner stalled (SIGSTOP) past its
//! lease. Every acknowledged reading is stored exactly once, no alert is
//! raised twice, the estimator ends where one server alone would, and a
//! stalled owner writes nothing after losing its lease.

use crate::crash::{connect, free_addr};
use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use gibbsline::sim::Rng;
use std::collections::{HashMap, HashSet};
use std::path::Path;
use std::process::{Child, Command};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering::SeqCst};
use std::time::{Duration, Instant};
use tokio_stream::StreamExt;

const BATCH: u64 = 100;

/// A reading of the shared scenario: charging at 2 A, one reading a
/// millisecond, every 997th above the Daniell cell's upper limit (alerts
/// raised and cleared); `volts_offset` tells two writers' copies apart.
fn scenario_reading(seq: u64, t0: i64, volts_offset: f64) -> pb::Reading {
    let volts = if seq.is_multiple_of(997) { 1.36 } else { 1.10 } + volts_offset;
    reading(seq, t0 + seq as i64 * 1_000_000, volts, Some(2.0))
}

fn batch_of(
    id: &str,
    batch_id: u64,
    seqs: std::ops::Range<u64>,
    t0: i64,
    offset: f64,
) -> pb::StreamReadingsRequest {
    pb::StreamReadingsRequest {
        batch: Some(pb::ReadingBatch {
            channel_id: id.into(),
            batch_id,
            readings: seqs.map(|s| scenario_reading(s, t0, offset)).collect(),
            historical: false,
        }),
    }
}

/// A server on `db` at `addr`, its log appended to
/// `target/tmp/scale-<port>.log` (read when a test fails).
fn spawn_instance(db: &Path, addr: &str) -> Child {
    let dir = Path::new(env!("CARGO_TARGET_TMPDIR"));
    let port = addr.rsplit(':').next().unwrap();
    let log = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(dir.join(format!("scale-{port}.log")))
        .unwrap();
    Command::new(env!("CARGO_BIN_EXE_gibbsline"))
        .args([
            "serve",
            "--listen",
            addr,
            "--durability",
            "full",
            "--http-listen",
            "off",
            "--db",
        ])
        .arg(db)
        .env("RUST_LOG", "info")
        .stdout(log)
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap()
}

fn signal(child: &Child, sig: &str) {
    Command::new("kill")
        .arg(sig)
        .arg(child.id().to_string())
        .status()
        .unwrap();
}

/// Servers killed when the test ends, passed or not (a failed test must
/// not leave servers holding the database's connections).
struct Instances(Vec<Child>);

impl Drop for Instances {
    fn drop(&mut self) {
        for s in &mut self.0 {
            let _ = s.kill();
            let _ = s.wait();
        }
    }
}

/// A channel to `addr` that gives up quickly on a dead or frozen server.
async fn quick_channel(addr: &str) -> Option<tonic::transport::Channel> {
    tonic::transport::Endpoint::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect_timeout(Duration::from_millis(500))
        .timeout(Duration::from_secs(5))
        .connect()
        .await
        .ok()
}

/// What one rig saw.
#[derive(Default)]
struct RigLog {
    acked: u64,
    /// Highest seq sent (stored perhaps, acknowledged or not).
    sent: u64,
    /// Longest time without an ack while the rig wanted to send, s.
    longest_gap_s: f64,
    /// Times the rig moved to another server.
    moves: u64,
}

/// Shared between a rig and the test: the server it streams to now, and
/// the end (once `done`, the rig finishes what it has sent and stops).
struct RigControl {
    current: AtomicUsize,
    done: AtomicBool,
    target: AtomicU64,
}

/// One rig: streams its channel to the server it is on; on any failure
/// moves to the next (or to the owner a refusal names), asks the resume
/// point and goes on from there.
async fn rig(id: &'static str, addrs: Arc<Vec<String>>, ctl: Arc<RigControl>, t0: i64) -> RigLog {
    let mut log = RigLog::default();
    let mut last_ack = Instant::now();
    let mut idx = ctl.current.load(SeqCst);
    loop {
        if ctl.done.load(SeqCst) {
            ctl.target.fetch_max(log.sent, SeqCst);
            if log.acked >= ctl.target.load(SeqCst) {
                return log;
            }
        }
        ctl.current.store(idx % addrs.len(), SeqCst);
        let streamed = stream_once(
            id,
            &addrs[idx % addrs.len()],
            &ctl,
            t0,
            &mut log,
            &mut last_ack,
        )
        .await;
        if let Err(owner) = streamed {
            idx = owner
                .and_then(|o| addrs.iter().position(|a| *a == o))
                .unwrap_or(idx + 1);
            log.moves += 1;
            tokio::time::sleep(Duration::from_millis(150)).await;
        }
    }
}

/// Resume point, then batches until the connection fails (`Err`, with
/// the owner a refusal named) or the rig is done (`Ok`).
async fn stream_once(
    id: &'static str,
    addr: &str,
    ctl: &RigControl,
    t0: i64,
    log: &mut RigLog,
    last_ack: &mut Instant,
) -> Result<(), Option<String>> {
    let owner_of = |s: &tonic::Status| {
        s.metadata()
            .get("gibbsline-owner")
            .and_then(|v| v.to_str().ok())
            .map(str::to_string)
    };
    let ch = quick_channel(addr).await.ok_or(None)?;
    let mut ingest = IngestServiceClient::new(ch);
    let resume = ingest
        .get_resume_point(pb::GetResumePointRequest {
            channel_id: id.into(),
        })
        .await
        .map_err(|s| owner_of(&s))?
        .into_inner()
        .last_stored_seq;
    assert!(
        resume >= log.acked,
        "{id}: acked {} but the store has only {resume}",
        log.acked
    );
    let mut next = resume + 1;
    let (tx, rx) = tokio::sync::mpsc::channel(2);
    let mut acks = ingest
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .map_err(|s| owner_of(&s))?
        .into_inner();
    let mut batch_id = 0;
    loop {
        if ctl.done.load(SeqCst) {
            ctl.target.fetch_max(log.sent.max(next - 1), SeqCst);
            if log.acked >= ctl.target.load(SeqCst) {
                return Ok(());
            }
        }
        let end = if ctl.done.load(SeqCst) {
            ctl.target.load(SeqCst) + 1
        } else {
            next + BATCH
        };
        log.sent = log.sent.max(end - 1);
        tx.send(batch_of(id, batch_id, next..end, t0, 0.0))
            .await
            .map_err(|_| None)?;
        batch_id += 1;
        let ack = match tokio::time::timeout(Duration::from_secs(5), acks.next()).await {
            Ok(Some(Ok(m))) => m.ack.ok_or(None)?,
            Ok(Some(Err(s))) => return Err(owner_of(&s)),
            _ => return Err(None),
        };
        assert_eq!(
            u64::from(ack.accepted + ack.duplicates),
            end - next,
            "{id}: {ack:?}"
        );
        log.longest_gap_s = log.longest_gap_s.max(last_ack.elapsed().as_secs_f64());
        *last_ack = Instant::now();
        log.acked = log.acked.max(end - 1);
        next = end;
        tokio::time::sleep(Duration::from_millis(80)).await;
    }
}

/// (seq, volts) of every stored reading of `id`, in seq order, as one
/// server answers (all pages, through the harness's reader).
async fn stored_seqs(addr: &str, id: &str) -> Vec<(u64, f64)> {
    let mut history = HistoryServiceClient::new(connect(addr).await);
    let mut out: Vec<(u64, f64)> = stored_readings(&mut history, id)
        .await
        .iter()
        .map(|r| (r.seq, r.volts))
        .collect();
    out.sort_by_key(|r| r.0);
    out
}

/// (kind, raised seq) of every alert of `id`, as one server lists them.
async fn alerts_of(addr: &str, id: &str) -> Vec<(i32, u64)> {
    let mut alerts = AlertServiceClient::new(connect(addr).await);
    let list = alerts
        .list_alerts(pb::ListAlertsRequest {
            channel_id: id.into(),
            limit: 10_000,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner()
        .alerts;
    let mut out: Vec<(i32, u64)> = list.iter().map(|a| (a.kind, a.raised_seq)).collect();
    out.sort();
    out
}

/// (charge Ah, energy Wh, counted SOC, reaction extent) of a channel.
async fn counters(addr: &str, id: &str) -> (f64, f64, Option<f64>, f64) {
    let mut history = HistoryServiceClient::new(connect(addr).await);
    let s = history
        .get_channel_state(pb::GetChannelStateRequest {
            channel_id: id.into(),
        })
        .await
        .unwrap()
        .into_inner();
    let derived = s.latest.unwrap().derived.unwrap();
    let est = s.estimator.unwrap();
    (
        derived.charge_ah,
        derived.energy_wh,
        est.soc_counted,
        est.reaction_extent_mol,
    )
}

/// The same readings through one server on its own SQLite file.
async fn single_server_run(ids: &[&str], targets: &HashMap<&str, u64>, t0: i64) -> Server {
    let (dir, db) = {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("single.db");
        (dir, db)
    };
    let server = Server::start(&db).await;
    std::mem::forget(dir);
    let ch = server.channel().await;
    for id in ids {
        put_channel(&ch, channel_def(id, "daniell")).await;
        let batches: Vec<pb::ReadingBatch> = (0..)
            .map(|b| b * BATCH + 1)
            .take_while(|from| *from <= targets[id])
            .enumerate()
            .map(|(i, from)| {
                let end = (from + BATCH).min(targets[id] + 1);
                batch_of(id, i as u64, from..end, t0, 0.0).batch.unwrap()
            })
            .collect();
        send_batches(&mut IngestServiceClient::new(ch.clone()), batches).await;
    }
    server
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn owners_killed_at_random_lose_and_double_nothing() {
    if !on_postgres() {
        eprintln!("scale tests run with GIBBSLINE_TEST_ENGINE=postgres");
        return;
    }
    let (_dir, db) = temp_db();
    let addrs: Arc<Vec<String>> = Arc::new((0..3).map(|_| free_addr()).collect());
    let mut servers = Instances(addrs.iter().map(|a| spawn_instance(&db, a)).collect());
    let ch = connect(&addrs[0]).await;
    let ids = ["scale-a", "scale-b", "scale-c"];
    for id in ids {
        put_channel(&ch, channel_def(id, "daniell")).await;
    }
    let t0 = now_ns() - 86_400 * 1_000_000_000;
    let controls: Vec<Arc<RigControl>> = (0..ids.len())
        .map(|i| {
            Arc::new(RigControl {
                current: AtomicUsize::new(i),
                done: AtomicBool::new(false),
                target: AtomicU64::new(0),
            })
        })
        .collect();
    let rigs: Vec<_> = ids
        .iter()
        .zip(&controls)
        .map(|(id, ctl)| tokio::spawn(rig(id, addrs.clone(), ctl.clone(), t0)))
        .collect();

    // Ten times: the server a rig streams to now (so the owner of a
    // streaming channel) is SIGKILLed, and comes back after 0–4 s.
    let mut rng = Rng::new(20261203);
    for _ in 0..10 {
        tokio::time::sleep(Duration::from_millis(1500 + rng.next_u64() % 2000)).await;
        let victim = controls[rng.next_u64() as usize % controls.len()]
            .current
            .load(SeqCst);
        servers.0[victim].kill().unwrap();
        servers.0[victim].wait().unwrap();
        tokio::time::sleep(Duration::from_millis(rng.next_u64() % 4000)).await;
        servers.0[victim] = spawn_instance(&db, &addrs[victim]);
    }
    for ctl in &controls {
        ctl.done.store(true, SeqCst);
    }
    let mut targets = HashMap::new();
    let mut longest_gap_s: f64 = 0.0;
    for ((id, rig), ctl) in ids.iter().zip(rigs).zip(&controls) {
        let log = tokio::time::timeout(Duration::from_secs(120), rig)
            .await
            .unwrap()
            .unwrap();
        let target = ctl.target.load(SeqCst);
        assert_eq!(log.acked, target, "{id}");
        assert!(log.moves > 0, "{id} never moved");
        longest_gap_s = longest_gap_s.max(log.longest_gap_s);
        eprintln!(
            "{id}: {target} readings acknowledged, {} moves, longest gap {:.1} s",
            log.moves, log.longest_gap_s
        );
        targets.insert(*id, target);
    }
    // A server that took a channel over within the lease (8 s) plus a
    // rig's reconnects and the victim's 0–4 s away.
    assert!(
        longest_gap_s < 20.0,
        "longest gap without acks {longest_gap_s:.1} s"
    );

    // Any server answers for every channel: each reading once, nothing
    // missing; each alert raised once; the counters one server alone
    // reaches with the same readings.
    tokio::time::sleep(Duration::from_secs(3)).await;
    let single = single_server_run(&ids, &targets, t0).await;
    let single_addr = single.addr.to_string();
    for (i, id) in ids.iter().enumerate() {
        let addr = &addrs[i % addrs.len()];
        let seqs: Vec<u64> = stored_seqs(addr, id).await.iter().map(|r| r.0).collect();
        let doubled = seqs.windows(2).filter(|w| w[0] == w[1]).count();
        let distinct: HashSet<u64> = seqs.iter().copied().collect();
        let missing: Vec<u64> = (1..=targets[id])
            .filter(|s| !distinct.contains(s))
            .take(10)
            .collect();
        let extra: Vec<u64> = distinct
            .iter()
            .copied()
            .filter(|s| *s > targets[id])
            .take(10)
            .collect();
        assert!(
            doubled == 0 && missing.is_empty() && extra.is_empty(),
            "{id}: {} stored, {doubled} doubled, missing {missing:?}, beyond the last sent {extra:?}",
            seqs.len()
        );
        let alerts = alerts_of(addr, id).await;
        assert!(
            !alerts.is_empty(),
            "{id}: the over-limit readings raise alerts"
        );
        let unique: HashSet<_> = alerts.iter().collect();
        assert_eq!(
            unique.len(),
            alerts.len(),
            "{id}: an alert raised twice: {alerts:?}"
        );
        assert_eq!(alerts, alerts_of(&single_addr, id).await, "{id}: alerts");
        let cluster = counters(addr, id).await;
        let alone = counters(&single_addr, id).await;
        assert_eq!(cluster, alone, "{id}: counters");
    }
    drop(servers);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_stalled_owner_writes_nothing_after_losing_its_lease() {
    if !on_postgres() {
        eprintln!("scale tests run with GIBBSLINE_TEST_ENGINE=postgres");
        return;
    }
    let (_dir, db) = temp_db();
    let (a_addr, b_addr) = (free_addr(), free_addr());
    let servers = Instances(vec![
        spawn_instance(&db, &a_addr),
        spawn_instance(&db, &b_addr),
    ]);
    let a = &servers.0[0];
    let id = "stall-a";
    let a_ch = connect(&a_addr).await;
    connect(&b_addr).await;
    put_channel(&a_ch, channel_def(id, "daniell")).await;
    let t0 = now_ns() - 86_400 * 1_000_000_000;
    // A owns the channel: 100 readings acknowledged.
    let mut a_ingest = IngestServiceClient::new(a_ch.clone());
    a_ingest
        .get_resume_point(pb::GetResumePointRequest {
            channel_id: id.into(),
        })
        .await
        .unwrap();
    let (tx, rx) = tokio::sync::mpsc::channel(4);
    let mut a_acks = a_ingest
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .unwrap()
        .into_inner();
    tx.send(batch_of(id, 0, 1..101, t0, 0.0)).await.unwrap();
    assert_eq!(
        a_acks.next().await.unwrap().unwrap().ack.unwrap().accepted,
        100
    );

    // A freezes with a batch on its way to it (its copy 0.05 V higher).
    signal(a, "-STOP");
    tx.send(batch_of(id, 1, 101..201, t0, 0.05)).await.unwrap();
    let stalled = Instant::now();
    // B refuses, naming A, until A's lease runs out; then takes over.
    let mut b_ingest = IngestServiceClient::new(connect(&b_addr).await);
    let mut named_a = false;
    let resume = loop {
        match b_ingest
            .get_resume_point(pb::GetResumePointRequest {
                channel_id: id.into(),
            })
            .await
        {
            Ok(p) => break p.into_inner().last_stored_seq,
            Err(s) => {
                // Refused naming A while its lease runs; a lease row A's
                // frozen session still locks is "busy", retried alike.
                assert_eq!(s.code(), tonic::Code::Unavailable, "{s:?}");
                named_a |= s.message().contains(&a_addr);
                assert!(
                    stalled.elapsed() < Duration::from_secs(15),
                    "B did not take over: {s:?}"
                );
                tokio::time::sleep(Duration::from_millis(200)).await;
            }
        }
    };
    assert!(named_a, "B never named the owner");
    let takeover = stalled.elapsed();
    eprintln!(
        "B took the channel {:.1} s after A froze",
        takeover.as_secs_f64()
    );
    assert_eq!(resume, 100);
    let acks = send_batches(
        &mut b_ingest,
        vec![batch_of(id, 0, 101..301, t0, 0.0).batch.unwrap()],
    )
    .await;
    assert_eq!(acks[0].accepted, 200);

    // A wakes with the old batch in hand: refused, nothing written.
    signal(a, "-CONT");
    let answer = tokio::time::timeout(Duration::from_secs(20), a_acks.next())
        .await
        .unwrap();
    match answer {
        Some(Ok(m)) => panic!("the stalled owner answered {m:?}"),
        Some(Err(s)) => assert_eq!(s.code(), tonic::Code::Unavailable, "{s:?}"),
        None => {}
    }
    let stored = stored_seqs(&b_addr, id).await;
    assert_eq!(
        stored.iter().map(|r| r.0).collect::<Vec<_>>(),
        (1..=300).collect::<Vec<_>>()
    );
    for (seq, volts) in &stored {
        let want = scenario_reading(*seq, t0, 0.0).volts;
        assert_eq!(*volts, want, "seq {seq} was written by the stalled owner");
    }
    drop(servers);
}

#[tokio::test]
async fn a_write_under_a_moved_lease_is_fenced_out() {
    use gibbsline::store::{Location, Store, lease};
    if !on_postgres() {
        eprintln!("scale tests run with GIBBSLINE_TEST_ENGINE=postgres");
        return;
    }
    let (_dir, db) = temp_db();
    let location = Location::parse(&db.display().to_string()).unwrap();
    let store = Store::open_location(&location, gibbsline::store::Durability::Full)
        .await
        .unwrap();
    let name = lease::channel_name(1);
    let claim = |owner: &'static str, addr: &'static str| {
        let pool = store.reader.clone();
        let name = name.clone();
        async move {
            lease::claim(&pool, &name, owner, addr, "host_a", 8_000)
                .await
                .unwrap()
        }
    };
    let lease::Claim::Held { token: first } = claim("host_a-1-a", "10.0.0.1:1").await else {
        panic!("a free lease is granted");
    };
    // Another server is refused while the lease runs, naming the owner.
    match claim("host_b-2-b", "10.0.0.2:1").await {
        lease::Claim::Busy { owner_addr, .. } => assert_eq!(owner_addr, "10.0.0.1:1"),
        other => panic!("{other:?}"),
    }
    // The owner stalls past its lease; the other takes over.
    sqlx::query("UPDATE leases SET expires_ms = 0")
        .execute(&store.writer)
        .await
        .unwrap();
    let lease::Claim::Held { token: second } = claim("host_b-2-b", "10.0.0.2:1").await else {
        panic!("an expired lease is granted");
    };
    assert_eq!(second, first + 1);
    // The stalled owner's write is refused in its own transaction; the
    // new owner's passes.
    let held = vec![(name.clone(), first)];
    let fenced = store
        .write(async |tx| lease::fenced_out(tx, "host_a-1-a", &held).await)
        .await
        .unwrap();
    assert_eq!(fenced, vec![name.clone()]);
    let held = vec![(name.clone(), second)];
    let fenced = store
        .write(async |tx| lease::fenced_out(tx, "host_b-2-b", &held).await)
        .await
        .unwrap();
    assert!(fenced.is_empty());
    // A server started again at the same address on the same machine
    // takes its predecessor's lease at once (that one is gone).
    let lease::Claim::Held { token: third } = lease::claim(
        &store.reader,
        &name,
        "host_b-3-c",
        "10.0.0.2:1",
        "host_b",
        8_000,
    )
    .await
    .unwrap() else {
        panic!("a predecessor's lease is taken over");
    };
    assert_eq!(third, second + 1);
    store.close().await;
}

#[tokio::test]
async fn both_schemas_have_the_same_tables_and_columns() {
    use gibbsline::store::{Durability, Location, Store};
    use sqlx::Row;
    if !on_postgres() {
        eprintln!("scale tests run with GIBBSLINE_TEST_ENGINE=postgres");
        return;
    }
    let (dir, pg) = temp_db();
    let sqlite = Store::open(&dir.path().join("schema.db"), Durability::Normal)
        .await
        .unwrap();
    let pg = Store::open_location(
        &Location::parse(&pg.display().to_string()).unwrap(),
        Durability::Normal,
    )
    .await
    .unwrap();
    let columns_of = |rows: Vec<sqlx::any::AnyRow>| -> Vec<(String, String)> {
        let mut v: Vec<(String, String)> = rows
            .iter()
            .map(|r| (r.get::<String, _>("t"), r.get::<String, _>("c")))
            .filter(|(t, _)| !t.starts_with("_sqlx") && t != "leases")
            .collect();
        v.sort();
        v
    };
    let on_sqlite = sqlx::query(
        "SELECT m.name AS t, p.name AS c FROM sqlite_master m, pragma_table_info(m.name) p \
         WHERE m.type = 'table' AND m.name NOT LIKE 'sqlite_%'",
    )
    .fetch_all(&sqlite.reader)
    .await
    .unwrap();
    let on_pg = sqlx::query(
        "SELECT CAST(table_name AS TEXT) AS t, CAST(column_name AS TEXT) AS c \
         FROM information_schema.columns WHERE table_schema = 'public'",
    )
    .fetch_all(&pg.reader)
    .await
    .unwrap();
    let (on_sqlite, on_pg) = (columns_of(on_sqlite), columns_of(on_pg));
    assert!(on_sqlite.len() > 50, "{on_sqlite:?}");
    assert_eq!(on_sqlite, on_pg);
    sqlite.close().await;
    pg.close().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_subscriber_on_any_server_hears_every_servers_alerts() {
    if !on_postgres() {
        eprintln!("scale tests run with GIBBSLINE_TEST_ENGINE=postgres");
        return;
    }
    let (_dir, db) = temp_db();
    let (a_addr, b_addr) = (free_addr(), free_addr());
    let _servers = Instances(vec![
        spawn_instance(&db, &a_addr),
        spawn_instance(&db, &b_addr),
    ]);
    let a_ch = connect(&a_addr).await;
    put_channel(&a_ch, channel_def("fan-a", "daniell")).await;
    // A subscriber on B, from the start.
    let mut alerts = AlertServiceClient::new(connect(&b_addr).await);
    let mut events = alerts
        .watch_alerts(pb::WatchAlertsRequest::default())
        .await
        .unwrap()
        .into_inner();
    // Readings with one over the upper limit (seq 997) go to A.
    let t0 = now_ns() - 86_400 * 1_000_000_000;
    let batches = vec![batch_of("fan-a", 0, 1..1001, t0, 0.0).batch.unwrap()];
    let acks = send_batches(&mut IngestServiceClient::new(a_ch), batches).await;
    assert_eq!(acks[0].accepted, 1000);
    let raised = tokio::time::timeout(Duration::from_secs(10), async {
        while let Some(m) = events.next().await {
            let m = m.unwrap();
            if let Some(a) = m.alert
                && m.event == pb::AlertEventKind::Raised as i32
            {
                return (a, m.resume_after_event_id);
            }
        }
        panic!("the subscriber's stream ended");
    })
    .await
    .expect("B's subscriber heard A's alert within 10 s");
    assert_eq!(raised.0.channel_id, "fan-a");
    assert_eq!(raised.0.raised_seq, 997);
    // Replay by event id on B gives the same event again.
    let mut replay = alerts
        .watch_alerts(pb::WatchAlertsRequest {
            after_event_id: raised.1 - 1,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    let first = replay.next().await.unwrap().unwrap();
    assert_eq!(first.resume_after_event_id, raised.1);
    assert_eq!(first.alert.unwrap().raised_seq, 997);

    // A channel redefined on B (A owns it) is picked up by A.
    let redefined = pb::Channel {
        capacity_ah: 5.0,
        ..channel_def("fan-a", "daniell")
    };
    put_channel(&connect(&b_addr).await, redefined).await;
    let mut history = HistoryServiceClient::new(connect(&a_addr).await);
    let started = Instant::now();
    loop {
        let state = history
            .get_channel_state(pb::GetChannelStateRequest {
                channel_id: "fan-a".into(),
            })
            .await
            .unwrap()
            .into_inner();
        if state.channel.unwrap().capacity_ah == 5.0 {
            break;
        }
        assert!(
            started.elapsed() < Duration::from_secs(8),
            "the owner kept the old definition"
        );
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
}
