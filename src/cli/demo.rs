//! `gibbsline demo`: the server on an embedded SQLite file and the
//! simulated Harbour Lane rig in one process, talking real gRPC over
//! loopback, with a live table and the alerts as they arrive.

use super::client;
use super::rig::{self, RigOptions, RigStats};
use crate::cli::names::{kind_label, mode_name, severity_label};
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use std::io::{IsTerminal, Write};
use std::path::PathBuf;
use std::sync::atomic::Ordering;
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio_stream::StreamExt;

#[derive(Debug, clap::Args)]
pub(crate) struct DemoArgs {
    /// How long to run, e.g. 60s, 5m; Ctrl-C ends it sooner.
    #[arg(long, default_value = "60s", value_parser = super::parse_duration)]
    pub duration: Duration,
    /// Simulated seconds per real second.
    #[arg(long, default_value_t = 120.0)]
    pub speed: f64,
    /// SQLite file for the demo (kept afterwards for querying).
    #[arg(long, default_value = "gibbsline-demo.db")]
    pub db: PathBuf,
    /// Address for the demo server.
    #[arg(long, default_value = "127.0.0.1:50051")]
    pub listen: String,
    /// Address of the web console for the demo ("off" for none).
    #[arg(long, default_value = gibbsline::config::DEFAULT_HTTP_LISTEN)]
    pub http_listen: String,
}

type ServerTask = tokio::task::JoinHandle<Result<(), gibbsline::app::AppError>>;

/// The demo's own server on embedded SQLite: its address, what stops it,
/// and its task.
async fn start_server(
    args: &DemoArgs,
) -> anyhow::Result<(String, tokio::sync::oneshot::Sender<()>, ServerTask)> {
    let listener = tokio::net::TcpListener::bind(&args.listen)
        .await
        .map_err(|e| {
            super::UsageError(format!(
                "--listen {}: {e} (another server running? pick another address)",
                args.listen
            ))
        })?;
    let addr = listener.local_addr()?.to_string();
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let config =
        gibbsline::config::ServerConfig::for_db(&args.db, gibbsline::store::Durability::Normal);
    let mut listeners = gibbsline::app::Listeners::grpc_only(listener);
    if args.http_listen != "off" {
        listeners.http = super::serve::bind_console(&args.http_listen).await?;
        match &listeners.http {
            Some(l) => println!("console: http://{}/", l.local_addr()?),
            // Said on stdout, where the demo's user looks: what answers on
            // that port now is another server, with other data.
            None => println!(
                "console: not served: {} is in use by another program (what answers there is not this demo); run with --http-listen 127.0.0.1:8090, say",
                args.http_listen
            ),
        }
    }
    let server = tokio::spawn(gibbsline::app::run(config, listeners, async move {
        let _ = stop_rx.await;
    }));
    Ok((addr, stop_tx, server))
}

pub(crate) async fn run(args: &DemoArgs) -> anyhow::Result<()> {
    if !(args.speed.is_finite() && args.speed > 0.0 && args.speed <= 10_000.0) {
        return Err(super::UsageError(format!(
            "--speed {}: must be above 0 and at most 10000",
            args.speed
        ))
        .into());
    }
    let (addr, stop_tx, server) = start_server(args).await?;

    let channels = rig::harbour_lane(4, 11);
    let ids: Vec<String> = channels.iter().map(|c| c.def.channel_id.clone()).collect();
    rig::define_channels(&addr, &channels).await?;
    let stats = Arc::new(RigStats::default());
    let rig_task = tokio::spawn(rig::run(
        addr.clone(),
        channels,
        RigOptions {
            speed: args.speed,
            readings_per_sim_s: 1.0,
            duration: Some(args.duration),
            quiet: true,
        },
        stats.clone(),
    ));

    let channel = client::connect(&addr).await?;
    let alert_lines = watch_alert_lines(channel.clone()).await?;
    let mut history = HistoryServiceClient::new(channel.clone());
    let tty = std::io::stdout().is_terminal();
    let started = tokio::time::Instant::now();
    let mut ctrl_c = Box::pin(tokio::signal::ctrl_c());
    let mut redraw = tokio::time::interval(if tty {
        Duration::from_millis(500)
    } else {
        Duration::from_secs(10)
    });
    println!(
        "gibbsline demo: Harbour Lane bench (invented), {}× speed, database {}",
        args.speed,
        args.db.display()
    );
    println!(
        "monitoring only, not a safety system: it never replaces interlocks, BMS cut-offs or gas detection.\n"
    );
    loop {
        tokio::select! {
            _ = redraw.tick() => {}
            _ = &mut ctrl_c => { stats.stop.store(true, Ordering::Relaxed); break; }
        }
        let table = bench_table(&mut history, &ids).await;
        let elapsed = started.elapsed().as_secs_f64();
        print_frame(args, tty, elapsed, &stats, &alert_lines, &table);
        if rig_task.is_finished() {
            break;
        }
    }
    stats.stop.store(true, Ordering::Relaxed);
    let _ = rig_task.await;
    tokio::time::sleep(Duration::from_millis(200)).await;

    let _ = stop_tx.send(());
    server.await??;
    farewell(args, &stats, &alert_lines);
    Ok(())
}

type AlertLines = Arc<Mutex<Vec<String>>>;

