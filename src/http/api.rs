//! The JSON read API under `/api/v1` (documented in `proto/openapi.json`).
//! Each handler checks the caller's token against the permission of the
//! gRPC method it answers like (one table, `grpc::authz::METHODS`), builds
//! that method's request from the path and query, calls the same service
//! object the gRPC server runs, and returns its response as JSON: the
//! protos' field names, enum values by name (`crate::pb::names`).

use super::error::ApiError;
use super::params::Params;
use crate::auth::{Principal, TokenTable};
use crate::grpc::Apis;
use crate::ingest::Hub;
use crate::pb;
use crate::pb::alert_service_server::AlertService;
use crate::pb::channel_service_server::ChannelService;
use crate::pb::chemistry_service_server::ChemistryService;
use crate::pb::history_service_server::HistoryService;
use axum::Json;
use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::HeaderMap;
use axum::response::{IntoResponse, Response};
use std::collections::HashMap;
use std::sync::Arc;
use tokio_stream::StreamExt;
use tonic::Request;

/// What every handler needs: the services, the hub, the tokens.
pub struct ApiState {
    /// The service objects the gRPC server runs too.
    pub apis: Apis,
    /// For the live feed and the overview.
    pub hub: Arc<Hub>,
    /// The same tokens as gRPC.
    pub tokens: Arc<TokenTable>,
    /// Live feeds' places and the followed channels' tails.
    pub feeds: Arc<super::live::Feeds>,
}

/// Shared state as axum hands it to handlers.
pub type Shared = State<Arc<ApiState>>;
type QueryMap = Query<HashMap<String, String>>;

/// Readings one `/readings` call returns unless `limit` says otherwise.
const DEFAULT_READINGS: u32 = 10_000;

impl ApiState {
    /// The caller, if the token allows what `rpc` (a gRPC method path) needs.
    pub fn allow(&self, headers: &HeaderMap, rpc: &str) -> Result<Option<Principal>, ApiError> {
        let Some(&(full, permission)) = crate::grpc::authz::METHODS.iter().find(|(p, _)| *p == rpc)
        else {
            unreachable!("{rpc} is not in the permission table");
        };
        let name = full.rsplit('/').next().unwrap_or(full);
        let authorization = headers
            .get(axum::http::header::AUTHORIZATION)
            .and_then(|v| v.to_str().ok());
        self.tokens
            .check(authorization, permission, name)
            .map_err(|e| ApiError::from(crate::grpc::authz::deny(e, name)))
    }
}

/// `GET /api/v1/channels`: `ListChannelsResponse`.
pub async fn channels(
    State(s): Shared,
    headers: HeaderMap,
    Query(q): QueryMap,
) -> Result<Json<pb::ListChannelsResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.ChannelService/ListChannels")?;
    let mut p = Params::new(q);
    let request = pb::ListChannelsRequest {
        page_size: p.take("page_size", "a whole number")?.unwrap_or(0),
        page_token: p.text("page_token"),
    };
    p.done()?;
    let answer = s.apis.channel.list_channels(Request::new(request)).await?;
    Ok(Json(answer.into_inner()))
}

/// `GET /api/v1/channels/{id}`: `GetChannelResponse`.
pub async fn channel(
    State(s): Shared,
    headers: HeaderMap,
    Path(channel_id): Path<String>,
) -> Result<Json<pb::GetChannelResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.ChannelService/GetChannel")?;
    let request = pb::GetChannelRequest { channel_id };
    let answer = s.apis.channel.get_channel(Request::new(request)).await?;
    Ok(Json(answer.into_inner()))
}

/// `GET /api/v1/channels/{id}/state`: `GetChannelStateResponse`.
pub async fn state(
    State(s): Shared,
    headers: HeaderMap,
    Path(channel_id): Path<String>,
) -> Result<Json<pb::GetChannelStateResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.HistoryService/GetChannelState")?;
    let request = pb::GetChannelStateRequest { channel_id };
    let answer = s
        .apis
        .history
        .get_channel_state(Request::new(request))
        .await?;
    Ok(Json(answer.into_inner()))
}

