//! HTTP shell (axum on hyper): the web console, the JSON read API under
//! `/api/v1` with its server-sent live feed, and the Prometheus `/metrics`
//! page, on `http_listen` (HTTPS with `[tls]`, the same tokens as gRPC);
//! and `/metrics` alone on `metrics_listen`. A bounded number of
//! connections at once, each closed after an idle stretch, so a slow or
//! hostile client holds neither memory nor sockets.

pub mod api;
pub mod conn;
mod console;
pub mod error;
pub mod live;
mod params;

use crate::ingest::{Hub, stopped};
use api::ApiState;
use axum::Router;
use axum::extract::State;
use axum::http::{HeaderMap, header};
use axum::response::IntoResponse;
use axum::routing::{get, post};
pub use conn::Bounded;
use std::sync::Arc;
use std::time::Duration;
use tokio::net::TcpListener;
use tokio_rustls::TlsAcceptor;

/// Metrics connections served at once: scrapers come a few at a time.
const METRICS_CONNECTIONS: usize = 16;
/// A metrics connection that says nothing for this long is closed.
const METRICS_IDLE: Duration = Duration::from_secs(5);
/// Console and API connections at once (a browser opens about six; each
/// idle one costs a few KiB). Live feeds take at most
/// [`live::FEEDS_IN_ALL`] of them, and a connection still sending its
/// request head is cut off after [`conn::HEAD_LIMIT`], so feeds and slow
/// clients leave room for the API and health.
const HTTP_CONNECTIONS: usize = 1_024;
/// A console connection that says nothing for this long is closed; the
/// live feed sends a keep-alive well inside it.
const HTTP_IDLE: Duration = Duration::from_secs(30);

/// Every route of the JSON API: method and path as `proto/openapi.json`
/// writes them (a test holds the two equal).
pub const API_ROUTES: &[(&str, &str)] = &[
    ("get", "/api/v1/overview"),
    ("get", "/api/v1/channels"),
    ("get", "/api/v1/channels/{channel_id}"),
    ("get", "/api/v1/channels/{channel_id}/state"),
    ("get", "/api/v1/channels/{channel_id}/readings"),
    ("get", "/api/v1/channels/{channel_id}/buckets"),
    ("get", "/api/v1/channels/{channel_id}/cycles"),
    ("get", "/api/v1/alerts"),
    ("post", "/api/v1/alerts/{alert_id}/acknowledge"),
    ("get", "/api/v1/chemistries"),
    ("get", "/api/v1/live"),
    ("get", "/api/v1/openapi.json"),
];

/// The OpenAPI description of the JSON API, served as written.
pub const OPENAPI: &str = include_str!("../../proto/openapi.json");

/// The console, the API and `/metrics`.
pub fn router(state: Arc<ApiState>) -> Router {
    Router::new()
        .route("/api/v1/overview", get(api::overview))
        .route("/api/v1/channels", get(api::channels))
        .route("/api/v1/channels/{channel_id}", get(api::channel))
        .route("/api/v1/channels/{channel_id}/state", get(api::state))
        .route("/api/v1/channels/{channel_id}/readings", get(api::readings))
        .route("/api/v1/channels/{channel_id}/buckets", get(api::buckets))
        .route("/api/v1/channels/{channel_id}/cycles", get(api::cycles))
        .route("/api/v1/alerts", get(api::alerts))
        .route(
            "/api/v1/alerts/{alert_id}/acknowledge",
            post(api::acknowledge),
        )
        .route("/api/v1/chemistries", get(api::chemistries))
        .route("/api/v1/live", get(live::live))
        .route("/api/v1/openapi.json", get(openapi))
        .route("/metrics", get(guarded_metrics))
        .merge(console::routes())
        .with_state(state)
}

/// Serves the console until the server stops.
pub async fn serve(listener: TcpListener, state: Arc<ApiState>, tls: Option<TlsAcceptor>) {
    let stop = stopped(state.hub.shutdown_signal());
    let app = router(state);
    let listener = match Bounded::new(listener, HTTP_CONNECTIONS, HTTP_IDLE, tls) {
        Ok(l) => l,
        Err(e) => {
            tracing::error!(error = %e, "console not served");
            return;
        }
    };
    conn::serve(listener, app, stop).await;
}

/// Serves `/metrics` alone (no tokens: `metrics_listen` is for scrapers
/// on a trusted network) until the task is dropped.
pub async fn serve_metrics(listener: TcpListener, hub: Arc<Hub>) {
    let app = Router::new()
        .route("/metrics", get(metrics))
        .with_state(hub);
    let listener = match Bounded::new(listener, METRICS_CONNECTIONS, METRICS_IDLE, None) {
        Ok(l) => l,
        Err(e) => {
            tracing::error!(error = %e, "metrics endpoint not served");
            return;
        }
    };
    conn::serve(listener, app, std::future::pending()).await;
}

async fn metrics(State(hub): State<Arc<Hub>>) -> impl IntoResponse {
    metrics_page(&hub)
}

fn metrics_page(hub: &Hub) -> impl IntoResponse + use<> {
    (
        [(header::CONTENT_TYPE, "text/plain; version=0.0.4")],
        crate::app::render_metrics(hub),
    )
}

/// `/metrics` beside the console: a reader's token when the server has tokens.
async fn guarded_metrics(
    State(s): api::Shared,
    headers: HeaderMap,
) -> Result<impl IntoResponse, error::ApiError> {
    s.allow(&headers, "/gibbsline.v1.HistoryService/GetChannelState")?;
    Ok(metrics_page(&s.hub))
}

async fn openapi() -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "application/json")], OPENAPI)
}
