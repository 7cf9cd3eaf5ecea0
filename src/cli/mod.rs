//! Command-line definitions (stage one: flags only, no I/O) and dispatch.

pub mod alerts;
pub mod bench;
pub mod channels;
pub mod client;
pub mod cycles;
pub mod demo;
pub mod eval;
pub mod names;
pub mod output;
pub mod readings;
pub mod rig;
pub mod simulate;
pub mod state;

/// Where the client commands look for a server unless told.
pub const DEFAULT_ADDR: &str = "127.0.0.1:50051";

/// Who did an operator action and why, as every such command takes it.
#[derive(Debug, clap::Args)]
pub struct Signed {
    /// Your name, stored with the action.
    #[arg(long)]
    pub by: String,
    #[arg(long, default_value = "")]
    pub note: String,
}

use clap::{Args, Parser, Subcommand};
use std::path::PathBuf;

/// An error in what the user typed: exit code 2, one line naming the flag.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct UsageError(pub String);

#[derive(Debug, Parser)]
#[command(
    name = "gibbsline",
    version,
    about = "Electrochemical cell readings in, thermodynamic state, SOC and alerts out"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Thermodynamic state of one cell from a voltage, or the OCV at an SOC.
    Eval(EvalArgs),
    /// List the known chemistries with their parameters and sources.
    Chemistries(ChemistriesArgs),
    /// Run the gRPC service on an embedded SQLite file.
    Serve(ServeArgs),
    /// Benchmarks.
    #[command(subcommand)]
    Bench(BenchCommand),
    /// Configuration files.
    #[command(subcommand)]
    Config(ConfigCommand),
    /// The whole job in one process: server, simulated bench, live table, alerts.
    Demo(demo::DemoArgs),
    /// Simulated rigs.
    #[command(subcommand)]
    Rig(simulate::RigCommand),
    /// Stored readings of a channel, raw or in time buckets.
    Readings(readings::ReadingsArgs),
    /// Live state of one or all channels.
    State(state::StateArgs),
    /// Watch, list and acknowledge alerts.
    #[command(subcommand)]
    Alerts(alerts::AlertsCommand),
    /// Define and inspect channels.
    #[command(subcommand)]
    Channels(channels::ChannelsCommand),
    /// Charge/discharge cycles of a channel with efficiencies.
    Cycles(cycles::CyclesArgs),
    /// Bearer tokens for the config's [[token]] table.
    #[command(subcommand)]
    Token(TokenCommand),
}

#[derive(Debug, Subcommand)]
pub enum TokenCommand {
    /// Make a new random token; prints it once, with the [[token]] entry to paste into the config.
    New {
        /// Who will hold it (logged on denial), e.g. "bench-3 rig PC".
        #[arg(long)]
        name: String,
        /// rig, viewer, operator or admin.
        #[arg(long)]
        role: String,
        /// For rigs: a channel it may stream (repeat; none = every channel).
        #[arg(long)]
        channel: Vec<String>,
    },
    /// Print the SHA-256 (hex) of a token read from standard input, for the config's `sha256`.
    Hash,
}

#[derive(Debug, Subcommand)]
pub enum BenchCommand {
    /// Sustained ingest rate, ack latency and alert latency.
    Ingest(bench::BenchIngestArgs),
    /// Per-reading cost of the pure ingest work, with and without the estimator.
    Derive(bench::BenchDeriveArgs),
}

#[derive(Debug, Args)]
pub struct ServeArgs {
    /// Configuration file (TOML); flags and GIBBSLINE_* variables override it.
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Address to listen on [default: 127.0.0.1:50051].
    #[arg(long)]
    pub listen: Option<String>,
    /// SQLite database file, created and migrated on first start [default: gibbsline.db].
    #[arg(long)]
    pub db: Option<PathBuf>,
    /// Commit durability: full (survives power loss), normal (survives a crash), off.
    #[arg(long)]
    pub durability: Option<String>,
    /// Serve Prometheus metrics on this address.
    #[arg(long)]
    pub metrics_listen: Option<String>,
    /// Confirm serving plain-text gRPC beyond loopback.
    #[arg(long)]
    pub allow_insecure: bool,
    /// Extra chemistry definitions (TOML), may repeat.
    #[arg(long)]
    pub chemistry_file: Vec<PathBuf>,
    /// Print the effective configuration as TOML and exit.
    #[arg(long)]
    pub print_config: bool,
}

#[derive(Debug, Subcommand)]
pub enum ConfigCommand {
    /// Validate a configuration file without starting anything; the TLS
    /// files it names are read too, as a start would.
    Check {
        file: PathBuf,
        /// Check the text only, not the TLS files it names (for a config
        /// written on another machine).
        #[arg(long)]
        no_files: bool,
    },
}