/// `GET /api/v1/channels/{id}/readings`: `QueryReadingsResponse`, one
/// list (at most `limit`, default 10,000, the server's row limit at most).
/// Written as the store pages come, so a request holds a few pages of
/// memory whatever its limit, and takes a place among the history queries
/// gRPC counts too. An answer cut short (a store error, a client that
/// stopped reading) ends without its closing chunk, so no client takes it
/// for whole.
pub async fn readings(
    State(s): Shared,
    headers: HeaderMap,
    Path(channel_id): Path<String>,
    Query(q): QueryMap,
) -> Result<Response, ApiError> {
    s.allow(&headers, "/gibbsline.v1.HistoryService/QueryReadings")?;
    let mut p = Params::new(q);
    let request = pb::QueryReadingsRequest {
        channel_id,
        start_unix_ns: p
            .take("start_unix_ns", "nanoseconds since 1970 (integer)")?
            .unwrap_or(0),
        end_unix_ns: p
            .take("end_unix_ns", "nanoseconds since 1970 (integer)")?
            .unwrap_or(0),
        limit: p
            .take("limit", "a whole number")?
            .unwrap_or(DEFAULT_READINGS),
        layout: pb::ReadingLayout::Rows as i32,
    };
    p.done()?;
    let mut pages = s
        .apis
        .history
        .query_readings(Request::new(request))
        .await?
        .into_inner();
    // The first page decides the status: a refusal before any reading is
    // an ordinary error answer.
    let first = pages.next().await.transpose()?;
    let (open, close) = readings_frame();
    let mut written = 0usize;
    let body = tokio_stream::once(Ok::<Bytes, std::io::Error>(open))
        .chain(
            tokio_stream::iter(first.map(Ok))
                .chain(pages)
                .map(move |page| {
                    let page =
                        page.map_err(|status| std::io::Error::other(status.message().to_string()))?;
                    let json = page_json(&page, written > 0);
                    written += page.readings.len();
                    Ok(json)
                }),
        )
        .chain(tokio_stream::once(Ok(close)));
    Ok((
        [(axum::http::header::CONTENT_TYPE, "application/json")],
        axum::body::Body::from_stream(body),
    )
        .into_response())
}

/// The JSON of an answer without readings, cut where they go: the same
/// shape `Json(QueryReadingsResponse)` writes.
fn readings_frame() -> (Bytes, Bytes) {
    let empty = serde_json::to_string(&pb::QueryReadingsResponse::default())
        .expect("a response serialises");
    let at = empty.find("[]").expect("readings serialise as a list") + 1;
    (
        Bytes::copy_from_slice(&empty.as_bytes()[..at]),
        Bytes::copy_from_slice(&empty.as_bytes()[at..]),
    )
}

/// One page's readings as list members, each after a comma unless it is
/// the answer's first.
fn page_json(page: &pb::QueryReadingsResponse, after_others: bool) -> Bytes {
    let mut out = Vec::with_capacity(page.readings.len() * 400);
    for (i, reading) in page.readings.iter().enumerate() {
        if i > 0 || after_others {
            out.push(b',');
        }
        serde_json::to_writer(&mut out, reading).expect("a reading serialises");
    }
    Bytes::from(out)
}

/// `GET /api/v1/channels/{id}/buckets`: `QueryBucketsResponse`.
pub async fn buckets(
    State(s): Shared,
    headers: HeaderMap,
    Path(channel_id): Path<String>,
    Query(q): QueryMap,
) -> Result<Json<pb::QueryBucketsResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.HistoryService/QueryBuckets")?;
    let mut p = Params::new(q);
    let ns = "nanoseconds (integer)";
    let request = pb::QueryBucketsRequest {
        channel_id,
        start_unix_ns: p.take("start_unix_ns", ns)?.unwrap_or(0),
        end_unix_ns: p.take("end_unix_ns", ns)?.unwrap_or(0),
        bucket_width_ns: p
            .take("bucket_width_ns", ns)?
            .ok_or_else(|| ApiError::invalid("bucket_width_ns", "", "required"))?,
    };
    p.done()?;
    let answer = s.apis.history.query_buckets(Request::new(request)).await?;
    Ok(Json(answer.into_inner()))
}

/// `GET /api/v1/channels/{id}/cycles`: `ListCyclesResponse`.
pub async fn cycles(
    State(s): Shared,
    headers: HeaderMap,
    Path(channel_id): Path<String>,
) -> Result<Json<pb::ListCyclesResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.HistoryService/ListCycles")?;
    let request = pb::ListCyclesRequest { channel_id };
    let answer = s.apis.history.list_cycles(Request::new(request)).await?;
    Ok(Json(answer.into_inner()))
}

/// `GET /api/v1/alerts`: `ListAlertsResponse`.
pub async fn alerts(
    State(s): Shared,
    headers: HeaderMap,
    Query(q): QueryMap,
) -> Result<Json<pb::ListAlertsResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.AlertService/ListAlerts")?;
    let mut p = Params::new(q);
    let request = pb::ListAlertsRequest {
        channel_id: p.text("channel_id"),
        min_severity: severity_param(&mut p)?,
        active_only: p.flag("active_only")?,
        after_alert_id: p.take("after_alert_id", "a whole number")?.unwrap_or(0),
        limit: p.take("limit", "a whole number")?.unwrap_or(0),
    };
    p.done()?;
    let answer = s.apis.alert.list_alerts(Request::new(request)).await?;
    Ok(Json(answer.into_inner()))
}

