//! `bench scale`: ingest through one server on SQLite, one on PostgreSQL
//! and two on one PostgreSQL database, in one run with the same load; then
//! the failover gap: two servers on PostgreSQL with paced rigs, the owner
//! of half the channels SIGKILLed, its rigs moving to the other server.
//! Every server is a process of this binary (`serve`), the load comes
//! from this process.

use super::bench::{AlertClock, Load, define_channels, percentile, tempfile_dir, test_voltages};
use super::client;
use clap::Args;
use gibbsline::pb;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};
use tokio_stream::StreamExt;

#[derive(Debug, Args)]
pub(crate) struct BenchScaleArgs {
    /// A PostgreSQL server where the bench may create (and drops) its own
    /// databases.
    #[arg(long, default_value = "postgres://postgres@127.0.0.1:5432/postgres")]
    pub pg: String,
    /// Channels streamed at once.
    #[arg(long, default_value_t = 100)]
    pub channels: u32,
    /// Readings per setup, over all channels.
    #[arg(long, default_value_t = 1_000_000)]
    pub readings: u64,
    /// Readings per batch.
    #[arg(long, default_value_t = 1000)]
    pub batch: u32,
    /// Offered rate of the throughput setups, readings/s over all
    /// channels; 0 = as fast as they go.
    #[arg(long, default_value_t = 0.0)]
    pub rate: f64,
    /// full, normal or off, for every setup.
    #[arg(long, default_value = "full")]
    pub durability: String,
    /// The failover part's paced load, readings/s over all channels.
    #[arg(long, default_value_t = 20_000.0)]
    pub failover_rate: f64,
    /// Seconds the failover part streams before the kill (and after it,
    /// twice that).
    #[arg(long, default_value_t = 6)]
    pub failover_warmup_s: u64,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, serde::Serialize)]
struct Throughput {
    setup: &'static str,
    servers: usize,
    readings: u64,
    seconds: f64,
    readings_per_s: f64,
    ack_p50_ms: f64,
    ack_p99_ms: f64,
}

#[derive(Debug, serde::Serialize)]
struct Failover {
    channels_moved: usize,
    /// Seconds from the kill to each moved channel's first ack on the
    /// other server: median and worst.
    gap_p50_s: f64,
    gap_max_s: f64,
    /// Readings acknowledged before and after the kill, all channels.
    acked_before: u64,
    acked_after: u64,
}

/// A `serve` process of this binary; killed when dropped.
struct Proc(Child);