#[derive(Debug, Args)]
pub struct EvalArgs {
    /// Chemistry id (see `gibbsline chemistries`).
    #[arg(long)]
    pub chemistry: String,
    /// Measured stack voltage, V.
    #[arg(long, allow_negative_numbers = true)]
    pub volts: Option<f64>,
    /// State of charge, 0–1: prints the open-circuit voltage expected there.
    #[arg(long)]
    pub soc: Option<f64>,
    /// Cell temperature, °C.
    #[arg(long, default_value_t = 25.0, allow_negative_numbers = true)]
    pub temp_c: f64,
    /// Cells in series in the stack.
    #[arg(long, default_value_t = 1)]
    pub cells: u32,
    /// Replace E° at 298.15 K (e.g. with a fitted formal potential), V.
    #[arg(long, allow_negative_numbers = true)]
    pub e_standard_v: Option<f64>,
    /// Band around 0 V per cell treated as equilibrium, mV.
    #[arg(long, default_value_t = 1.0)]
    pub equilibrium_tolerance_mv: f64,
    /// Extra chemistry definitions (TOML), may repeat.
    #[arg(long)]
    pub chemistry_file: Vec<PathBuf>,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
}

#[derive(Debug, Args)]
pub struct ChemistriesArgs {
    /// Extra chemistry definitions (TOML), may repeat.
    #[arg(long)]
    pub chemistry_file: Vec<PathBuf>,
    /// Print JSON with every parameter and its sources.
    #[arg(long)]
    pub json: bool,
}

pub fn dispatch(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Eval(args) => eval::run_eval(&args),
        Command::Chemistries(args) => eval::run_chemistries(&args),
        Command::Serve(args) => serve(&args),
        Command::Bench(BenchCommand::Ingest(args)) => block_on(bench::run(&args)),
        Command::Bench(BenchCommand::Derive(args)) => bench::derive(&args),
        Command::Demo(args) => block_on(demo::run(&args)),
        Command::Rig(cmd) => block_on(simulate::run(&cmd)),
        Command::Readings(args) => block_on(readings::run(&args)),
        Command::State(args) => block_on(state::run(&args)),
        Command::Alerts(cmd) => block_on(alerts::run(&cmd)),
        Command::Channels(cmd) => block_on(channels::run(&cmd)),
        Command::Cycles(args) => block_on(cycles::run(&args)),
        Command::Token(cmd) => token(&cmd),
        Command::Config(ConfigCommand::Check { file, no_files }) => {
            let config = load_config(Some(&file), &std::collections::BTreeMap::new())?;
            config
                .check_exposure()
                .map_err(|e| UsageError(format!("{}: {e}", file.display())))?;
            if !no_files {
                config
                    .read_tls()
                    .map_err(|e| UsageError(format!("{}: {e}", file.display())))?;
            }
            println!(
                "{}: ok ({} channels, {} chemistries)",
                file.display(),
                config.channel.len(),
                config.chemistry.len()
            );
            Ok(())
        }
    }
}

fn token(cmd: &TokenCommand) -> anyhow::Result<()> {
    use gibbsline::auth::{Role, TokenSpec, sha256_hex};
    match cmd {
        TokenCommand::New {
            name,
            role,
            channel,
        } => {
            let role: Role = role
                .parse()
                .map_err(|e| UsageError(format!("--role {e}")))?;
            if role != Role::Rig && !channel.is_empty() {
                return Err(
                    UsageError("--channel: only a rig token is held to channels".into()).into(),
                );
            }
            // 32 bytes from the kernel's CSPRNG: 256 bits, beyond guessing.
            let mut secret = [0u8; 32];
            std::io::Read::read_exact(&mut std::fs::File::open("/dev/urandom")?, &mut secret)?;
            let token: String = std::iter::once("gl_".to_string())
                .chain(secret.iter().map(|b| format!("{b:02x}")))
                .collect();
            let spec = TokenSpec {
                name: name.clone(),
                role,
                sha256: sha256_hex(&token),
                channels: channel.clone(),
            };
            #[derive(serde::Serialize)]
            struct Entry<'a> {
                token: [&'a TokenSpec; 1],
            }
            println!(
                "# Give this token to {name:?}; it is shown only now (the config keeps its SHA-256):"
            );
            println!("#   GIBBSLINE_TOKEN={token}");
            print!("{}", toml::to_string(&Entry { token: [&spec] })?);
            Ok(())
        }
        TokenCommand::Hash => {
            let mut line = String::new();
            std::io::stdin().read_line(&mut line)?;
            let token = line.trim();
            if token.is_empty() {
                return Err(UsageError("standard input: no token given".into()).into());
            }
            println!("{}", sha256_hex(token));
            Ok(())
        }
    }
}

/// Reads and validates a config file (or none) with environment overrides.
pub fn load_config(
    path: Option<&std::path::Path>,
    env: &std::collections::BTreeMap<String, String>,
) -> anyhow::Result<gibbsline::config::ServerConfig> {
    let (label, text) = match path {
        Some(p) => (
            p.display().to_string(),
            std::fs::read_to_string(p)
                .map_err(|e| UsageError(format!("--config {}: {e}", p.display())))?,
        ),
        None => ("(defaults)".to_string(), String::new()),
    };
    Ok(gibbsline::config::load(&label, &text, env).map_err(|e| UsageError(e.to_string()))?)
}