/// `min_severity` by name (`info`, `warning`, `critical`); absent: all.
pub fn severity_param(p: &mut Params) -> Result<i32, ApiError> {
    let text = p.text("min_severity");
    if text.is_empty() {
        return Ok(0);
    }
    pb::names::parse_severity(&text).ok_or_else(|| {
        ApiError::invalid("min_severity", &text, "expected info, warning or critical")
    })
}

/// The body of an acknowledgement.
#[derive(Debug, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AckBody {
    /// Who acknowledges (a person's name).
    pub acknowledged_by: String,
    /// What they noted.
    #[serde(default)]
    pub note: String,
}

/// `POST /api/v1/alerts/{alert_id}/acknowledge`: `AcknowledgeAlertResponse`.
pub async fn acknowledge(
    State(s): Shared,
    headers: HeaderMap,
    Path(alert_id): Path<String>,
    body: Result<Json<AckBody>, axum::extract::rejection::JsonRejection>,
) -> Result<Json<pb::AcknowledgeAlertResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.AlertService/AcknowledgeAlert")?;
    let alert_id = alert_id
        .parse()
        .map_err(|_| ApiError::invalid("alert_id", &alert_id, "a whole number"))?;
    let Json(body) = body.map_err(|e| ApiError::invalid("body", "", &e.body_text()))?;
    let request = pb::AcknowledgeAlertRequest {
        alert_id,
        acknowledged_by: body.acknowledged_by,
        note: body.note,
    };
    let answer = s
        .apis
        .alert
        .acknowledge_alert(Request::new(request))
        .await?;
    Ok(Json(answer.into_inner()))
}

/// `GET /api/v1/chemistries`: `ListChemistriesResponse`.
pub async fn chemistries(
    State(s): Shared,
    headers: HeaderMap,
) -> Result<Json<pb::ListChemistriesResponse>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.ChemistryService/ListChemistries")?;
    let request = pb::ListChemistriesRequest {};
    let answer = s
        .apis
        .chemistry
        .list_chemistries(Request::new(request))
        .await?;
    Ok(Json(answer.into_inner()))
}

/// The bench at a glance: every channel's state and the active alerts.
#[derive(Debug, serde::Serialize)]
pub struct Overview {
    /// One per channel, by channel id.
    pub states: Vec<OverviewState>,
    /// Alerts not yet cleared, every channel (at most 10,000).
    pub active_alerts: Vec<pb::Alert>,
    /// The server's clock when this was read, for last-seen ages.
    pub server_unix_ns: i64,
}

/// A channel's `GetChannelStateResponse` and when its last batch came.
#[derive(Debug, serde::Serialize)]
pub struct OverviewState {
    /// The state, its fields at the top level.
    #[serde(flatten)]
    pub state: pb::GetChannelStateResponse,
    /// The server's clock when the channel's last batch arrived (0: none
    /// since the server started): "last seen" by the server, whatever
    /// the rig's clock says.
    pub last_arrival_unix_ns: i64,
}

/// `GET /api/v1/overview`: [`Overview`].
pub async fn overview(State(s): Shared, headers: HeaderMap) -> Result<Json<Overview>, ApiError> {
    s.allow(&headers, "/gibbsline.v1.HistoryService/GetChannelState")?;
    let mut channels = s.hub.runtimes();
    channels.sort_by(|a, b| a.0.cmp(&b.0));
    let mut states = Vec::with_capacity(channels.len());
    for (channel_id, runtime) in channels {
        let last_arrival_unix_ns = runtime
            .lock()
            .expect("channel state poisoned")
            .last_arrival_wall_ns;
        let request = pb::GetChannelStateRequest { channel_id };
        match s
            .apis
            .history
            .get_channel_state(Request::new(request))
            .await
        {
            Ok(answer) => states.push(OverviewState {
                state: answer.into_inner(),
                last_arrival_unix_ns,
            }),
            // Removed between the list and the read: not an error here.
            Err(e) if e.code() == tonic::Code::NotFound => {}
            Err(e) => return Err(e.into()),
        }
    }
    let request = pb::ListAlertsRequest {
        active_only: true,
        limit: 10_000,
        ..Default::default()
    };
    let active_alerts = s.apis.alert.list_alerts(Request::new(request)).await?;
    Ok(Json(Overview {
        states,
        active_alerts: active_alerts.into_inner().alerts,
        server_unix_ns: crate::ingest::now_ns(),
    }))
}
