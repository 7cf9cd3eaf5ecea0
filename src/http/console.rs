//! The web console's files, embedded in the binary: one page, its script
//! and its style, written for gibbsline (no third-party code, no build
//! step). The page keeps the token in the tab's session storage and sends
//! it as a header, never in a URL.

use super::api::ApiState;
use axum::Router;
use axum::http::header;
use axum::response::IntoResponse;
use axum::routing::get;
use std::sync::Arc;

const INDEX_HTML: &str = include_str!("console/index.html");
const APP_JS: &str = include_str!("console/app.js");
const PLOT_JS: &str = include_str!("console/plot.js");
const STYLE_CSS: &str = include_str!("console/style.css");

/// Scripts and styles only from this server; nothing inline, nothing framed.
const POLICY: &str = "default-src 'self'; img-src 'self' data:; frame-ancestors 'none'";

/// `/`, `/app.js`, `/plot.js`, `/style.css`.
pub(super) fn routes() -> Router<Arc<ApiState>> {
    Router::new()
        .route("/", get(|| asset("text/html; charset=utf-8", INDEX_HTML)))
        .route(
            "/app.js",
            get(|| asset("text/javascript; charset=utf-8", APP_JS)),
        )
        .route(
            "/plot.js",
            get(|| asset("text/javascript; charset=utf-8", PLOT_JS)),
        )
        .route(
            "/style.css",
            get(|| asset("text/css; charset=utf-8", STYLE_CSS)),
        )
}

async fn asset(content_type: &'static str, body: &'static str) -> impl IntoResponse {
    (
        [
            (header::CONTENT_TYPE, content_type),
            (header::CONTENT_SECURITY_POLICY, POLICY),
            (header::REFERRER_POLICY, "no-referrer"),
            (header::CACHE_CONTROL, "no-cache"),
        ],
        body,
    )
}
