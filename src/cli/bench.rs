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
pub struct BenchIngestArgs {
    /// Server to load; without it a server is started in this process on a
    /// temporary database (then peak RSS covers both ends).
    #[arg(long)]
    pub connect: Option<String>,
    #[arg(long, default_value_t = 100)]
    pub channels: u32,
    /// Readings in total, spread over the channels.
    #[arg(long, default_value_t = 1_000_000)]
    pub readings: u64,
    #[arg(long, default_value_t = 1000)]
    pub batch: u32,
    /// Offered load in readings/s over all channels; 0 sends as fast as the
    /// server takes them (then ack latency is mostly queueing, by Little's law).
    #[arg(long, default_value_t = 0.0)]
    pub rate: f64,
    #[arg(long, default_value = "daniell")]
    pub chemistry: String,
    /// One reading in this many goes over the voltage limit (and the next
    /// comes back), raising and clearing an alert; 0 disables.
    #[arg(long, default_value_t = 10_000)]
    pub alert_every: u64,
    /// Durability of the in-process server (full, normal, off).
    #[arg(long, default_value = "full")]
    pub durability: String,
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Serialize)]
pub struct BenchReport {
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
    pub db_bytes_per_reading: Option<f64>,
}

fn percentile(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return 0.0;
    }
    let idx = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[idx.min(sorted.len() - 1)]
}

/// Peak resident set of this process (Linux), MiB.
pub fn peak_rss_mib() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib / 1024.0)
}

