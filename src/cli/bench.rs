//! `gibbsline bench ingest`: sustained ingest rate, ack latency and alert
//! latency against a running server (or one started in this process).

use super::client;
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use serde::Serialize;
use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};
use tokio_stream::StreamExt;

#[derive(Debug, clap::Args)]
pub(crate) struct BenchIngestArgs {
    /// Server to load; without it a server is started in this process on a
    /// temporary database (then peak RSS covers both ends).
    #[arg(long)]
    pub connect: Option<String>,
    /// Channels streamed at once.
    #[arg(long, default_value_t = 100)]
    pub channels: u32,
    /// Readings in total, spread over the channels.
    #[arg(long, default_value_t = 1_000_000)]
    pub readings: u64,
    /// Readings per batch.
    #[arg(long, default_value_t = 1000)]
    pub batch: u32,
    /// Offered load in readings/s over all channels; 0 sends as fast as the
    /// server takes them (then ack latency is mostly queueing, by Little's law).
    #[arg(long, default_value_t = 0.0)]
    pub rate: f64,
    /// The chemistry id of the benched channels.
    #[arg(long, default_value = "daniell")]
    pub chemistry: String,
    /// One reading in this many goes over the voltage limit (and the next
    /// comes back), raising and clearing an alert; 0 disables.
    #[arg(long, default_value_t = 10_000)]
    pub alert_every: u64,
    /// Durability of the in-process server (full, normal, off).
    #[arg(long, default_value = "full")]
    pub durability: String,
    /// Also insert as many readings into plain SQLite (one row each, the
    /// same durability) and report the server's rate against it.
    #[arg(long)]
    pub baseline: bool,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Serialize)]
pub(crate) struct BenchReport {
    pub readings: u64,
    pub channels: u32,
    pub batch: u32,
    pub seconds: f64,
    pub readings_per_s: f64,
    pub offered_rate: f64,
    pub ack_p50_ms: f64,
    pub ack_p99_ms: f64,
    pub ack_max_ms: f64,
    pub alerts_seen: usize,
    pub alert_p50_ms: Option<f64>,
    pub alert_p99_ms: Option<f64>,
    pub peak_rss_mib: Option<f64>,
    /// CPU time of this process while the load ran over its wall time:
    /// how many of the machine's cores ingest kept busy (server and client
    /// in one process; not known with `--connect`).
    pub cpu_cores_busy: Option<f64>,
    pub db_bytes_per_reading: Option<f64>,
    /// Plain SQLite on this machine in the same run (`--baseline`).
    pub baseline: Option<super::bench_baseline::BaselineReport>,
    /// The server's readings/s over the baseline's rows/s.
    pub ratio_to_baseline: Option<f64>,
}

pub(crate) fn percentile(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return 0.0;
    }
    let idx = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[idx.min(sorted.len() - 1)]
}

/// Peak resident set of this process (Linux), MiB.
pub(crate) fn peak_rss_mib() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib / 1024.0)
}

/// User and system CPU time of this process so far, seconds (Linux).
pub(crate) fn process_cpu_s() -> Option<f64> {
    let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
    // Fields after the command (which may hold spaces), from the state on:
    // utime and stime are the 12th and 13th, in USER_HZ (100 per second).
    let after = stat.get(stat.rfind(')')? + 2..)?;
    let mut fields = after.split(' ').skip(11);
    let utime: f64 = fields.next()?.parse().ok()?;
    let stime: f64 = fields.next()?.parse().ok()?;
    Some((utime + stime) / 100.0)
}

