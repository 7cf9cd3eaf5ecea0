//! `gibbsline serve`: file, environment and flags resolved once into the
//! server's settings; bind; run until SIGINT or SIGTERM.

use super::{ServeArgs, UsageError};
use gibbsline::config::{Flags, ServerConfig};
use std::path::Path;

pub(crate) fn run(args: &ServeArgs) -> anyhow::Result<()> {
    let config = load_config(args.config.as_deref(), &flags_of(args)?)?;
    if args.print_config {
        print!("{}", toml::to_string(&config)?);
        return Ok(());
    }
    config
        .check_exposure()
        .map_err(|e| UsageError(e.to_string()))?;
    init_logging();
    tracing::info!(notice = gibbsline::notify::NOTICE, "gibbsline serving");
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
        let listeners = bind(&config).await?;
        gibbsline::app::run(config, listeners, shutdown_signal()).await?;
        Ok(())
    })
}

/// Reads a config file (or none) and resolves it with the environment's
/// `GIBBSLINE_*` variables and the given flags: the one validated config.
pub(crate) fn load_config(path: Option<&Path>, flags: &Flags) -> anyhow::Result<ServerConfig> {
    let env: std::collections::BTreeMap<String, String> = std::env::vars()
        .filter(|(k, _)| k.starts_with("GIBBSLINE_"))
        .collect();
    let (label, text) = match path {
        Some(p) => (
            p.display().to_string(),
            std::fs::read_to_string(p)
                .map_err(|e| UsageError(format!("--config {}: {e}", p.display())))?,
        ),
        None => ("(defaults)".to_string(), String::new()),
    };
    Ok(
        gibbsline::config::load_with_flags(&label, &text, &env, flags)
            .map_err(|e| UsageError(e.to_string()))?,
    )
}

/// The flags as texts, for the config layer to check like file entries.
fn flags_of(args: &ServeArgs) -> anyhow::Result<Flags> {
    let chemistry_files = args
        .chemistry_file
        .iter()
        .map(|p| {
            std::fs::read_to_string(p)
                .map(|text| (p.display().to_string(), text))
                .map_err(|e| UsageError(format!("--chemistry-file {}: {e}", p.display())))
        })
        .collect::<Result<_, _>>()?;
    Ok(Flags {
        listen: args.listen.clone(),
        db: args.db.as_ref().map(|d| d.display().to_string()),
        durability: args.durability.clone(),
        metrics_listen: args.metrics_listen.clone(),
        http_listen: args.http_listen.clone(),
        advertise: args.advertise.clone(),
        allow_insecure: args.allow_insecure,
        chemistry_files,
    })
}

async fn bind(config: &ServerConfig) -> anyhow::Result<gibbsline::app::Listeners> {
    let grpc = tokio::net::TcpListener::bind(&config.listen)
        .await
        .map_err(|e| UsageError(format!("listen {}: {e}", config.listen)))?;
    let metrics = match &config.metrics_listen {
        Some(m) => Some(
            tokio::net::TcpListener::bind(m)
                .await
                .map_err(|e| UsageError(format!("metrics_listen {m}: {e}")))?,
        ),
        None => None,
    };
    let http = match &config.http_listen {
        Some(h) => bind_console(h).await?,
        None => None,
    };
    Ok(gibbsline::app::Listeners {
        grpc,
        metrics,
        http,
    })
}

/// The console's listener. The default address taken by another program
/// (a second server on this machine, say) costs the console, not the
/// server: a warning says so. An address asked for must be had.
pub(crate) async fn bind_console(addr: &str) -> anyhow::Result<Option<tokio::net::TcpListener>> {
    match tokio::net::TcpListener::bind(addr).await {
        Ok(l) => Ok(Some(l)),
        Err(e)
            if addr == gibbsline::config::DEFAULT_HTTP_LISTEN
                && e.kind() == std::io::ErrorKind::AddrInUse =>
        {
            tracing::warn!(
                http_listen = addr,
                "console not served: the default address is in use; set http_listen (or \"off\")"
            );
            Ok(None)
        }
        Err(e) => Err(UsageError(format!("http_listen {addr}: {e}")).into()),
    }
}

/// Logs to stdout, `RUST_LOG` or info (the server and the rig agent):
/// coloured on a terminal, plain text into a file or a journal.
pub(crate) fn init_logging() {
    use std::io::IsTerminal;
    tracing_subscriber::fmt()
        .with_ansi(std::io::stdout().is_terminal())
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into()),
        )
        .init();
}

pub(crate) async fn shutdown_signal() {
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
