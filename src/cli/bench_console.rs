//! `gibbsline bench console`: what a person at the console and a webhook
//! receiver see while the server ingests at full tilt. Starts a server in
//! this process with its console, a webhook receiver on loopback, and N
//! channels; then (1) times the overview the bench page loads, (2) runs a
//! paced load with alerts and times, for one followed channel, each
//! batch's ack to the live feed event that carries it, and for every
//! raised alert, the batch's ack to the signed POST reaching the receiver.

use super::bench::{
    AckLog, AlertClock, Load, LocalServer, define_channels, percentile, test_voltages,
};
use super::client;
use serde::Serialize;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};
use tokio::io::{AsyncReadExt, AsyncWriteExt};

#[derive(Debug, clap::Args)]
pub(crate) struct BenchConsoleArgs {
    /// Channels streamed at once.
    #[arg(long, default_value_t = 100)]
    pub channels: u32,
    /// Offered load during the live phase, readings/s over all channels.
    #[arg(long, default_value_t = 150_000.0)]
    pub rate: f64,
    /// Length of the live phase.
    #[arg(long, default_value_t = 20.0)]
    pub seconds: f64,
    /// One reading in this many goes over the limit (an alert raised and
    /// cleared; each raise is a webhook delivery).
    #[arg(long, default_value_t = 3_000)]
    pub alert_every: u64,
    /// Overview loads timed.
    #[arg(long, default_value_t = 50)]
    pub loads: u32,
    /// The database durability: full, normal or off.
    #[arg(long, default_value = "normal")]
    pub durability: String,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Serialize)]
struct ConsoleReport {
    channels: u32,
    overview_p50_ms: f64,
    overview_p99_ms: f64,
    overview_bytes: usize,
    page_assets_ms: f64,
    offered_rate: f64,
    readings_per_s: f64,
    live_events: usize,
    live_p50_ms: f64,
    live_p99_ms: f64,
    webhook_deliveries: usize,
    webhook_p50_ms: Option<f64>,
    webhook_p99_ms: Option<f64>,
}

const BATCH: u64 = 100;
const SECRET: &str = "bench-console-webhook-secret";

pub(crate) async fn run(args: &BenchConsoleArgs) -> anyhow::Result<()> {
    if args.channels == 0 || args.rate <= 0.0 || args.seconds <= 0.0 {
        return Err(
            super::UsageError("--channels, --rate and --seconds must be above 0".into()).into(),
        );
    }
    let clock = AlertClock::default();
    let hook = receiver(clock.clone()).await?;
    let http = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let web = http.local_addr()?;
    let tune = |c: &mut gibbsline::config::ServerConfig| {
        c.notify.webhook = vec![gibbsline::notify::WebhookSpec {
            name: Some("bench".into()),
            url: format!("http://{hook}/hook"),
            min_severity: gibbsline::alerts::Severity::Info,
            channels: vec![],
            secret: SECRET.into(),
            allow_link_local: false,
        }];
    };
    let local =
        LocalServer::start_serving(&args.durability, args.channels, tune, Some(http)).await?;
    let conn = client::connect(&local.addr).await?;
    let ids = define_channels(&conn, args.channels, "daniell").await?;
    let (normal_volts, over_volts) = test_voltages("daniell");
    let load = Load {
        per_channel: 200,
        batch: BATCH,
        alert_every: 0,
        t0: client::now_ns() - 3_600_000_000_000,
        step_ns: 1_000_000,
        normal_volts,
        over_volts,
        batch_interval: None,
        ack_log: None,
    };
    load.drive(&conn, ids.clone(), &AlertClock::default())
        .await?;
    let (overview, overview_bytes) = time_overview(web, args.loads).await?;
    let page_assets_ms = time_assets(web).await?;

    let live = live_phase(args, &conn, &ids, load, web, &clock).await?;
    tokio::time::sleep(Duration::from_secs(2)).await;
    let webhook = clock.latencies_ms();
    local.stop().await;
    let report = ConsoleReport {
        channels: args.channels,
        overview_p50_ms: percentile(&overview, 0.5),
        overview_p99_ms: percentile(&overview, 0.99),
        overview_bytes,
        page_assets_ms,
        offered_rate: args.rate,
        readings_per_s: live.readings_per_s,
        live_events: live.latencies_ms.len(),
        live_p50_ms: percentile(&live.latencies_ms, 0.5),
        live_p99_ms: percentile(&live.latencies_ms, 0.99),
        webhook_deliveries: webhook.len(),
        webhook_p50_ms: (!webhook.is_empty()).then(|| percentile(&webhook, 0.5)),
        webhook_p99_ms: (!webhook.is_empty()).then(|| percentile(&webhook, 0.99)),
    };
    print_report(&report, args.json)
}

