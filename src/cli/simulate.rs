//! `gibbsline rig simulate`: the simulated bench as its own process,
//! streaming to a server and resuming after restarts.

use super::{DEFAULT_ADDR, UsageError, rig};
use std::time::Duration;

#[derive(Debug, clap::Subcommand)]
pub(crate) enum RigCommand {
    /// Read real instruments into a local spool and stream them to a server.
    Run {
        /// The agent's file (`connect`, `spool`, `[[source]]`).
        #[arg(long)]
        config: std::path::PathBuf,
    },
    /// Check a rig agent's file as `rig run` would read it, without
    /// touching an instrument, the spool or the server.
    Check {
        /// The agent's file.
        file: std::path::PathBuf,
    },
    /// Stream the simulated bench to a server; resumes after restarts.
    Simulate {
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
        /// How many simulated channels (the bench's four, repeated).
        #[arg(long, default_value_t = 4)]
        channels: usize,
        /// Simulated seconds per real second.
        #[arg(long, default_value_t = 60.0)]
        speed: f64,
        /// Stop after this long (default: run until Ctrl-C).
        #[arg(long, value_parser = super::parse_duration)]
        duration: Option<Duration>,
    },
}

pub(crate) async fn run(cmd: &RigCommand) -> anyhow::Result<()> {
    match cmd {
        RigCommand::Run { config } => super::agent::run(config).await,
        RigCommand::Check { file } => super::agent::check(file),
        RigCommand::Simulate {
            connect,
            channels,
            speed,
            duration,
        } => simulate(connect, *channels, *speed, *duration).await,
    }
}

/// The simulated bench, streaming to `connect`.
async fn simulate(
    connect: &str,
    channels: usize,
    speed: f64,
    duration: Option<Duration>,
) -> anyhow::Result<()> {
    if channels == 0 || channels > 10_000 {
        return Err(UsageError(format!("--channels {channels}: must be from 1 to 10000")).into());
    }
    if !(speed.is_finite() && speed > 0.0 && speed <= 10_000.0) {
        return Err(UsageError(format!(
            "--speed {speed}: must be above 0 and at most 10000"
        ))
        .into());
    }
    let sim = rig::harbour_lane(channels, 11);
    rig::define_channels(connect, &sim).await?;
    let stats = std::sync::Arc::new(rig::RigStats::default());
    let stop = stats.clone();
    tokio::spawn(async move {
        let _ = tokio::signal::ctrl_c().await;
        stop.stop.store(true, std::sync::atomic::Ordering::Relaxed);
    });
    let opts = rig::RigOptions {
        speed,
        readings_per_sim_s: 1.0,
        duration,
        quiet: false,
    };
    rig::run(connect.to_string(), sim, opts, stats.clone()).await?;
    use std::sync::atomic::Ordering::Relaxed;
    println!(
        "rig: {} readings sent, {} acknowledged, {} reconnects",
        stats.sent.load(Relaxed),
        stats.acked.load(Relaxed),
        stats.reconnects.load(Relaxed)
    );
    Ok(())
}
