//! Command-line definitions (stage one: flags only, no I/O) and dispatch.

pub mod eval;

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
    }
}