impl Drop for Proc {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

fn free_addr() -> anyhow::Result<String> {
    Ok(std::net::TcpListener::bind("127.0.0.1:0")?
        .local_addr()?
        .to_string())
}

/// A server on `db` (a path or a URL) with room for `channels` streams
/// from this one client; ready when it answers.
async fn spawn_server(db: &str, durability: &str, channels: u32) -> anyhow::Result<(Proc, String)> {
    let addr = free_addr()?;
    let dir = tempfile_dir()?;
    let config = dir.join("bench.toml");
    std::fs::write(
        &config,
        format!("[limits]\nmax_streams_per_client = {}\n", channels.max(64)),
    )?;
    let child = Command::new(std::env::current_exe()?)
        .args([
            "serve",
            "--http-listen",
            "off",
            "--listen",
            &addr,
            "--durability",
            durability,
        ])
        .arg("--config")
        .arg(&config)
        .args(["--db", db])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()?;
    let proc = Proc(child);
    for _ in 0..400 {
        if let Ok(conn) = client::connect(&addr).await {
            let mut health = tonic_health::pb::health_client::HealthClient::new(conn);
            if health
                .check(tonic_health::pb::HealthCheckRequest::default())
                .await
                .is_ok()
            {
                return Ok((proc, addr));
            }
        }
        tokio::time::sleep(Duration::from_millis(25)).await;
    }
    anyhow::bail!("the server on {db} did not come up")
}

/// A fresh database on the PostgreSQL server `admin`; its URL.
async fn fresh_database(admin: &str, name: &str) -> anyhow::Result<String> {
    use sqlx::Connection;
    let mut conn = sqlx::PgConnection::connect(admin).await?;
    sqlx::query(sqlx::AssertSqlSafe(format!(
        "DROP DATABASE IF EXISTS {name} WITH (FORCE)"
    )))
    .execute(&mut conn)
    .await?;
    sqlx::query(sqlx::AssertSqlSafe(format!("CREATE DATABASE {name}")))
        .execute(&mut conn)
        .await?;
    let (base, _) = admin
        .rsplit_once('/')
        .ok_or_else(|| anyhow::anyhow!("--pg {admin}: expected postgres://…/database"))?;
    Ok(format!("{base}/{name}"))
}

async fn drop_database(admin: &str, name: &str) {
    use sqlx::Connection;
    if let Ok(mut conn) = sqlx::PgConnection::connect(admin).await {
        let _ = sqlx::query(sqlx::AssertSqlSafe(format!(
            "DROP DATABASE IF EXISTS {name} WITH (FORCE)"
        )))
        .execute(&mut conn)
        .await;
    }
}

pub(crate) async fn run(args: &BenchScaleArgs) -> anyhow::Result<()> {
    if args.channels < 2 || args.batch == 0 || args.readings == 0 {
        return Err(super::UsageError(
            "--channels must be at least 2, --batch and --readings at least 1".into(),
        )
        .into());
    }
    let tag = std::process::id();
    let sqlite_dir = tempfile_dir()?;
    let sqlite_db = sqlite_dir.join("scale.db").display().to_string();
    let mut rows = vec![throughput("sqlite", &[&sqlite_db], args).await?];
    let _ = std::fs::remove_dir_all(&sqlite_dir);
    for (setup, servers) in [("postgresql", 1), ("postgresql", 2)] {
        let name = format!("gibbsline_bench_{tag}_{servers}");
        let url = fresh_database(&args.pg, &name).await?;
        let dbs = vec![url.as_str(); servers];
        let row = throughput(setup, &dbs, args).await;
        drop_database(&args.pg, &name).await;
        rows.push(row?);
    }
    let name = format!("gibbsline_bench_{tag}_failover");
    let url = fresh_database(&args.pg, &name).await?;
    let failover = failover(&url, args).await;
    drop_database(&args.pg, &name).await;
    report(&rows, &failover?, args.json)
}

/// One setup: servers on `dbs`, channels dealt to them in turn, every
/// channel streamed flat out.
async fn throughput(
    setup: &'static str,
    dbs: &[&str],
    args: &BenchScaleArgs,
) -> anyhow::Result<Throughput> {
    let mut procs = Vec::new();
    let mut conns = Vec::new();
    for db in dbs {
        let (proc, addr) = spawn_server(db, &args.durability, args.channels).await?;
        procs.push(proc);
        conns.push(client::connect(&addr).await?);
    }
    let ids = define_channels(&conns[0], args.channels, "daniell").await?;
    let (normal_volts, over_volts) = test_voltages("daniell");
    let per_channel = args.readings / u64::from(args.channels);
    let load = Load {
        per_channel,
        batch: u64::from(args.batch),
        alert_every: 0,
        t0: client::now_ns() - (per_channel as i64 + 10) * 1_000_000,
        step_ns: 1_000_000,
        normal_volts,
        over_volts,
        batch_interval: (args.rate > 0.0).then(|| {
            Duration::from_secs_f64(f64::from(args.batch) * f64::from(args.channels) / args.rate)
        }),
        ack_log: None,
    };
    let clock = AlertClock::default();
    let mut shares: Vec<Vec<String>> = vec![Vec::new(); conns.len()];
    for (i, id) in ids.into_iter().enumerate() {
        shares[i % conns.len()].push(id);
    }
    let start = Instant::now();
    let drives: Vec<_> = conns
        .iter()
        .zip(shares)
        .map(|(conn, ids)| {
            let (load, conn, clock) = (load.clone(), conn.clone(), clock.clone());
            tokio::spawn(async move { load.drive(&conn, ids, &clock).await })
        })
        .collect();
    let mut results = Vec::new();
    for d in drives {
        results.push(d.await?);
    }
    let seconds = start.elapsed().as_secs_f64();
    let mut accepted = 0;
    let mut latencies = Vec::new();
    for r in results {
        let (a, l) = r?;
        accepted += a;
        latencies.extend(l);
    }
    latencies.sort_by(f64::total_cmp);
    drop(procs);
    Ok(Throughput {
        setup,
        servers: dbs.len(),
        readings: accepted,
        seconds,
        readings_per_s: accepted as f64 / seconds,
        ack_p50_ms: percentile(&latencies, 0.5),
        ack_p99_ms: percentile(&latencies, 0.99),
    })
}

/// Two servers, paced rigs dealt to them, the first SIGKILLed after the
/// warm-up; its rigs move to the second.
async fn failover(url: &str, args: &BenchScaleArgs) -> anyhow::Result<Failover> {
    let (mut a, a_addr) = spawn_server(url, &args.durability, args.channels).await?;
    let (_b, b_addr) = spawn_server(url, &args.durability, args.channels).await?;
    let addrs = Arc::new(vec![a_addr, b_addr]);
    let conn = client::connect(&addrs[0]).await?;
    let ids = define_channels(&conn, args.channels, "daniell").await?;
    let warmup = Duration::from_secs(args.failover_warmup_s);
    let deadline = Instant::now() + warmup * 3;
    let per_batch = ((args.failover_rate / f64::from(args.channels)) * 0.1).max(1.0) as u64;
    let t0 = client::now_ns() - 3_600_000_000_000;
    let rigs: Vec<_> = ids
        .into_iter()
        .enumerate()
        .map(|(i, id)| {
            let rig = Rig {
                id,
                addrs: addrs.clone(),
                first: i % 2,
                per_batch,
                t0,
                acks: Arc::default(),
            };
            let acks = rig.acks.clone();
            (i % 2 == 0, acks, tokio::spawn(rig.run(deadline)))
        })
        .collect();
    tokio::time::sleep(warmup).await;
    a.0.kill()?;
    let killed = Instant::now();
    a.0.wait()?;
    let mut gaps = Vec::new();
    let (mut before, mut after) = (0, 0);
    for (moved, acks, task) in rigs {
        task.await??;
        let acks = acks.lock().expect("poisoned");
        for (at, n) in acks.iter() {
            if *at < killed {
                before += n
            } else {
                after += n
            }
        }
        if moved {
            let first_after = acks.iter().find(|(at, _)| *at > killed);
            gaps.push(first_after.map_or(f64::INFINITY, |(at, _)| {
                at.duration_since(killed).as_secs_f64()
            }));
        }
    }
    gaps.sort_by(f64::total_cmp);
    Ok(Failover {
        channels_moved: gaps.len(),
        gap_p50_s: percentile(&gaps, 0.5),
        gap_max_s: gaps.last().copied().unwrap_or(0.0),
        acked_before: before,
        acked_after: after,
    })
}

/// A rig that follows ownership: on a refusal it goes to the owner named,
/// on a broken connection to the other server, and resumes from the
/// resume point.
struct Rig {
    id: String,
    addrs: Arc<Vec<String>>,
    first: usize,
    per_batch: u64,
    t0: i64,
    /// (arrival, readings acknowledged) per ack.
    acks: Arc<Mutex<Vec<(Instant, u64)>>>,
}

impl Rig {
    async fn run(self, deadline: Instant) -> anyhow::Result<()> {
        let mut at = self.first;
        while Instant::now() < deadline {
            if let Err(owner) = self
                .stream(&self.addrs[at % self.addrs.len()], deadline)
                .await
            {
                at = owner
                    .and_then(|o| self.addrs.iter().position(|a| *a == o))
                    .unwrap_or(at + 1);
                tokio::time::sleep(Duration::from_millis(100)).await;
            }
        }
        Ok(())
    }