/// The report with the raw-SQLite baseline beside it, when asked for.
async fn with_baseline(
    mut report: BenchReport,
    args: &BenchIngestArgs,
) -> anyhow::Result<BenchReport> {
    if !args.baseline {
        return Ok(report);
    }
    let synchronous = match args.durability.as_str() {
        "normal" => "NORMAL",
        "off" => "OFF",
        _ => "FULL",
    };
    let (rows, channels, batch) = (report.readings, args.channels, u64::from(args.batch));
    let dir = tempfile_dir()?;
    let baseline = tokio::task::spawn_blocking(move || {
        super::bench_baseline::run(&dir, rows, channels, batch, synchronous)
    })
    .await??;
    report.ratio_to_baseline = Some(report.readings_per_s / baseline.rows_per_s);
    report.baseline = Some(baseline);
    Ok(report)
}

pub(crate) async fn run(args: &BenchIngestArgs) -> anyhow::Result<()> {
    if args.channels == 0 || args.batch == 0 || args.readings == 0 {
        return Err(super::UsageError(
            "--channels, --batch and --readings must be at least 1".into(),
        )
        .into());
    }
    if args.baseline && args.connect.is_some() {
        return Err(super::UsageError(
            "--baseline measures SQLite on this machine: drop --connect".into(),
        )
        .into());
    }
    let local = match &args.connect {
        Some(_) => None,
        None => Some(LocalServer::start(&args.durability, args.channels).await?),
    };
    let addr = match (&args.connect, &local) {
        (Some(a), _) => a.clone(),
        (None, Some(l)) => l.addr.clone(),
        (None, None) => unreachable!("a local server is started when none is given"),
    };
    let conn = client::connect(&addr).await?;
    let ids = define_channels(&conn, args.channels, &args.chemistry).await?;
    let clock = AlertClock::default();
    let watcher = clock.watch(&conn).await?;
    let (normal_volts, over_volts) = test_voltages(&args.chemistry);
    let per_channel = args.readings / u64::from(args.channels);
    let load = Load {
        per_channel,
        batch: u64::from(args.batch),
        alert_every: args.alert_every,
        t0: client::now_ns() - (per_channel as i64 + 10) * 1_000_000,
        step_ns: 1_000_000,
        normal_volts,
        over_volts,
        batch_interval: (args.rate > 0.0).then(|| {
            Duration::from_secs_f64(f64::from(args.batch) * f64::from(args.channels) / args.rate)
        }),
        ack_log: None,
    };
    let (start, cpu_at_start) = (Instant::now(), process_cpu_s());
    let (accepted, mut latencies) = load.drive(&conn, ids, &clock).await?;
    let seconds = start.elapsed().as_secs_f64();
    let cpu_cores_busy = process_cpu_s()
        .zip(cpu_at_start)
        .filter(|_| local.is_some())
        .map(|(end, begin)| (end - begin) / seconds);
    tokio::time::sleep(Duration::from_millis(300)).await;
    watcher.abort();
    latencies.sort_by(f64::total_cmp);
    let alert_lat = clock.latencies_ms();
    let db_bytes_per_reading = local.as_ref().and_then(|l| l.bytes_per_reading(accepted));
    let report = BenchReport {
        readings: accepted,
        channels: args.channels,
        batch: args.batch,
        seconds,
        readings_per_s: accepted as f64 / seconds,
        offered_rate: args.rate,
        ack_p50_ms: percentile(&latencies, 0.50),
        ack_p99_ms: percentile(&latencies, 0.99),
        ack_max_ms: latencies.last().copied().unwrap_or(0.0),
        alerts_seen: alert_lat.len(),
        alert_p50_ms: (!alert_lat.is_empty()).then(|| percentile(&alert_lat, 0.5)),
        alert_p99_ms: (!alert_lat.is_empty()).then(|| percentile(&alert_lat, 0.99)),
        peak_rss_mib: local.as_ref().and_then(|_| peak_rss_mib()),
        cpu_cores_busy,
        db_bytes_per_reading,
        baseline: None,
        ratio_to_baseline: None,
    };
    if let Some(l) = local {
        l.stop().await;
    }
    let report = with_baseline(report, args).await?;
    print_ingest_report(&report, args.json)
}

