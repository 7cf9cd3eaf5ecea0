//! The `gibbsline` binary: parse flags, start logging, hand over to `cli`.
//! Exit codes: 0 ok, 1 runtime failure, 2 usage or input error,
//! 3 server unreachable.

mod cli;

use clap::Parser;
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = cli::Cli::parse();
    match cli::dispatch(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            if let Some(usage) = err.downcast_ref::<cli::UsageError>() {
                eprintln!("error: {usage}");
                return ExitCode::from(2);
            }
            if let Some(unreachable) = err.downcast_ref::<cli::client::Unreachable>() {
                eprintln!("error: {unreachable}");
                return ExitCode::from(3);
            }
            eprintln!("error: {err:#}");
            ExitCode::from(1)
        }
    }
}