/// Alert events from now on, one line each, collected as they come.
async fn watch_alert_lines(channel: client::Conn) -> anyhow::Result<AlertLines> {
    let alert_lines: AlertLines = Arc::default();
    let lines = alert_lines.clone();
    let mut alerts = AlertServiceClient::new(channel);
    let mut watch = alerts
        .watch_alerts(pb::WatchAlertsRequest {
            after_event_id: u64::MAX >> 1,
            ..Default::default()
        })
        .await?
        .into_inner();
    tokio::spawn(async move {
        while let Some(Ok(m)) = watch.next().await {
            let Some(a) = m.alert else { continue };
            let verb = match pb::AlertEventKind::try_from(m.event) {
                Ok(pb::AlertEventKind::Raised) => "raised ",
                Ok(pb::AlertEventKind::Cleared) => "cleared",
                Ok(pb::AlertEventKind::Acknowledged) => "acked  ",
                _ => continue,
            };
            lines.lock().expect("poisoned").push(format!(
                "#{:<4} {verb} {:<8} {:<13} {:<19} {}",
                a.alert_id,
                severity_label(a.severity),
                a.channel_id,
                kind_label(a.kind),
                a.message
            ));
        }
    });
    Ok(alert_lines)
}

/// One line per channel: mode, volts, amps, °C, SOC, ΔG, η.
async fn bench_table(history: &mut HistoryServiceClient<client::Conn>, ids: &[String]) -> String {
    let mut table = String::new();
    table.push_str(&format!(
        "{:<13} {:<16} {:<12} {:>9} {:>8} {:>7} {:>7} {:>11} {:>8}\n",
        "channel", "chemistry", "mode", "volts", "amps", "°C", "SOC %", "ΔG kJ/mol", "η mV"
    ));
    for id in ids {
        let Ok(state) = history
            .get_channel_state(pb::GetChannelStateRequest {
                channel_id: id.clone(),
            })
            .await
        else {
            continue;
        };
        let state = state.into_inner();
        let chem = state
            .channel
            .as_ref()
            .map(|c| c.chemistry_id.clone())
            .unwrap_or_default();
        match state.latest {
            Some(r) => {
                let d = r.derived.unwrap_or_default();
                table.push_str(&format!(
                    "{:<13} {:<16} {:<12} {:>9.4} {:>8.3} {:>7.2} {:>7} {:>11} {:>8}\n",
                    id,
                    chem,
                    mode_name(d.operating_mode),
                    r.volts,
                    r.amps_charge_positive.unwrap_or(0.0),
                    r.temp_c.unwrap_or(f64::NAN),
                    d.soc_fused
                        .map(|s| format!("{:.1}", s * 100.0))
                        .unwrap_or_else(|| "-".into()),
                    d.delta_g_kj_per_mol
                        .map(|g| format!("{g:.3}"))
                        .unwrap_or_else(|| "-".into()),
                    d.driving_force_v
                        .map(|v| format!("{:+.1}", v * 1e3))
                        .unwrap_or_else(|| "-".into()),
                ));
            }
            None => table.push_str(&format!("{id:<13} {chem:<16} (no readings yet)\n")),
        }
    }
    table
}

/// Redraws the screen (or prints a block when not on a terminal).
fn print_frame(
    args: &DemoArgs,
    tty: bool,
    elapsed: f64,
    stats: &RigStats,
    alert_lines: &AlertLines,
    table: &str,
) {
    let recent: Vec<String> = {
        let l = alert_lines.lock().expect("poisoned");
        l.iter().rev().take(10).rev().cloned().collect()
    };
    let total_alerts = alert_lines.lock().expect("poisoned").len();
    let mut out = String::new();
    if tty {
        out.push_str("\x1b[H\x1b[J");
    }
    out.push_str(&format!(
        "gibbsline demo — {:.0}/{:.0} s, {} readings stored, {} alert events (Ctrl-C to stop)\n\n",
        // The last redraw comes after the run's end: never "20/15 s".
        elapsed.min(args.duration.as_secs_f64()),
        args.duration.as_secs_f64(),
        stats.acked.load(Ordering::Relaxed),
        total_alerts
    ));
    out.push_str(table);
    out.push_str("\nalerts (newest last):\n");
    for l in recent {
        out.push_str(&l);
        out.push('\n');
    }
    print!("{out}");
    let _ = std::io::stdout().flush();
}

/// What was stored, and how to look at it again.
fn farewell(args: &DemoArgs, stats: &RigStats, alert_lines: &AlertLines) {
    let stored = stats.acked.load(Ordering::Relaxed);
    let total_alerts = alert_lines.lock().expect("poisoned").len();
    println!("\ndemo finished: {stored} readings stored, {total_alerts} alert events.");
    println!("database: {}", args.db.display());
    println!("\nlook at it again:");
    println!("  gibbsline serve --db {} &", args.db.display());
    println!("  gibbsline state --connect 127.0.0.1:50051");
    println!("  gibbsline readings --connect 127.0.0.1:50051 --channel hl-vrb-1 --bucket 1m");
    println!(
        "  gibbsline readings --connect 127.0.0.1:50051 --channel hl-pem-stack --format csv > stack.csv"
    );
    println!("  gibbsline alerts list --connect 127.0.0.1:50051");
    println!("  gibbsline cycles --connect 127.0.0.1:50051 --channel hl-vrb-1");
}