/// A server started in this process on a temporary database.
pub(crate) struct LocalServer {
    pub addr: String,
    stop: tokio::sync::oneshot::Sender<()>,
    task: tokio::task::JoinHandle<Result<(), gibbsline::app::AppError>>,
    dir: std::path::PathBuf,
    db: std::path::PathBuf,
}

impl LocalServer {
    async fn start(durability: &str, channels: u32) -> anyhow::Result<LocalServer> {
        LocalServer::start_with(durability, channels, |_| {}).await
    }

    /// [`LocalServer::start`] with the config changed by `tune` first.
    pub(crate) async fn start_with(
        durability: &str,
        channels: u32,
        tune: impl FnOnce(&mut gibbsline::config::ServerConfig),
    ) -> anyhow::Result<LocalServer> {
        LocalServer::start_serving(durability, channels, tune, None).await
    }

    /// [`LocalServer::start_with`], with the console and JSON API on `http`.
    pub(crate) async fn start_serving(
        durability: &str,
        channels: u32,
        tune: impl FnOnce(&mut gibbsline::config::ServerConfig),
        http: Option<tokio::net::TcpListener>,
    ) -> anyhow::Result<LocalServer> {
        let dir = tempfile_dir()?;
        let db = dir.join("bench.db");
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
        let addr = listener.local_addr()?.to_string();
        let durability = durability
            .parse()
            .map_err(|e| super::UsageError(format!("--durability {e}")))?;
        let (stop, stop_rx) = tokio::sync::oneshot::channel::<()>();
        let mut config = gibbsline::config::ServerConfig::for_db(&db, durability);
        // One client opens a stream per channel here: the per-client bound
        // (meant to stop one rig PC taking every slot) must let it.
        config.limits.max_streams_per_client = config
            .limits
            .max_streams_per_client
            .max(u64::from(channels));
        tune(&mut config);
        let mut listeners = gibbsline::app::Listeners::grpc_only(listener);
        listeners.http = http;
        let task = tokio::spawn(gibbsline::app::run(config, listeners, async move {
            let _ = stop_rx.await;
        }));
        Ok(LocalServer {
            addr,
            stop,
            task,
            dir,
            db,
        })
    }

    /// The database and its write-ahead log, per stored reading.
    pub(crate) fn bytes_per_reading(&self, stored: u64) -> Option<f64> {
        (stored > 0).then(|| self.disk_bytes() as f64 / stored as f64)
    }

    /// The database file and its write-ahead log, bytes.
    pub(crate) fn disk_bytes(&self) -> u64 {
        (self.disk_probe())()
    }

    /// A probe of [`LocalServer::disk_bytes`] another task can keep.
    pub(crate) fn disk_probe(&self) -> impl Fn() -> u64 + Send + 'static {
        let db = self.db.display().to_string();
        move || {
            ["", "-wal"]
                .iter()
                .filter_map(|s| std::fs::metadata(format!("{db}{s}")).ok())
                .map(|m| m.len())
                .sum()
        }
    }

    pub(crate) async fn stop(self) {
        let _ = self.stop.send(());
        let _ = self.task.await;
        let _ = std::fs::remove_dir_all(self.dir);
    }
}

/// One channel per stream, each with a fresh id so runs never collide.
pub(crate) async fn define_channels(
    conn: &client::Conn,
    channels: u32,
    chemistry: &str,
) -> anyhow::Result<Vec<String>> {
    let mut client = ChannelServiceClient::new(conn.clone());
    let run_tag = client::now_ns() % 1_000_000;
    let ids: Vec<String> = (0..channels)
        .map(|i| format!("bench-{run_tag}-{i:04}"))
        .collect();
    for id in &ids {
        let channel = pb::Channel {
            channel_id: id.clone(),
            chemistry_id: chemistry.to_string(),
            cells_in_series: 1,
            capacity_ah: 10.0,
            current_sign: pb::CurrentSign::ChargePositive as i32,
            default_temp_c: 25.0,
            ..Default::default()
        };
        client
            .put_channel(pb::PutChannelRequest {
                channel: Some(channel),
            })
            .await?;
    }
    Ok(ids)
}