pub async fn run(args: &BenchIngestArgs) -> anyhow::Result<()> {
    if args.channels == 0 || args.batch == 0 || args.readings == 0 {
        return Err(super::UsageError(
            "--channels, --batch and --readings must be at least 1".into(),
        )
        .into());
    }
    let mut local = None;
    let addr = match &args.connect {
        Some(a) => a.clone(),
        None => {
            let dir = tempfile_dir()?;
            let db = dir.join("bench.db");
            let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
            let addr = listener.local_addr()?.to_string();
            let durability = args
                .durability
                .parse()
                .map_err(|e| super::UsageError(format!("--durability {e}")))?;
            let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
            let config = gibbsline::app::Config::new(db.clone(), durability);
            let task = tokio::spawn(gibbsline::app::run(config, listener, async move {
                let _ = stop_rx.await;
            }));
            local = Some((stop_tx, task, dir, db));
            addr
        }
    };
    let channel = client::connect(&addr).await?;
    let mut channels = ChannelServiceClient::new(channel.clone());
    let run_tag = client::now_ns() % 1_000_000;
    let ids: Vec<String> = (0..args.channels)
        .map(|i| format!("bench-{run_tag}-{i:04}"))
        .collect();
    for id in &ids {
        channels
            .put_channel(pb::PutChannelRequest {
                channel: Some(pb::Channel {
                    channel_id: id.clone(),
                    chemistry_id: args.chemistry.clone(),
                    cells_in_series: 1,
                    capacity_ah: 10.0,
                    current_sign: pb::CurrentSign::ChargePositive as i32,
                    default_temp_c: 25.0,
                    ..Default::default()
                }),
            })
            .await?;
    }
    let chemistry = gibbsline::electrochem::Registry::builtin()
        .get(&args.chemistry)
        .ok();
    let (normal_volts, over_volts) = match &chemistry {
        Some(c) => (
            0.5 * (c.min_cell_volts + c.max_cell_volts),
            c.max_cell_volts + 0.1,
        ),
        None => (1.0, 1.0),
    };

    // Alert latency: time from the ack of the batch holding the raising
    // reading to the alert's arrival at a subscriber.
    let ack_times: Arc<Mutex<HashMap<(String, u64), Instant>>> = Arc::default();
    let alert_arrivals: Arc<Mutex<Vec<(String, u64, Instant)>>> = Arc::default();
    let mut alerts = AlertServiceClient::new(channel.clone());
    let mut watch = alerts
        .watch_alerts(pb::WatchAlertsRequest {
            after_id: u64::MAX >> 1,
            ..Default::default()
        })
        .await?
        .into_inner();
    let arrivals = alert_arrivals.clone();
    let watcher = tokio::spawn(async move {
        while let Some(Ok(m)) = watch.next().await {
            if m.event == pb::AlertEventKind::Raised as i32
                && let Some(a) = m.alert
            {
                arrivals.lock().expect("poisoned").push((
                    a.channel_id,
                    a.raised_seq,
                    Instant::now(),
                ));
            }
        }
    });

    let per_channel = args.readings / u64::from(args.channels);
    let t0 = client::now_ns() - (per_channel as i64 + 10) * 1_000_000;
    let start = Instant::now();
    let mut tasks = Vec::new();
    for (index, id) in ids.clone().into_iter().enumerate() {
        // Channels start out of phase so the offered load is smooth, as from
        // independent rigs, not one burst per tick.
        let phase = index as f64 / f64::from(args.channels);
        let mut ingest = IngestServiceClient::new(channel.clone())
            .max_encoding_message_size(gibbsline::grpc::MAX_MESSAGE_BYTES)
            .max_decoding_message_size(gibbsline::grpc::MAX_MESSAGE_BYTES);
        let batch = u64::from(args.batch);
        let alert_every = args.alert_every;
        let ack_times = ack_times.clone();
        let batch_interval = (args.rate > 0.0)
            .then(|| Duration::from_secs_f64(batch as f64 * f64::from(args.channels) / args.rate));
        tasks.push(tokio::spawn(async move {
            let (tx, rx) = tokio::sync::mpsc::channel::<pb::StreamReadingsRequest>(4);
            let sent: Arc<Mutex<HashMap<u64, (Instant, u64)>>> = Arc::default();
            let sent_w = sent.clone();
            let id_w = id.clone();
            let producer = tokio::spawn(async move {
                let mut seq = 1u64;
                let mut batch_id = 0u64;
                let paced_start = tokio::time::Instant::now()
                    + batch_interval.map(|e| e.mul_f64(phase)).unwrap_or_default();
                while seq <= per_channel {
                    if let Some(every) = batch_interval {
                        tokio::time::sleep_until(paced_start + every * batch_id as u32).await;
                    }
                    let end = (seq + batch).min(per_channel + 1);
                    let readings = (seq..end)
                        .map(|s| {
                            let over = alert_every > 0 && s % alert_every == 0;
                            pb::Reading {
                                seq: s,
                                time_unix_ns: t0 + s as i64 * 1_000_000,
                                volts: if over {
                                    over_volts
                                } else {
                                    normal_volts + 1e-4 * ((s % 7) as f64)
                                },
                                amps: Some(0.0),
                                temp_c: Some(25.0),
                            }
                        })
                        .collect();
                    sent_w
                        .lock()
                        .expect("poisoned")
                        .insert(batch_id, (Instant::now(), end - 1));
                    let msg = pb::StreamReadingsRequest {
                        batch: Some(pb::ReadingBatch {
                            channel_id: id_w.clone(),
                            batch_id,
                            readings,
                        }),
                    };
                    if tx.send(msg).await.is_err() {
                        break;
                    }
                    seq = end;
                    batch_id += 1;
                }
            });
            let mut inbound = ingest
                .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
                .await?
                .into_inner();
            let mut latencies = Vec::new();
            let mut last_seq = 0u64;
            let mut accepted = 0u64;
            while last_seq < per_channel {
                let Some(msg) = inbound.next().await else {
                    break;
                };
                let ack = msg?.ack.ok_or_else(|| anyhow::anyhow!("ack missing"))?;
                let now = Instant::now();
                accepted += u64::from(ack.accepted);
                if let Some((t, hi)) = sent.lock().expect("poisoned").remove(&ack.batch_id) {
                    latencies.push(now.duration_since(t).as_secs_f64() * 1e3);
                    let lo = hi.saturating_sub(batch) + 1;
                    if alert_every > 0 {
                        let mut times = ack_times.lock().expect("poisoned");
                        for s in (lo..=hi).filter(|s| s % alert_every == 0) {
                            times.insert((id.clone(), s), now);
                        }
                    }
                    last_seq = hi;
                }
            }
            producer.abort();
            anyhow::Ok((accepted, latencies))
        }));
    }
    let mut latencies = Vec::new();
    let mut accepted = 0;
    for t in tasks {
        let (a, l) = t.await??;
        accepted += a;
        latencies.extend(l);
    }
    let seconds = start.elapsed().as_secs_f64();
    tokio::time::sleep(Duration::from_millis(300)).await;
    watcher.abort();
    latencies.sort_by(f64::total_cmp);
    let acks = std::mem::take(&mut *ack_times.lock().expect("poisoned"));
    let mut alert_lat: Vec<f64> = alert_arrivals
        .lock()
        .expect("poisoned")
        .iter()
        .filter_map(|(ch, seq, at)| {
            acks.get(&(ch.clone(), *seq))
                .map(|acked| at.saturating_duration_since(*acked).as_secs_f64() * 1e3)
        })
        .collect();
    alert_lat.sort_by(f64::total_cmp);
    let db_bytes_per_reading = local.as_ref().and_then(|(_, _, _, db)| {
        let size: u64 = ["", "-wal"]
            .iter()
            .filter_map(|s| std::fs::metadata(format!("{}{s}", db.display())).ok())
            .map(|m| m.len())
            .sum();
        (accepted > 0).then(|| size as f64 / accepted as f64)
    });
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
        peak_rss_mib: if local.is_some() {
            peak_rss_mib()
        } else {
            None
        },
        db_bytes_per_reading,
    };
    if let Some((stop, task, dir, _)) = local {
        let _ = stop.send(());
        let _ = task.await;
        let _ = std::fs::remove_dir_all(dir);
    }
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
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
        if let Some(b) = report.db_bytes_per_reading {
            println!("disk            {b:.0} bytes per stored reading");
        }
    }
    Ok(())
}

