//! `gibbsline bench retention`: a soak at constant paced load with
//! retention on. Rig time runs from `--rig-hours` ago up to now, so the
//! horizons are reached within minutes; the database's size is sampled
//! every second and ack latency is measured while pruning runs beside
//! ingest. Once both horizons are reached the size should stay flat.

use super::bench::{self, AlertClock, Load, LocalServer, percentile};
use super::client;
use serde::Serialize;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

#[derive(Debug, clap::Args)]
pub(crate) struct BenchRetentionArgs {
    /// Channels streamed at once.
    #[arg(long, default_value_t = 10)]
    pub channels: u32,
    /// Rig time the soak covers, hours.
    #[arg(long, default_value_t = 12.0)]
    pub rig_hours: f64,
    /// Rig time between readings of a channel, ms.
    #[arg(long, default_value_t = 100)]
    pub interval_ms: u64,
    /// Server default `retention.raw_days`.
    #[arg(long, default_value_t = 0.125)]
    pub raw_days: f64,
    /// Server default `retention.rollup_days`.
    #[arg(long, default_value_t = 0.25)]
    pub rollup_days: f64,
    /// Offered load over all channels, readings/s.
    #[arg(long, default_value_t = 150_000.0)]
    pub rate: f64,
    /// Readings per batch.
    #[arg(long, default_value_t = 1000)]
    pub batch: u32,
    /// Durability of the in-process server (full, normal, off).
    #[arg(long, default_value = "full")]
    pub durability: String,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// The soak's figures.
#[derive(Debug, Serialize)]
pub(crate) struct RetentionReport {
    pub readings: u64,
    pub seconds: f64,
    pub readings_per_s: f64,
    pub ack_p50_ms: f64,
    pub ack_p99_ms: f64,
    pub ack_max_ms: f64,
    /// Disk (file + WAL) once both horizons were reached, and at the end, MB.
    pub disk_at_horizon_mb: f64,
    pub disk_at_end_mb: f64,
    /// Largest and smallest size seen after the horizons, MB.
    pub disk_after_horizon_max_mb: f64,
    pub disk_after_horizon_min_mb: f64,
    /// (rig hours reached, disk MB), one sample a second.
    pub samples: Vec<(f64, f64)>,
}

pub(crate) async fn run(args: &BenchRetentionArgs) -> anyhow::Result<()> {
    if args.channels == 0 || args.batch == 0 || args.interval_ms == 0 || args.rate <= 0.0 {
        return Err(super::UsageError(
            "--channels, --batch, --interval-ms and --rate must be positive".into(),
        )
        .into());
    }
    let (raw_days, rollup_days) = (args.raw_days, args.rollup_days);
    let server = LocalServer::start_with(&args.durability, args.channels, |c| {
        c.retention.raw_days = Some(raw_days);
        c.retention.rollup_days = Some(rollup_days);
        c.retention.prune_interval_s = 1;
    })
    .await?;
    let conn = client::connect(&server.addr).await?;
    let ids = bench::define_channels(&conn, args.channels, "daniell").await?;
    let load = soak_load(args);
    let expected_s = (load.per_channel * u64::from(args.channels)) as f64 / args.rate;
    let samples: Arc<Mutex<Vec<(f64, f64)>>> = Arc::default();
    let started = Instant::now();
    let sampler = sample_disk(
        &server,
        samples.clone(),
        started,
        expected_s,
        args.rig_hours,
    );
    let (readings, mut latencies) = load.drive(&conn, ids, &AlertClock::default()).await?;
    let seconds = started.elapsed().as_secs_f64();
    // One more pass after the last batch.
    tokio::time::sleep(Duration::from_secs(2)).await;
    sampler.abort();
    latencies.sort_by(f64::total_cmp);
    let samples = samples.lock().expect("poisoned").clone();
    let horizon_h = rollup_days.max(raw_days) * 24.0 + 1.0;
    let report = report(readings, seconds, &latencies, samples, horizon_h);
    server.stop().await;
    print(&report, args.json)
}

/// Every channel's readings: `--rig-hours` of rig time ending now, paced
/// so that all channels together offer `--rate`.
fn soak_load(args: &BenchRetentionArgs) -> Load {
    let step_ns = (args.interval_ms * 1_000_000) as i64;
    let per_channel = (args.rig_hours * 3.6e12 / step_ns as f64) as u64;
    let (normal_volts, over_volts) = bench::test_voltages("daniell");
    Load {
        per_channel,
        batch: u64::from(args.batch),
        alert_every: 0,
        t0: client::now_ns() - (per_channel as i64 + 10) * step_ns,
        step_ns,
        normal_volts,
        over_volts,
        batch_interval: Some(Duration::from_secs_f64(
            f64::from(args.batch) * f64::from(args.channels) / args.rate,
        )),
        ack_log: None,
    }
}

/// Samples the database's size each second as (rig hours reached, MB);
/// rig time is read off the paced schedule.
fn sample_disk(
    server: &LocalServer,
    samples: Arc<Mutex<Vec<(f64, f64)>>>,
    started: Instant,
    expected_s: f64,
    rig_hours: f64,
) -> tokio::task::JoinHandle<()> {
    let disk = server.disk_probe();
    tokio::spawn(async move {
        let mut tick = tokio::time::interval(Duration::from_secs(1));
        loop {
            tick.tick().await;
            let rig = (started.elapsed().as_secs_f64() / expected_s).min(1.0) * rig_hours;
            let mb = disk() as f64 / 1e6;
            samples.lock().expect("poisoned").push((rig, mb));
        }
    })
}

fn report(
    readings: u64,
    seconds: f64,
    latencies: &[f64],
    samples: Vec<(f64, f64)>,
    horizon_h: f64,
) -> RetentionReport {
    let after: Vec<f64> = samples
        .iter()
        .filter(|(h, _)| *h >= horizon_h)
        .map(|(_, mb)| *mb)
        .collect();
    RetentionReport {
        readings,
        seconds,
        readings_per_s: readings as f64 / seconds,
        ack_p50_ms: percentile(latencies, 0.50),
        ack_p99_ms: percentile(latencies, 0.99),
        ack_max_ms: latencies.last().copied().unwrap_or(0.0),
        disk_at_horizon_mb: after.first().copied().unwrap_or(f64::NAN),
        disk_at_end_mb: samples.last().map(|s| s.1).unwrap_or(f64::NAN),
        disk_after_horizon_max_mb: after.iter().copied().fold(f64::NAN, f64::max),
        disk_after_horizon_min_mb: after.iter().copied().fold(f64::NAN, f64::min),
        samples,
    }
}

fn print(r: &RetentionReport, json: bool) -> anyhow::Result<()> {
    if json {
        println!("{}", serde_json::to_string(r)?);
        return Ok(());
    }
    println!(
        "readings        {} in {:.1} s ({:.0}/s)",
        r.readings, r.seconds, r.readings_per_s
    );
    println!(
        "ack latency     p50 {:.1} ms, p99 {:.1} ms, max {:.1} ms (pruning beside ingest)",
        r.ack_p50_ms, r.ack_p99_ms, r.ack_max_ms
    );
    if r.disk_at_horizon_mb.is_nan() {
        println!(
            "disk            {:.1} MB at the end; the horizons were not reached (raise --rig-hours)",
            r.disk_at_end_mb
        );
    } else {
        println!(
            "disk            {:.1} MB when both horizons were reached, {:.1} MB at the end; \
             {:.1}–{:.1} MB in between",
            r.disk_at_horizon_mb,
            r.disk_at_end_mb,
            r.disk_after_horizon_min_mb,
            r.disk_after_horizon_max_mb
        );
    }
    println!("rig_hours  disk_mb");
    let every = (r.samples.len() / 24).max(1);
    for (h, mb) in r.samples.iter().step_by(every) {
        println!("{h:>9.2} {mb:>8.1}");
    }
    Ok(())
}