/// A voltage inside the chemistry's window, and one over its limit.
pub(crate) fn test_voltages(chemistry_id: &str) -> (f64, f64) {
    match gibbsline::electrochem::Registry::builtin().get(chemistry_id) {
        Ok(c) => (
            0.5 * (c.min_cell_volts + c.max_cell_volts),
            c.max_cell_volts + 0.1,
        ),
        Err(_) => (1.0, 1.0),
    }
}

/// Alert latency: from the ack of the batch holding the raising reading
/// to the alert's arrival at a subscriber.
#[derive(Clone, Default)]
pub(crate) struct AlertClock {
    acked: Arc<Mutex<HashMap<(String, u64), Instant>>>,
    arrived: Arc<Mutex<Vec<(String, u64, Instant)>>>,
}

impl AlertClock {
    async fn watch(&self, conn: &client::Conn) -> anyhow::Result<tokio::task::JoinHandle<()>> {
        let request = pb::WatchAlertsRequest {
            after_event_id: u64::MAX >> 1,
            ..Default::default()
        };
        let mut watch = AlertServiceClient::new(conn.clone())
            .watch_alerts(request)
            .await?
            .into_inner();
        let arrived = self.arrived.clone();
        Ok(tokio::spawn(async move {
            while let Some(Ok(m)) = watch.next().await {
                if m.event == pb::AlertEventKind::Raised as i32
                    && let Some(a) = m.alert
                {
                    let at = Instant::now();
                    arrived
                        .lock()
                        .expect("poisoned")
                        .push((a.channel_id, a.raised_seq, at));
                }
            }
        }))
    }

    pub(crate) fn acked(&self, channel_id: &str, seqs: impl Iterator<Item = u64>, at: Instant) {
        let mut acked = self.acked.lock().expect("poisoned");
        for s in seqs {
            acked.insert((channel_id.to_string(), s), at);
        }
    }

    /// Notes an alert's arrival somewhere else (a webhook receiver).
    pub(crate) fn arrived(&self, channel_id: String, raised_seq: u64) {
        let at = Instant::now();
        self.arrived
            .lock()
            .expect("poisoned")
            .push((channel_id, raised_seq, at));
    }

    /// Sorted ack-to-arrival times of the alerts seen, ms.
    pub(crate) fn latencies_ms(&self) -> Vec<f64> {
        let acked = self.acked.lock().expect("poisoned");
        let mut out: Vec<f64> = self
            .arrived
            .lock()
            .expect("poisoned")
            .iter()
            .filter_map(|(ch, seq, at)| {
                acked
                    .get(&(ch.clone(), *seq))
                    .map(|t| at.saturating_duration_since(*t).as_secs_f64() * 1e3)
            })
            .collect();
        out.sort_by(f64::total_cmp);
        out
    }
}

/// What every channel's stream sends.
#[derive(Clone)]
pub(crate) struct Load {
    pub per_channel: u64,
    pub batch: u64,
    pub alert_every: u64,
    /// Rig time of reading 0; reading `s` is `s` steps later.
    pub t0: i64,
    pub step_ns: i64,
    pub normal_volts: f64,
    pub over_volts: f64,
    /// Paced: one batch per channel this often; `None`: as fast as acked.
    pub batch_interval: Option<Duration>,
    /// Every ack as (channel, last seq of its batch, when), if kept.
    pub ack_log: Option<AckLog>,
}

/// Acks as they came: (channel id, the batch's last seq, arrival).
pub(crate) type AckLog = Arc<Mutex<Vec<(String, u64, Instant)>>>;

/// Batches sent and not yet acknowledged: batch id → (sent at, last seq).
type Sent = Arc<Mutex<HashMap<u64, (Instant, u64)>>>;