fn tempfile_dir() -> anyhow::Result<std::path::PathBuf> {
    let dir = std::env::temp_dir().join(format!("gibbsline-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir)?;
    Ok(dir)
}

#[derive(Debug, clap::Args)]
pub struct BenchDeriveArgs {
    /// Readings to derive.
    #[arg(long, default_value_t = 1_000_000)]
    pub readings: u64,
    #[arg(long, default_value = "vanadium-redox")]
    pub chemistry: String,
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Serialize)]
pub struct DeriveReport {
    pub readings: u64,
    pub thermo_only_ns_per_reading: f64,
    pub full_path_ns_per_reading: f64,
    pub estimator_and_rules_ns_per_reading: f64,
}

/// The ingest path's pure work per reading, measured two ways in one run:
/// thermodynamics and SOC alone (what ingest did before the estimator),
/// and the full path (estimator, rules, row building) as ingest runs it.
pub fn derive(args: &BenchDeriveArgs) -> anyhow::Result<()> {
    use gibbsline::channel::ChannelDef;
    use gibbsline::electrochem::{self, EvalRequest, Registry};
    use gibbsline::ingest::{ChannelRuntime, RawReading, derive_batch};
    let registry = Registry::builtin();
    let chem = registry
        .get(&args.chemistry)
        .map_err(|_| super::UsageError(format!("--chemistry {:?}: unknown id", args.chemistry)))?;
    let (min_volts, max_volts) = ChannelDef::default_window(&chem);
    let def = ChannelDef {
        channel_id: "bench".into(),
        chemistry_id: chem.id.clone(),
        cells_in_series: 1,
        capacity_ah: 2.0,
        current_sign: gibbsline::estimator::CurrentSign::ChargePositive,
        default_temp_c: 25.0,
        min_volts,
        max_volts,
        e_standard_override_v: None,
        resistance_ohm: None,
        equilibrium_tolerance_mv: 1.0,
        coulombic_efficiency: 1.0,
        faradaic_efficiency: 1.0,
        description: String::new(),
        gas: None,
        active_area_cm2: None,
    };
    let mid = 0.5 * (chem.min_cell_volts + chem.max_cell_volts);
    let t0 = client::now_ns() - (args.readings as i64 + 10) * 1_000_000_000;
    // Current steps every 600 readings and rests between, so every branch
    // of the estimator is exercised.
    let readings: Vec<RawReading> = (1..=args.readings)
        .map(|s| {
            let phase = (s / 600) % 3;
            let amps = [1.0, 0.0, -1.0][phase as usize];
            RawReading {
                seq: s,
                time_unix_ns: t0 + s as i64 * 1_000_000_000,
                volts: mid + 0.05 * amps + 1e-4 * ((s % 13) as f64),
                amps: Some(amps),
                temp_c: Some(25.0 + 0.001 * (s % 100) as f64),
            }
        })
        .collect();
    let started = Instant::now();
    let mut sink = 0.0;
    for r in &readings {
        let ev = electrochem::evaluate(
            &chem,
            EvalRequest {
                stack_volts: r.volts,
                cells_in_series: 1,
                temp_k: r.temp_c.unwrap_or(25.0) + 273.15,
                equilibrium_tolerance_volts: 1e-3,
            },
        )?;
        sink += ev.thermo.delta_g_kj_per_mol + ev.soc.unwrap_or(0.0);
    }
    let thermo_ns = started.elapsed().as_nanos() as f64 / args.readings as f64;
    let mut rt = ChannelRuntime::fresh(1, def, chem.clone(), 1);
    let started = Instant::now();
    for chunk in readings.chunks(1000) {
        let (batch, _) = derive_batch(&mut rt, chunk, client::now_ns());
        sink += batch.rows.len() as f64;
    }
    let full_ns = started.elapsed().as_nanos() as f64 / args.readings as f64;
    std::hint::black_box(sink);
    let report = DeriveReport {
        readings: args.readings,
        thermo_only_ns_per_reading: thermo_ns,
        full_path_ns_per_reading: full_ns,
        estimator_and_rules_ns_per_reading: full_ns - thermo_ns,
    };
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
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
    }
    Ok(())
}