fn serve(args: &ServeArgs) -> anyhow::Result<()> {
    let config = resolve_serve_config(args)?;
    if args.print_config {
        print!("{}", toml::to_string(&config)?);
        return Ok(());
    }
    config.check_exposure().map_err(UsageError)?;
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into()),
        )
        .init();
    let extra = user_chemistries(&args.chemistry_file, &config)?;
    // Each connection is a descriptor; the common soft limit of 1024 would
    // make a few hundred idle clients lock the rest out. Raised to the hard
    // limit (the accept loop still backs off if even that runs out).
    match rlimit::increase_nofile_limit(u64::MAX) {
        Ok(n) => tracing::info!(nofile = n, "open-file limit"),
        Err(e) => tracing::warn!(error = %e, "could not raise the open-file limit"),
    }
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(async {
        let listener = tokio::net::TcpListener::bind(&config.listen)
            .await
            .map_err(|e| UsageError(format!("listen {}: {e}", config.listen)))?;
        let metrics_listener = match &config.metrics_listen {
            Some(m) => Some(
                tokio::net::TcpListener::bind(m)
                    .await
                    .map_err(|e| UsageError(format!("metrics_listen {m}: {e}")))?,
            ),
            None => None,
        };
        let app_config = gibbsline::app::Config {
            db_path: config.db.clone().into(),
            durability: config.durability,
            extra_chemistries: extra,
            channels: config.channel.clone(),
            metrics_listener,
            tokens: config.token.clone(),
            tls: config.read_tls().map_err(UsageError)?,
            limits: config.limits,
        };
        gibbsline::app::run(app_config, listener, shutdown_signal()).await?;
        Ok(())
    })
}

/// File, then environment, then flags: the one validated server config.
fn resolve_serve_config(args: &ServeArgs) -> anyhow::Result<gibbsline::config::ServerConfig> {
    let env: std::collections::BTreeMap<String, String> = std::env::vars()
        .filter(|(k, _)| k.starts_with("GIBBSLINE_"))
        .collect();
    let mut config = load_config(args.config.as_deref(), &env)?;
    if let Some(l) = &args.listen {
        config.listen = l.clone();
    }
    if let Some(db) = &args.db {
        config.db = db.display().to_string();
    }
    if let Some(d) = &args.durability {
        config.durability = d
            .parse()
            .map_err(|e| UsageError(format!("--durability {e}")))?;
    }
    if let Some(m) = &args.metrics_listen {
        config.metrics_listen = Some(m.clone());
    }
    config.allow_insecure |= args.allow_insecure;
    Ok(config)
}

/// The chemistries of `--chemistry-file` files and of the config file.
fn user_chemistries(
    files: &[PathBuf],
    config: &gibbsline::config::ServerConfig,
) -> anyhow::Result<Vec<gibbsline::electrochem::Chemistry>> {
    let mut registry = eval::load_registry(files)?;
    for spec in &config.chemistry {
        let chem = spec
            .validate(false)
            .map_err(|e| UsageError(e.to_string()))?;
        registry
            .insert_user(chem)
            .map_err(|e| UsageError(e.to_string()))?;
    }
    Ok(registry
        .iter()
        .filter(|c| !c.builtin)
        .map(|c| (**c).clone())
        .collect())
}

async fn shutdown_signal() {
    let ctrl_c = tokio::signal::ctrl_c();
    #[cfg(unix)]
    {
        let mut term =
            match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
                Ok(s) => s,
                Err(_) => {
                    let _ = ctrl_c.await;
                    return;
                }
            };
        tokio::select! {
            _ = ctrl_c => {}
            _ = term.recv() => {}
        }
    }
    #[cfg(not(unix))]
    {
        let _ = ctrl_c.await;
    }
}

fn block_on<F: std::future::Future<Output = anyhow::Result<()>>>(f: F) -> anyhow::Result<()> {
    tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?
        .block_on(f)
}

/// Parses durations like 90s, 5m, 2h, 1d, 250ms (a bare number is seconds).
pub fn parse_duration(text: &str) -> Result<std::time::Duration, String> {
    let t = text.trim();
    let split = t.find(|c: char| c.is_ascii_alphabetic()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let value: f64 = num
        .parse()
        .map_err(|_| format!("{text:?} is not a duration like 90s, 5m or 2h"))?;
    let scale = match unit {
        "" | "s" => 1.0,
        "ms" => 1e-3,
        "m" | "min" => 60.0,
        "h" => 3600.0,
        "d" => 86_400.0,
        other => {
            return Err(format!(
                "unknown unit {other:?} in {text:?} (use ms, s, m, h or d)"
            ));
        }
    };
    let secs = value * scale;
    if !(secs.is_finite() && (0.0..1e9).contains(&secs)) {
        return Err(format!("{text:?} is out of range"));
    }
    Ok(std::time::Duration::from_secs_f64(secs))
}
