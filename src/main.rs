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
            // `gibbsline readings … | head`: the reader left; not a failure.
            if let Some(io) = err.downcast_ref::<std::io::Error>()
                && io.kind() == std::io::ErrorKind::BrokenPipe
            {
                return ExitCode::SUCCESS;
            }
            if let Some(usage) = err.downcast_ref::<cli::UsageError>() {
                eprintln!("error: {usage}");
                return ExitCode::from(2);
            }
            if let Some(unreachable) = err.downcast_ref::<cli::client::Unreachable>() {
                eprintln!("error: {unreachable}");
                return ExitCode::from(3);
            }
            if let Some(status) = err.downcast_ref::<tonic::Status>() {
                return report_status(status);
            }
            eprintln!("error: {}", said_once(&err));
            ExitCode::from(1)
        }
    }
}

/// The error and its causes, each said once: most of our errors already
/// print their cause in their own message (thiserror's `{0}` with
/// `#[from]`), and sqlx's do too, so the plain chain would repeat the same
/// words two or three times.
fn said_once(err: &anyhow::Error) -> String {
    let mut line = String::new();
    for cause in err.chain() {
        let text = cause.to_string();
        if line.contains(&text) {
            continue;
        }
        if !line.is_empty() {
            line.push_str(": ");
        }
        line.push_str(&text);
    }
    line
}

/// One line for a failed call. A status that comes from the transport (the
/// connection broke before the server answered: plaintext against TLS,
/// say) counts as unreachable.
fn report_status(status: &tonic::Status) -> ExitCode {
    let message = status.message().lines().next().unwrap_or("");
    if std::error::Error::source(status).is_some() {
        eprintln!(
            "error: the connection failed before the server answered ({message}); \
             if the server uses TLS, connect with https://HOST:PORT (GIBBSLINE_CA_FILE for its CA)"
        );
        return ExitCode::from(3);
    }
    eprintln!("error: {:?}: {message}", status.code());
    ExitCode::from(1)
}