impl Load {
    /// Streams every channel at once, each on its own stream: readings
    /// accepted and ack latencies (ms) over all of them.
    pub(crate) async fn drive(
        &self,
        conn: &client::Conn,
        ids: Vec<String>,
        clock: &AlertClock,
    ) -> anyhow::Result<(u64, Vec<f64>)> {
        let channels = ids.len().max(1) as f64;
        let tasks: Vec<_> = ids
            .into_iter()
            .enumerate()
            .map(|(index, id)| {
                // Channels start out of phase so the offered load is smooth,
                // as from independent rigs, not one burst per tick.
                let phase = index as f64 / channels;
                tokio::spawn(self.clone().stream(conn.clone(), id, phase, clock.clone()))
            })
            .collect();
        let mut latencies = Vec::new();
        let mut accepted = 0;
        for t in tasks {
            let (a, l) = t.await??;
            accepted += a;
            latencies.extend(l);
        }
        Ok((accepted, latencies))
    }

    /// One channel's stream: readings accepted and ack latencies (ms).
    pub(crate) async fn stream(
        self,
        conn: client::Conn,
        id: String,
        phase: f64,
        clock: AlertClock,
    ) -> anyhow::Result<(u64, Vec<f64>)> {
        let mut ingest = IngestServiceClient::new(conn)
            .max_encoding_message_size(gibbsline::grpc::MAX_MESSAGE_BYTES)
            .max_decoding_message_size(gibbsline::grpc::MAX_MESSAGE_BYTES);
        let (tx, rx) = tokio::sync::mpsc::channel::<pb::StreamReadingsRequest>(4);
        let sent: Sent = Arc::default();
        let producer = tokio::spawn(self.clone().produce(id.clone(), phase, tx, sent.clone()));
        let mut inbound = ingest
            .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
            .await?
            .into_inner();
        let mut latencies = Vec::new();
        let mut last_seq = 0u64;
        let mut accepted = 0u64;
        while last_seq < self.per_channel {
            let Some(msg) = inbound.next().await else {
                break;
            };
            let ack = msg?.ack.ok_or_else(|| anyhow::anyhow!("ack missing"))?;
            let now = Instant::now();
            accepted += u64::from(ack.accepted);
            if let Some((t, hi)) = sent.lock().expect("poisoned").remove(&ack.batch_id) {
                latencies.push(now.duration_since(t).as_secs_f64() * 1e3);
                if let Some(log) = &self.ack_log {
                    log.lock().expect("poisoned").push((id.clone(), hi, now));
                }
                let lo = hi.saturating_sub(self.batch) + 1;
                if self.alert_every > 0 {
                    let every = self.alert_every;
                    clock.acked(&id, (lo..=hi).filter(|s| s % every == 0), now);
                }
                last_seq = hi;
            }
        }
        producer.abort();
        Ok((accepted, latencies))
    }

    /// Sends the channel's batches, paced or as fast as the stream takes them.
    async fn produce(
        self,
        id: String,
        phase: f64,
        tx: tokio::sync::mpsc::Sender<pb::StreamReadingsRequest>,
        sent: Sent,
    ) {
        let mut seq = 1u64;
        let mut batch_id = 0u64;
        let paced_start = tokio::time::Instant::now()
            + self
                .batch_interval
                .map(|e| e.mul_f64(phase))
                .unwrap_or_default();
        while seq <= self.per_channel {
            if let Some(every) = self.batch_interval {
                tokio::time::sleep_until(paced_start + every * batch_id as u32).await;
            }
            let end = (seq + self.batch).min(self.per_channel + 1);
            let readings = (seq..end).map(|s| self.reading(s)).collect();
            sent.lock()
                .expect("poisoned")
                .insert(batch_id, (Instant::now(), end - 1));
            let batch = pb::ReadingBatch {
                historical: false,
                channel_id: id.clone(),
                batch_id,
                readings,
            };
            if tx
                .send(pb::StreamReadingsRequest { batch: Some(batch) })
                .await
                .is_err()
            {
                break;
            }
            seq = end;
            batch_id += 1;
        }
    }