/// What the paced phase measured.
struct LivePhase {
    readings_per_s: f64,
    /// Sorted ack → live event times of the followed channel, ms.
    latencies_ms: Vec<f64>,
}

/// The paced load with alerts, the first channel followed on the live feed.
async fn live_phase(
    args: &BenchConsoleArgs,
    conn: &client::Conn,
    ids: &[String],
    mut load: Load,
    web: std::net::SocketAddr,
    clock: &AlertClock,
) -> anyhow::Result<LivePhase> {
    let feed = LiveFeed::open(web, &ids[0]).await?;
    let acks: AckLog = Arc::default();
    let per_channel = (args.rate * args.seconds / f64::from(args.channels)).ceil() as u64;
    load.t0 = client::now_ns() - 60_000_000_000 - per_channel as i64 * 1_000_000;
    load.per_channel = per_channel;
    load.alert_every = args.alert_every;
    load.ack_log = Some(acks.clone());
    load.batch_interval = Some(Duration::from_secs_f64(
        BATCH as f64 * f64::from(args.channels) / args.rate,
    ));
    let start = Instant::now();
    let (accepted, _) = load.drive(conn, ids.to_vec(), clock).await?;
    let elapsed = start.elapsed().as_secs_f64();
    // The last batches' events are still on their way.
    tokio::time::sleep(Duration::from_millis(500)).await;
    let latencies_ms = feed.latencies_ms(&acks.lock().expect("poisoned"), &ids[0]);
    Ok(LivePhase {
        readings_per_s: accepted as f64 / elapsed,
        latencies_ms,
    })
}

/// A webhook receiver on loopback: each raised alert's arrival goes to `clock`.
async fn receiver(clock: AlertClock) -> anyhow::Result<std::net::SocketAddr> {
    let app = axum::Router::new().route(
        "/hook",
        axum::routing::post(move |body: axum::body::Bytes| {
            let clock = clock.clone();
            async move {
                if let Ok(v) = serde_json::from_slice::<serde_json::Value>(&body)
                    && v["event"] == "raised"
                {
                    let channel = v["alert"]["channel_id"]
                        .as_str()
                        .unwrap_or_default()
                        .to_string();
                    clock.arrived(channel, v["alert"]["raised_seq"].as_u64().unwrap_or(0));
                }
                axum::http::StatusCode::NO_CONTENT
            }
        }),
    );
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
    let addr = listener.local_addr()?;
    tokio::spawn(async move {
        let _ = axum::serve(listener, app).await;
    });
    Ok(addr)
}

/// One GET on a fresh connection (HTTP/1.0: the body ends at close).
async fn get(addr: std::net::SocketAddr, path: &str) -> anyhow::Result<Vec<u8>> {
    let mut s = tokio::net::TcpStream::connect(addr).await?;
    s.write_all(format!("GET {path} HTTP/1.0\r\nHost: {addr}\r\n\r\n").as_bytes())
        .await?;
    let mut out = Vec::new();
    s.read_to_end(&mut out).await?;
    if !out.starts_with(b"HTTP/1.0 200") && !out.starts_with(b"HTTP/1.1 200") {
        anyhow::bail!(
            "GET {path}: {}",
            String::from_utf8_lossy(&out[..out.len().min(200)])
        );
    }
    Ok(out)
}

/// `/api/v1/overview`, `loads` times: sorted ms, and its size.
async fn time_overview(
    addr: std::net::SocketAddr,
    loads: u32,
) -> anyhow::Result<(Vec<f64>, usize)> {
    let mut times = Vec::new();
    let mut bytes = 0;
    for _ in 0..loads.max(1) {
        let t = Instant::now();
        bytes = get(addr, "/api/v1/overview").await?.len();
        times.push(t.elapsed().as_secs_f64() * 1e3);
    }
    times.sort_by(f64::total_cmp);
    Ok((times, bytes))
}

/// The page and its script and style, one after another, ms.
async fn time_assets(addr: std::net::SocketAddr) -> anyhow::Result<f64> {
    let t = Instant::now();
    for path in ["/", "/app.js", "/plot.js", "/style.css"] {
        get(addr, path).await?;
    }
    Ok(t.elapsed().as_secs_f64() * 1e3)
}

