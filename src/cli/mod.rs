//! Command-line definitions (stage one: flags only, no I/O) and dispatch.

pub(crate) mod agent;
pub(crate) mod alerts;
pub(crate) mod bench;
pub(crate) mod bench_baseline;
pub(crate) mod bench_console;
pub(crate) mod bench_history;
pub(crate) mod bench_retention;
pub(crate) mod bench_scale;
pub(crate) mod channels;
pub(crate) mod client;
pub(crate) mod config_check;
pub(crate) mod cycles;
pub(crate) mod db;
pub(crate) mod deliveries;
pub(crate) mod demo;
pub(crate) mod eval;
pub(crate) mod import;
pub(crate) mod names;
pub(crate) mod ocv_fit;
pub(crate) mod output;
pub(crate) mod readings;
pub(crate) mod rig;
pub(crate) mod serve;
pub(crate) mod simulate;
pub(crate) mod state;
pub(crate) mod time;
pub(crate) mod token;

/// Where the client commands look for a server unless told.
pub(crate) const DEFAULT_ADDR: &str = "127.0.0.1:50051";

/// Who did an operator action and why, as every such command takes it.
#[derive(Debug, clap::Args)]
pub(crate) struct Signed {
    /// Your name, stored with the action.
    #[arg(long)]
    pub by: String,
    /// Why, stored with the action (optional).
    #[arg(long, default_value = "")]
    pub note: String,
}

use clap::{Args, Parser, Subcommand};
use std::path::PathBuf;

/// An error in what the user typed: exit code 2, one line naming the flag.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub(crate) struct UsageError(pub String);

#[derive(Debug, Parser)]
#[command(
    name = "gibbsline",
    version,
    about = "Electrochemical cell readings in, thermodynamic state, SOC and alerts out"
)]
pub(crate) struct Cli {
    #[command(subcommand)]
    pub command: Command,
    /// Show times in tables and lines in UTC instead of the local zone.
    #[arg(long, global = true)]
    pub utc: bool,
}

#[derive(Debug, Subcommand)]
pub(crate) enum Command {
    /// Thermodynamic state of one cell from a voltage, or the OCV at an SOC.
    Eval(EvalArgs),
    /// List the known chemistries with their parameters and sources.
    Chemistries(ChemistriesArgs),
    /// Run the service (gRPC, web console, JSON API) on a SQLite file or a PostgreSQL database.
    Serve(ServeArgs),
    /// Benchmarks.
    #[command(subcommand)]
    Bench(BenchCommand),
    /// Configuration files.
    #[command(subcommand)]
    Config(ConfigCommand),
    /// The database: what it holds and what it costs on disk.
    #[command(subcommand)]
    Db(db::DbCommand),
    /// The whole job in one process: server, simulated bench, live table, alerts.
    Demo(demo::DemoArgs),
    /// Rigs: the agent beside real instruments (run, check) and the simulated bench.
    #[command(subcommand)]
    Rig(simulate::RigCommand),
    /// Stored readings of a channel, raw or in time buckets.
    Readings(readings::ReadingsArgs),
    /// A recorded file into a channel's history through the normal ingest
    /// path: as `readings --format csv` writes it, or any layout by `--map`.
    Import(import::ImportArgs),
    /// Live state of one or all channels.
    State(state::StateArgs),
    /// Watch, list and acknowledge alerts.
    #[command(subcommand)]
    Alerts(alerts::AlertsCommand),
    /// Define and inspect channels; anchor SOC, reset a timeline, fit a cell's OCV model.
    #[command(subcommand)]
    Channels(channels::ChannelsCommand),
    /// Charge/discharge cycles of a channel with efficiencies.
    Cycles(cycles::CyclesArgs),
    /// Bearer tokens for the config's [[token]] table.
    #[command(subcommand)]
    Token(TokenCommand),
}