    /// Reading `s`: inside the window, or over it every `alert_every`.
    fn reading(&self, s: u64) -> pb::Reading {
        let over = self.alert_every > 0 && s.is_multiple_of(self.alert_every);
        pb::Reading {
            seq: s,
            time_unix_ns: self.t0 + s as i64 * self.step_ns,
            volts: if over {
                self.over_volts
            } else {
                self.normal_volts + 1e-4 * ((s % 7) as f64)
            },
            amps: Some(0.0),
            temp_c: Some(25.0),
        }
    }
}

fn print_ingest_report(report: &BenchReport, json: bool) -> anyhow::Result<()> {
    if json {
        println!("{}", serde_json::to_string(report)?);
        return Ok(());
    }
    println!(
        "readings        {} over {} channels, batches of {}",
        report.readings, report.channels, report.batch
    );
    println!(
        "sustained       {:.0} readings/s ({:.2} s)",
        report.readings_per_s, report.seconds
    );
    println!(
        "ack latency     p50 {:.1} ms, p99 {:.1} ms, max {:.1} ms",
        report.ack_p50_ms, report.ack_p99_ms, report.ack_max_ms
    );
    match (report.alert_p50_ms, report.alert_p99_ms) {
        (Some(p50), Some(p99)) => println!(
            "alert latency   p50 {p50:.1} ms, p99 {p99:.1} ms ({} alerts)",
            report.alerts_seen
        ),
        _ => println!("alert latency   no alerts measured"),
    }
    if let Some(rss) = report.peak_rss_mib {
        println!("peak RSS        {rss:.0} MiB (server and client in one process)");
    }
    if let Some(cores) = report.cpu_cores_busy {
        println!("cpu             {cores:.2} cores busy while the load ran (server and client)");
    }
    if let Some(b) = report.db_bytes_per_reading {
        println!("disk            {b:.0} bytes per stored reading");
    }
    if let (Some(b), Some(ratio)) = (&report.baseline, report.ratio_to_baseline) {
        println!(
            "plain SQLite    {:.0} rows/s, {:.0} bytes per row (one row per reading, same durability): server at {ratio:.2}×",
            b.rows_per_s, b.bytes_per_row
        );
    }
    Ok(())
}

pub(crate) fn tempfile_dir() -> anyhow::Result<std::path::PathBuf> {
    let dir = std::env::temp_dir().join(format!("gibbsline-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir)?;
    Ok(dir)
}

#[derive(Debug, clap::Args)]
pub(crate) struct BenchDeriveArgs {
    /// Readings to derive.
    #[arg(long, default_value_t = 1_000_000)]
    pub readings: u64,
    /// The chemistry id of the benched channels.
    #[arg(long, default_value = "vanadium-redox")]
    pub chemistry: String,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Serialize)]
pub(crate) struct DeriveReport {
    pub readings: u64,
    pub thermo_only_ns_per_reading: f64,
    pub full_path_ns_per_reading: f64,
    pub estimator_and_rules_ns_per_reading: f64,
}

/// The ingest path's pure work per reading, measured two ways in one run:
/// thermodynamics and SOC alone (what ingest did before the estimator),
/// and the full path (estimator, rules, row building) as ingest runs it.
pub(crate) fn derive(args: &BenchDeriveArgs) -> anyhow::Result<()> {
    use gibbsline::electrochem::Registry;
    use gibbsline::ingest::ChannelRuntime;
    let registry = Registry::builtin();
    let chem = registry
        .get(&args.chemistry)
        .map_err(|_| super::UsageError(format!("--chemistry {:?}: unknown id", args.chemistry)))?;
    let readings = derive_readings(args.readings, &chem);
    let (thermo_ns, thermo_sink) = time_thermo(&chem, &readings)?;
    let mut rt = ChannelRuntime::fresh(1, derive_channel(&chem), chem.clone(), 1);
    let (full_ns, full_sink) = time_full(&mut rt, &readings);
    std::hint::black_box(thermo_sink + full_sink);
    let report = DeriveReport {
        readings: args.readings,
        thermo_only_ns_per_reading: thermo_ns,
        full_path_ns_per_reading: full_ns,
        estimator_and_rules_ns_per_reading: full_ns - thermo_ns,
    };
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
        return Ok(());
    }
    println!("readings            {}", report.readings);
    println!(
        "thermo + SOC only   {:.0} ns/reading",
        report.thermo_only_ns_per_reading
    );
    println!(
        "full ingest derive  {:.0} ns/reading (estimator, rules, row)",
        report.full_path_ns_per_reading
    );
    println!(
        "estimator + rules   {:.0} ns/reading extra",
        report.estimator_and_rules_ns_per_reading
    );
    Ok(())
}

