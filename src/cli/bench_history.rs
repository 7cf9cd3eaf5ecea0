//! `gibbsline bench history`: how long a dashboard waits for a zoom, at
//! several history lengths. For each size a fresh in-process server
//! stores that many readings of one channel (through ingest, so rollups
//! are what ingest wrote), then `QueryBuckets` over the whole span is
//! timed, and a raw page of readings beside it (rows and columns), and a
//! scan of every reading in columns.

use super::bench::{self, Load, LocalServer, percentile};
use super::client;
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use serde::Serialize;
use std::time::Instant;
use tokio_stream::StreamExt;

#[derive(Debug, clap::Args)]
pub(crate) struct BenchHistoryArgs {
    /// History lengths to measure, readings of one channel, comma-separated.
    #[arg(long, value_delimiter = ',', default_value = "60000,600000,6000000")]
    pub readings: Vec<u64>,
    /// Rig time between readings, ms (100: a 10 Hz logger).
    #[arg(long, default_value_t = 100)]
    pub interval_ms: u64,
    /// Buckets asked for over the whole span.
    #[arg(long, default_value_t = 1000)]
    pub buckets: u64,
    /// Timed queries per size.
    #[arg(long, default_value_t = 50)]
    pub queries: u32,
    /// Raw readings fetched in the raw-page measurement (at most the size).
    #[arg(long, default_value_t = 100_000)]
    pub raw: u64,
    /// Durability of the in-process server while it stores.
    #[arg(long, default_value = "normal")]
    pub durability: String,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// One history length's figures.
#[derive(Debug, Serialize)]
pub(crate) struct HistoryRow {
    pub readings: u64,
    pub span_days: f64,
    pub ingest_readings_per_s: f64,
    pub bytes_per_reading: Option<f64>,
    pub bucket_width_s: f64,
    pub buckets_returned: usize,
    pub buckets_p50_ms: f64,
    pub buckets_p99_ms: f64,
    pub buckets_max_ms: f64,
    pub raw_readings: u64,
    pub raw_ms: f64,
    /// The same readings in READING_LAYOUT_COLUMNS.
    pub raw_columns_ms: f64,
    /// Every stored reading of the channel in columns, call after call
    /// (each at most the server's `limits.max_query_rows`).
    pub scan_readings: u64,
    pub scan_ms: f64,
}

pub(crate) async fn run(args: &BenchHistoryArgs) -> anyhow::Result<()> {
    if args.readings.contains(&0) || args.interval_ms == 0 || args.buckets == 0 || args.queries == 0
    {
        return Err(super::UsageError(
            "--readings, --interval-ms, --buckets and --queries must be at least 1".into(),
        )
        .into());
    }
    let mut rows = Vec::new();
    for &n in &args.readings {
        let row = measure(args, n).await?;
        if !args.json {
            print_row(&row, rows.is_empty());
        }
        rows.push(row);
    }
    if args.json {
        println!("{}", serde_json::to_string(&rows)?);
    }
    Ok(())
}

/// Stores `n` readings on a fresh server, then times the queries.
async fn measure(args: &BenchHistoryArgs, n: u64) -> anyhow::Result<HistoryRow> {
    let server = LocalServer::start_with(&args.durability, 1, |_| {}).await?;
    let conn = client::connect(&server.addr).await?;
    let id = bench::define_channels(&conn, 1, "daniell").await?.remove(0);
    let step_ns = (args.interval_ms * 1_000_000) as i64;
    let (normal_volts, over_volts) = bench::test_voltages("daniell");
    let load = Load {
        per_channel: n,
        batch: 5_000,
        alert_every: 0,
        t0: client::now_ns() - (n as i64 + 10) * step_ns,
        step_ns,
        normal_volts,
        over_volts,
        batch_interval: None,
        ack_log: None,
    };
    let started = Instant::now();
    let (stored, _) = load
        .clone()
        .stream(conn.clone(), id.clone(), 0.0, bench::AlertClock::default())
        .await?;
    let ingest_s = started.elapsed().as_secs_f64();
    let (start, end) = (load.t0, load.t0 + (n as i64 + 1) * step_ns);
    let width_ns = ((end - start) as u64 / args.buckets).max(1) as i64;
    let mut history = HistoryServiceClient::new(conn.clone());
    let mut latencies = Vec::new();
    let mut last = pb::QueryBucketsResponse::default();
    for _ in 0..args.queries {
        let asked = Instant::now();
        last = history
            .query_buckets(pb::QueryBucketsRequest {
                channel_id: id.clone(),
                start_unix_ns: start,
                end_unix_ns: end,
                bucket_width_ns: width_ns,
            })
            .await?
            .into_inner();
        latencies.push(asked.elapsed().as_secs_f64() * 1e3);
    }
    latencies.sort_by(f64::total_cmp);
    let rows = pb::ReadingLayout::Rows;
    let columns = pb::ReadingLayout::Columns;
    let (raw_readings, raw_ms) = time_raw(&mut history, &id, start, args.raw.min(n), rows).await?;
    let (_, raw_columns_ms) = time_raw(&mut history, &id, start, args.raw.min(n), columns).await?;
    let (scan_readings, scan_ms) = time_scan(&mut history, &id, start).await?;
    let row = HistoryRow {
        readings: stored,
        span_days: (end - start) as f64 / 86_400e9,
        ingest_readings_per_s: stored as f64 / ingest_s,
        bytes_per_reading: server.bytes_per_reading(stored),
        bucket_width_s: last.bucket_width_ns as f64 / 1e9,
        buckets_returned: last.buckets.len(),
        buckets_p50_ms: percentile(&latencies, 0.50),
        buckets_p99_ms: percentile(&latencies, 0.99),
        buckets_max_ms: latencies.last().copied().unwrap_or(0.0),
        raw_readings,
        raw_ms,
        raw_columns_ms,
        scan_readings,
        scan_ms,
    };
    server.stop().await;
    Ok(row)
}

/// Fetches the first `limit` raw readings from `start`: readings, ms.
async fn time_raw(
    history: &mut HistoryServiceClient<client::Conn>,
    id: &str,
    start: i64,
    limit: u64,
    layout: pb::ReadingLayout,
) -> anyhow::Result<(u64, f64)> {
    let asked = Instant::now();
    let limit = u32::try_from(limit).unwrap_or(u32::MAX);
    let (got, _) = fetch(history, id, start, limit, layout, None).await?;
    Ok((got, asked.elapsed().as_secs_f64() * 1e3))
}

/// Reads every reading from `start` on in columns, a call at a time, each
/// going on after the last (time, seq) the one before returned.
async fn time_scan(
    history: &mut HistoryServiceClient<client::Conn>,
    id: &str,
    start: i64,
) -> anyhow::Result<(u64, f64)> {
    let asked = Instant::now();
    let (mut total, mut after) = (0u64, None);
    loop {
        let from = after.map_or(start, |(time_ns, _)| time_ns);
        let layout = pb::ReadingLayout::Columns;
        let (got, last) = fetch(history, id, from, u32::MAX, layout, after).await?;
        if got == 0 {
            break;
        }
        total += got;
        after = last;
    }
    Ok((total, asked.elapsed().as_secs_f64() * 1e3))
}

/// One QueryReadings call from `start`: readings past `after` (time, seq)
/// and the last of them.
async fn fetch(
    history: &mut HistoryServiceClient<client::Conn>,
    id: &str,
    start: i64,
    limit: u32,
    layout: pb::ReadingLayout,
    after: Option<(i64, u64)>,
) -> anyhow::Result<(u64, Option<(i64, u64)>)> {
    let mut pages = history
        .query_readings(pb::QueryReadingsRequest {
            channel_id: id.to_string(),
            start_unix_ns: start,
            limit,
            layout: layout as i32,
            ..Default::default()
        })
        .await?
        .into_inner();
    let (mut got, mut last) = (0u64, None);
    let past = |at: (i64, u64)| after.is_none_or(|a| at > a);
    while let Some(page) = pages.next().await {
        let page = page?;
        for r in &page.readings {
            if past((r.time_unix_ns, r.seq)) {
                got += 1;
                last = Some((r.time_unix_ns, r.seq));
            }
        }
        if let Some(c) = page.columns {
            for (&time_ns, &seq) in c.time_unix_ns.iter().zip(&c.seq) {
                if past((time_ns, seq)) {
                    got += 1;
                    last = Some((time_ns, seq));
                }
            }
        }
    }
    Ok((got, last))
}

fn print_row(r: &HistoryRow, header: bool) {
    if header {
        println!(
            "{:>10} {:>8} {:>10} {:>7} {:>8} {:>7} {:>8} {:>8} {:>8} {:>12} {:>10} {:>18}",
            "readings",
            "span_d",
            "ingest/s",
            "B/rdg",
            "width_s",
            "buckets",
            "p50_ms",
            "p99_ms",
            "max_ms",
            "raw_ms",
            "columns_ms",
            "scan_ms"
        );
    }
    println!(
        "{:>10} {:>8.2} {:>10.0} {:>7.1} {:>8.0} {:>7} {:>8.1} {:>8.1} {:>8.1} {:>12} {:>10.0} {:>18}",
        r.readings,
        r.span_days,
        r.ingest_readings_per_s,
        r.bytes_per_reading.unwrap_or(f64::NAN),
        r.bucket_width_s,
        r.buckets_returned,
        r.buckets_p50_ms,
        r.buckets_p99_ms,
        r.buckets_max_ms,
        format!("{:.0} ({})", r.raw_ms, r.raw_readings),
        r.raw_columns_ms,
        format!("{:.0} ({})", r.scan_ms, r.scan_readings)
    );
}