    /// Streams batches every 100 ms until the deadline (`Ok`) or a failure
    /// (`Err`, with the owner a refusal named).
    async fn stream(&self, addr: &str, deadline: Instant) -> Result<(), Option<String>> {
        let owner = |s: &tonic::Status| {
            s.metadata()
                .get("gibbsline-owner")
                .and_then(|v| v.to_str().ok())
                .map(str::to_string)
        };
        let conn = client::connect(addr).await.map_err(|_| None)?;
        let mut ingest = IngestServiceClient::new(conn);
        let resume = ingest
            .get_resume_point(pb::GetResumePointRequest {
                channel_id: self.id.clone(),
            })
            .await
            .map_err(|s| owner(&s))?
            .into_inner()
            .last_stored_seq;
        let (tx, rx) = tokio::sync::mpsc::channel(2);
        let mut acks = ingest
            .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
            .await
            .map_err(|s| owner(&s))?
            .into_inner();
        let mut next = resume + 1;
        let mut tick = tokio::time::interval(Duration::from_millis(100));
        while Instant::now() < deadline {
            tick.tick().await;
            let readings = (next..next + self.per_batch)
                .map(|s| pb::Reading {
                    seq: s,
                    time_unix_ns: self.t0 + s as i64 * 1_000_000,
                    volts: 1.1,
                    amps: Some(0.0),
                    temp_c: Some(25.0),
                })
                .collect();
            let batch = pb::ReadingBatch {
                channel_id: self.id.clone(),
                batch_id: next,
                readings,
                historical: false,
            };
            tx.send(pb::StreamReadingsRequest { batch: Some(batch) })
                .await
                .map_err(|_| None)?;
            let ack = match tokio::time::timeout(Duration::from_secs(3), acks.next()).await {
                Ok(Some(Ok(m))) => m.ack.ok_or(None)?,
                Ok(Some(Err(s))) => return Err(owner(&s)),
                _ => return Err(None),
            };
            self.acks
                .lock()
                .expect("poisoned")
                .push((Instant::now(), u64::from(ack.accepted)));
            next += self.per_batch;
        }
        Ok(())
    }
}

fn report(rows: &[Throughput], failover: &Failover, json: bool) -> anyhow::Result<()> {
    if json {
        println!(
            "{}",
            serde_json::json!({ "throughput": rows, "failover": failover })
        );
        return Ok(());
    }
    println!(
        "{:<12} {:>7} {:>10} {:>9} {:>12} {:>10} {:>10}",
        "setup", "servers", "readings", "seconds", "readings/s", "ack p50", "ack p99"
    );
    for r in rows {
        println!(
            "{:<12} {:>7} {:>10} {:>9.2} {:>12.0} {:>8.1}ms {:>8.1}ms",
            r.setup, r.servers, r.readings, r.seconds, r.readings_per_s, r.ack_p50_ms, r.ack_p99_ms
        );
    }
    println!(
        "failover: {} channels moved after a SIGKILL of their owner; seconds from the kill to their first ack on the other server: p50 {:.1}, max {:.1}; readings acked before {}, after {}",
        failover.channels_moved,
        failover.gap_p50_s,
        failover.gap_max_s,
        failover.acked_before,
        failover.acked_after
    );
    Ok(())
}