fn derive_channel(chem: &gibbsline::electrochem::Chemistry) -> gibbsline::channel::ChannelDef {
    gibbsline::channel::ChannelDef {
        capacity_ah: 2.0,
        ..gibbsline::channel::ChannelDef::of_chemistry("bench", chem)
    }
}

/// Current steps every 600 readings and rests between, so every branch
/// of the estimator is exercised.
fn derive_readings(
    n: u64,
    chem: &gibbsline::electrochem::Chemistry,
) -> Vec<gibbsline::ingest::RawReading> {
    let mid = 0.5 * (chem.min_cell_volts + chem.max_cell_volts);
    let t0 = client::now_ns() - (n as i64 + 10) * 1_000_000_000;
    (1..=n)
        .map(|s| {
            let phase = (s / 600) % 3;
            let amps = [1.0, 0.0, -1.0][phase as usize];
            gibbsline::ingest::RawReading {
                seq: s,
                time_unix_ns: t0 + s as i64 * 1_000_000_000,
                volts: mid + 0.05 * amps + 1e-4 * ((s % 13) as f64),
                amps: Some(amps),
                temp_c: Some(25.0 + 0.001 * (s % 100) as f64),
            }
        })
        .collect()
}

/// Thermodynamics and SOC alone: ns per reading, and a sink the optimiser keeps.
fn time_thermo(
    chem: &gibbsline::electrochem::Chemistry,
    readings: &[gibbsline::ingest::RawReading],
) -> anyhow::Result<(f64, f64)> {
    use gibbsline::electrochem::{self, EvalRequest};
    let started = Instant::now();
    let mut sink = 0.0;
    for r in readings {
        let request = EvalRequest {
            stack_volts: r.volts,
            cells_in_series: 1,
            temp_k: r.temp_c.unwrap_or(25.0) + 273.15,
            equilibrium_tolerance_volts: 1e-3,
        };
        let ev = electrochem::evaluate(chem, request)?;
        sink += ev.thermo.delta_g_kj_per_mol + ev.soc.unwrap_or(0.0);
    }
    Ok((per_reading_ns(started, readings.len()), sink))
}

/// The full ingest derivation in batches of 1,000.
fn time_full(
    rt: &mut gibbsline::ingest::ChannelRuntime,
    readings: &[gibbsline::ingest::RawReading],
) -> (f64, f64) {
    let started = Instant::now();
    let mut sink = 0.0;
    for chunk in readings.chunks(1000) {
        let (batch, _) = gibbsline::ingest::derive_batch(rt, chunk, client::now_ns());
        sink += batch.rows.len() as f64;
    }
    (per_reading_ns(started, readings.len()), sink)
}

fn per_reading_ns(started: Instant, n: usize) -> f64 {
    started.elapsed().as_nanos() as f64 / n.max(1) as f64
}
