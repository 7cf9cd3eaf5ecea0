//! Connecting to a server from the client commands.

use tonic::transport::{Channel, Endpoint};

/// The server could not be reached: exit code 3.
#[derive(Debug, thiserror::Error)]
#[error("cannot reach the server at {addr}: {reason} (is `gibbsline serve` running there?)")]
pub struct Unreachable {
    pub addr: String,
    pub reason: String,
}

pub async fn connect(addr: &str) -> anyhow::Result<Channel> {
    let url = if addr.starts_with("http://") || addr.starts_with("https://") {
        addr.to_string()
    } else {
        format!("http://{addr}")
    };
    let endpoint = Endpoint::from_shared(url.clone())
        .map_err(|e| super::UsageError(format!("--connect {addr}: {e}")))?
        .connect_timeout(std::time::Duration::from_secs(5));
    endpoint.connect().await.map_err(|e| {
        Unreachable {
            addr: addr.to_string(),
            reason: e.to_string(),
        }
        .into()
    })
}

pub fn now_ns() -> i64 {
    gibbsline::ingest::now_ns()
}
