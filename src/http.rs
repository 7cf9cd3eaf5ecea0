//! HTTP shell (axum on hyper): today the Prometheus `/metrics` page. A
//! bounded number of connections at once, each closed after an idle
//! stretch, so a slow or hostile client holds neither memory nor sockets.

use crate::ingest::Hub;
use crate::listen::{ACCEPT_BACKOFF, IdleLimited};
use axum::Router;
use axum::extract::State;
use axum::http::header;
use axum::response::IntoResponse;
use axum::routing::get;
use std::sync::Arc;
use std::time::Duration;
use tokio::net::TcpListener;
use tokio::sync::Semaphore;

/// Metrics connections served at once: scrapers come a few at a time.
const METRICS_CONNECTIONS: usize = 16;
/// A metrics connection that says nothing for this long is closed.
const METRICS_IDLE: Duration = Duration::from_secs(5);

/// Serves `/metrics` until the task is dropped.
pub async fn serve_metrics(listener: TcpListener, hub: Arc<Hub>) {
    let app = Router::new()
        .route("/metrics", get(metrics))
        .with_state(hub);
    let listener = Bounded::new(listener, METRICS_CONNECTIONS, METRICS_IDLE);
    if let Err(e) = axum::serve(listener, app).await {
        tracing::error!(error = %e, "metrics endpoint stopped");
    }
}

async fn metrics(State(hub): State<Arc<Hub>>) -> impl IntoResponse {
    (
        [(header::CONTENT_TYPE, "text/plain; version=0.0.4")],
        crate::app::render_metrics(&hub),
    )
}

/// A listener that waits for a free place before it accepts, and hands out
/// idle-limited connections.
pub struct Bounded {
    inner: TcpListener,
    places: Arc<Semaphore>,
    idle: Duration,
}

impl Bounded {
    /// At most `connections` open at once, each closed after `idle`
    /// without a byte either way.
    pub fn new(inner: TcpListener, connections: usize, idle: Duration) -> Bounded {
        Bounded {
            inner,
            places: Arc::new(Semaphore::new(connections)),
            idle,
        }
    }
}

impl axum::serve::Listener for Bounded {
    type Io = IdleLimited;
    type Addr = std::net::SocketAddr;

    async fn accept(&mut self) -> (IdleLimited, std::net::SocketAddr) {
        let place = self
            .places
            .clone()
            .acquire_owned()
            .await
            .expect("the semaphore is never closed");
        loop {
            match self.inner.accept().await {
                Ok((stream, addr)) => {
                    return (IdleLimited::holding(stream, self.idle, place), addr);
                }
                Err(e) => {
                    // Out of file descriptors, typically: back off, don't spin.
                    tracing::warn!(error = %e, "HTTP accept failed");
                    tokio::time::sleep(ACCEPT_BACKOFF).await;
                }
            }
        }
    }

    fn local_addr(&self) -> std::io::Result<std::net::SocketAddr> {
        self.inner.local_addr()
    }
}