#[derive(Debug, Subcommand)]
pub(crate) enum TokenCommand {
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
pub(crate) enum BenchCommand {
    /// Sustained ingest rate, ack latency and alert latency.
    Ingest(bench::BenchIngestArgs),
    /// Per-reading cost of the pure ingest work, with and without the estimator.
    Derive(bench::BenchDeriveArgs),
    /// QueryBuckets over the whole span at several history lengths.
    History(bench_history::BenchHistoryArgs),
    /// A soak at constant load with retention on: disk over time, ack latency.
    Retention(bench_retention::BenchRetentionArgs),
    /// The console and alert delivery under load: overview load time, live
    /// feed latency, webhook latency.
    Console(bench_console::BenchConsoleArgs),
    /// Ingest on SQLite, on PostgreSQL with one and two servers, and the
    /// failover gap when a PostgreSQL owner is SIGKILLed.
    Scale(bench_scale::BenchScaleArgs),
}

#[derive(Debug, Args)]
pub(crate) struct ServeArgs {
    /// Configuration file (TOML); flags and GIBBSLINE_* variables override it.
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Address to listen on [default: 127.0.0.1:50051].
    #[arg(long)]
    pub listen: Option<String>,
    /// The database: a SQLite file, created and migrated on first start
    /// [default: gibbsline.db], or a postgres:// URL several servers share.
    #[arg(long)]
    pub db: Option<PathBuf>,
    /// On a shared PostgreSQL database: the gRPC address rigs are sent to
    /// for channels this server owns [default: the listen address].
    #[arg(long)]
    pub advertise: Option<String>,
    /// Commit durability: full (survives power loss), normal (survives a crash), off.
    #[arg(long)]
    pub durability: Option<String>,
    /// Serve Prometheus metrics on this address.
    #[arg(long)]
    pub metrics_listen: Option<String>,
    /// Serve the web console and JSON API on this address (default
    /// 127.0.0.1:8080; "off" for none).
    #[arg(long)]
    pub http_listen: Option<String>,
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
pub(crate) enum ConfigCommand {
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
pub(crate) struct EvalArgs {
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
    #[arg(long, allow_negative_numbers = true, alias = "e-standard-v")]
    pub e_standard_298_v: Option<f64>,
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
pub(crate) struct ChemistriesArgs {
    /// Extra chemistry definitions (TOML), may repeat.
    #[arg(long)]
    pub chemistry_file: Vec<PathBuf>,
    /// Print JSON with every parameter and its sources.
    #[arg(long)]
    pub json: bool,
}

pub(crate) fn dispatch(cli: Cli) -> anyhow::Result<()> {
    time::show_utc(cli.utc);
    if only_prints(&cli.command) {
        exit_quietly_when_the_reader_leaves();
    }
    match cli.command {
        Command::Eval(args) => eval::run_eval(&args),
        Command::Chemistries(args) => eval::run_chemistries(&args),
        Command::Serve(args) => serve::run(&args),
        Command::Bench(BenchCommand::Ingest(args)) => block_on(bench::run(&args)),
        Command::Bench(BenchCommand::Derive(args)) => bench::derive(&args),
        Command::Bench(BenchCommand::History(args)) => block_on(bench_history::run(&args)),
        Command::Bench(BenchCommand::Retention(args)) => block_on(bench_retention::run(&args)),
        Command::Bench(BenchCommand::Console(args)) => block_on(bench_console::run(&args)),
        Command::Bench(BenchCommand::Scale(args)) => block_on(bench_scale::run(&args)),
        Command::Demo(args) => block_on(demo::run(&args)),
        Command::Rig(cmd) => block_on(simulate::run(&cmd)),
        Command::Readings(args) => block_on(readings::run(&args)),
        Command::Import(args) => block_on(import::run(&args)),
        Command::State(args) => block_on(state::run(&args)),
        Command::Alerts(cmd) => block_on(alerts::run(&cmd)),
        Command::Channels(cmd) => block_on(channels::run(&cmd)),
        Command::Cycles(args) => block_on(cycles::run(&args)),
        Command::Token(cmd) => token::run(&cmd),
        Command::Db(cmd) => block_on(db::run(&cmd)),
        Command::Config(ConfigCommand::Check { file, no_files }) => {
            config_check::run(&file, no_files)
        }
    }
}

/// Commands that print and end (or follow a stream) but serve nothing:
/// they may stop when whoever reads their output is gone.
fn only_prints(command: &Command) -> bool {
    !matches!(
        command,
        Command::Serve(_) | Command::Bench(_) | Command::Demo(_) | Command::Rig(_)
    )
}

/// `gibbsline db stats | head`: the reader leaves and the next write gets
/// EPIPE, which `println!` turns into a panic. A command that only prints
/// then ends quietly with success, as other command-line tools do.
/// SIGPIPE itself stays ignored (Rust's default): hyper writes to its
/// sockets with `writev`, which raises SIGPIPE when a server hangs up, and
/// that must be an error the command reports, not a silent death.
fn exit_quietly_when_the_reader_leaves() {
    let default_hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        let message = info
            .payload()
            .downcast_ref::<String>()
            .map(String::as_str)
            .or_else(|| info.payload().downcast_ref::<&str>().copied())
            .unwrap_or("");
        if message.starts_with("failed printing to stdout") && message.contains("Broken pipe") {
            std::process::exit(0);
        }
        default_hook(info);
    }));
}

fn block_on<F: std::future::Future<Output = anyhow::Result<()>>>(f: F) -> anyhow::Result<()> {
    tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?
        .block_on(f)
}

/// Parses durations like 90s, 5m, 2h, 1d, 250ms (a bare number is seconds).
/// A field of a file as an error message shows it: quoted, and cut to
/// its first 60 characters with its length said (a 100 MB garbled field
/// must not become a 100 MB message).
pub(crate) fn excerpt(text: &str) -> String {
    const SHOWN: usize = 60;
    match text.char_indices().nth(SHOWN) {
        None => format!("{text:?}"),
        Some((end, _)) => format!("{:?}… ({} bytes)", &text[..end], text.len()),
    }
}

pub(crate) fn parse_duration(text: &str) -> Result<std::time::Duration, UsageError> {
    let t = text.trim();
    let split = t.find(|c: char| c.is_ascii_alphabetic()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let value: f64 = num
        .parse()
        .map_err(|_| UsageError(format!("{text:?} is not a duration like 90s, 5m or 2h")))?;
    let scale = match unit {
        "" | "s" => 1.0,
        "ms" => 1e-3,
        "m" | "min" => 60.0,
        "h" => 3600.0,
        "d" => 86_400.0,
        other => {
            return Err(UsageError(format!(
                "unknown unit {other:?} in {text:?} (use ms, s, m, h or d)"
            )));
        }
    };
    let secs = value * scale;
    if !(secs.is_finite() && (0.0..1e9).contains(&secs)) {
        return Err(UsageError(format!("{text:?} is out of range")));
    }
    Ok(std::time::Duration::from_secs_f64(secs))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every option and argument of every command says what it is in
    /// `--help` (positional ids excepted: their command says it).
    #[test]
    fn every_option_has_a_help_line() {
        use clap::CommandFactory;
        fn walk(cmd: &clap::Command, path: &str, missing: &mut Vec<String>) {
            for arg in cmd.get_arguments() {
                let id = arg.get_id().as_str();
                if arg.is_positional() || matches!(id, "help" | "version") {
                    continue;
                }
                if arg.get_help().is_none() {
                    missing.push(format!("{path} --{id}"));
                }
            }
            for sub in cmd.get_subcommands() {
                walk(sub, &format!("{path} {}", sub.get_name()), missing);
            }
        }
        let mut missing = Vec::new();
        walk(&Cli::command(), "gibbsline", &mut missing);
        assert!(
            missing.is_empty(),
            "options without a help line: {missing:#?}"
        );
    }

    #[test]
    fn a_long_field_is_shown_cut_with_its_length() {
        assert_eq!(excerpt("1,5"), "\"1,5\"");
        let long = "x".repeat(100_000_000);
        let shown = excerpt(&long);
        assert!(shown.len() < 100, "{shown}");
        assert!(shown.ends_with("… (100000000 bytes)"), "{shown}");
        // Cut on a character, not inside one.
        assert!(excerpt(&"é".repeat(100)).starts_with("\"éé"));
    }
}