/// The live feed of one channel, read as it comes: each `readings`
/// event's newest seq and its arrival.
struct LiveFeed {
    seen: Arc<Mutex<Vec<(u64, Instant)>>>,
    task: tokio::task::JoinHandle<()>,
}

impl LiveFeed {
    async fn open(addr: std::net::SocketAddr, channel_id: &str) -> anyhow::Result<LiveFeed> {
        let mut s = tokio::net::TcpStream::connect(addr).await?;
        let path = format!("/api/v1/live?channel_id={channel_id}");
        s.write_all(format!("GET {path} HTTP/1.0\r\nHost: {addr}\r\n\r\n").as_bytes())
            .await?;
        let seen: Arc<Mutex<Vec<(u64, Instant)>>> = Arc::default();
        let out = seen.clone();
        let task = tokio::spawn(async move {
            let mut buf = Vec::new();
            let mut chunk = vec![0u8; 64 * 1024];
            while let Ok(n) = s.read(&mut chunk).await {
                if n == 0 {
                    return;
                }
                let at = Instant::now();
                buf.extend_from_slice(&chunk[..n]);
                while let Some(end) = find(&buf, b"\n\n") {
                    let block: Vec<u8> = buf.drain(..end + 2).collect();
                    if let Some(seq) = newest_seq(&block) {
                        out.lock().expect("poisoned").push((seq, at));
                    }
                }
            }
        });
        Ok(LiveFeed { seen, task })
    }

    /// For each acked batch of `channel_id`: ack → the first live event
    /// holding its last reading, ms (0 when the event came first).
    fn latencies_ms(&self, acks: &[(String, u64, Instant)], channel_id: &str) -> Vec<f64> {
        self.task.abort();
        let seen = self.seen.lock().expect("poisoned");
        let mut out: Vec<f64> = acks
            .iter()
            .filter(|(c, _, _)| c == channel_id)
            .filter_map(|(_, hi, acked)| {
                seen.iter()
                    .find(|(seq, _)| seq >= hi)
                    .map(|(_, at)| at.saturating_duration_since(*acked).as_secs_f64() * 1e3)
            })
            .collect();
        out.sort_by(f64::total_cmp);
        out
    }
}

fn find(hay: &[u8], needle: &[u8]) -> Option<usize> {
    hay.windows(needle.len()).position(|w| w == needle)
}

/// The newest seq of a `readings` event block.
fn newest_seq(block: &[u8]) -> Option<u64> {
    let text = std::str::from_utf8(block).ok()?;
    if !text.lines().any(|l| l == "event: readings") {
        return None;
    }
    let data = text.lines().find_map(|l| l.strip_prefix("data: "))?;
    let v: serde_json::Value = serde_json::from_str(data).ok()?;
    v["readings"]
        .as_array()?
        .iter()
        .filter_map(|r| r["seq"].as_u64())
        .max()
}

fn print_report(r: &ConsoleReport, json: bool) -> anyhow::Result<()> {
    if json {
        println!("{}", serde_json::to_string_pretty(r)?);
        return Ok(());
    }
    println!("console bench, {} channels", r.channels);
    println!(
        "  overview JSON: p50 {:.1} ms, p99 {:.1} ms ({} bytes); page, script and style: {:.1} ms",
        r.overview_p50_ms, r.overview_p99_ms, r.overview_bytes, r.page_assets_ms
    );
    println!(
        "  live feed at {:.0} readings/s offered ({:.0} taken): ack → event p50 {:.1} ms, p99 {:.1} ms over {} batches",
        r.offered_rate, r.readings_per_s, r.live_p50_ms, r.live_p99_ms, r.live_events
    );
    match (r.webhook_p50_ms, r.webhook_p99_ms) {
        (Some(p50), Some(p99)) => println!(
            "  webhook: ack → receiver p50 {p50:.1} ms, p99 {p99:.1} ms over {} alerts",
            r.webhook_deliveries
        ),
        _ => println!("  webhook: no alert arrived"),
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_newest_seq_of_a_readings_event() {
        let block = b"event: readings\ndata: {\"readings\":[{\"seq\":4},{\"seq\":9}]}\n\n";
        assert_eq!(newest_seq(block), Some(9));
        assert_eq!(newest_seq(b"event: alert\ndata: {}\n\n"), None);
    }
}
