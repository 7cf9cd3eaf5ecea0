//! gRPC shell: thin handlers that convert at the edge and call the hub,
//! the store and the core. Only this module (and the client commands) see
//! generated protobuf types.

pub mod codec;
pub mod convert;
pub mod status;

use crate::alerts::Severity;
use crate::auth::{self, AuthError, Permission, Principal};
use crate::channel::ChannelDef;
use crate::electrochem::{self, EvalRequest};
use crate::estimator;
use crate::ingest::{self, Hub, IngestError, RawReading};
use crate::pb;
use crate::store::{self, AlertEvent, RunRow};
use convert::{
    alert_to_pb, channel_to_pb, event_to_pb, rules_from_pb, rules_to_pb, sign_from_pb, state_to_pb,
    stored_to_pb,
};
use status::invalid;
use std::collections::HashMap;
use std::pin::Pin;
use std::sync::{Arc, Mutex};
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::{Stream, StreamExt};
use tonic::{Request, Response, Status, Streaming};

type BoxStream<T> = Pin<Box<dyn Stream<Item = Result<T, Status>> + Send>>;

#[derive(Clone)]
pub struct Api {
    pub hub: Arc<Hub>,
    pub limits: crate::config::Limits,
    /// Ingest streams open per client (token name, or peer address on an
    /// open server): one client cannot take every slot.
    pub streams_by_client: Arc<Mutex<HashMap<String, u64>>>,
    /// QueryReadings responses being produced at once, server-wide: with
    /// each holding at most a few pages, this bounds query memory.
    pub queries: Arc<tokio::sync::Semaphore>,
}

impl Api {
    pub fn new(hub: Arc<Hub>, limits: crate::config::Limits) -> Api {
        Api {
            hub,
            limits,
            streams_by_client: Arc::default(),
            queries: Arc::new(tokio::sync::Semaphore::new(MAX_CONCURRENT_QUERIES)),
        }
    }
}

/// An operator action's name (1–200 characters) and note (≤ 4 KiB).
fn check_person(field: &str, name: &str, note: &str) -> Result<(), Status> {
    if name.trim().is_empty() || name.len() > 200 {
        return Err(invalid(
            field,
            format!("{:?}", name.chars().take(40).collect::<String>()),
            "a name of 1–200 characters is required",
        ));
    }
    if note.len() > crate::channel::MAX_TEXT_BYTES {
        return Err(invalid(
            "note",
            format!("({} bytes)", note.len()),
            "at most 4096 bytes",
        ));
    }
    Ok(())
}

/// QueryReadings calls producing pages at once; more wait their turn.
pub const MAX_CONCURRENT_QUERIES: usize = 32;

/// A client's ingest-stream slot, given back when the stream ends.
struct ClientSlot {
    map: Arc<Mutex<HashMap<String, u64>>>,
    client: String,
}

impl Drop for ClientSlot {
    fn drop(&mut self) {
        let mut map = self.map.lock().expect("client map poisoned");
        if let Some(n) = map.get_mut(&self.client) {
            *n -= 1;
            if *n == 0 {
                map.remove(&self.client);
            }
        }
    }
}

fn take_client_slot(
    map: &Arc<Mutex<HashMap<String, u64>>>,
    client: String,
    limit: u64,
) -> Result<ClientSlot, Status> {
    let mut guard = map.lock().expect("client map poisoned");
    let open = guard.entry(client.clone()).or_insert(0);
    if *open >= limit {
        return Err(Status::resource_exhausted(format!(
            "client {client}: {limit} ingest streams open already (limits.max_streams_per_client); share one stream between channels"
        )));
    }
    *open += 1;
    Ok(ClientSlot {
        map: map.clone(),
        client,
    })
}

/// Ingest streams open at once, server-wide. Each holds at most one batch:
/// while decoding, ≤ 1 MiB of wire bytes and ≈ 0.5 MB decoded; while it
/// waits for its commit, only the derived rows (≈ 1.4 MB for 10,000
/// readings; the wire and raw forms are dropped by then). That bounds
/// ingest memory to roughly 128 × 1.5 MB ≈ 190 MB in the very worst case;
/// excess streams are refused with RESOURCE_EXHAUSTED.
pub const MAX_INGEST_STREAMS: u64 = 128;
/// Alert subscribers open at once, server-wide.
pub const MAX_SUBSCRIBERS: u64 = 256;

/// Decrements a gauge when a stream ends, however it ends.
struct Gauge(
    Arc<crate::metrics::Metrics>,
    fn(&crate::metrics::Metrics) -> &std::sync::atomic::AtomicU64,
);
impl Drop for Gauge {
    fn drop(&mut self) {
        (self.1)(&self.0).fetch_sub(1, std::sync::atomic::Ordering::Relaxed);
    }
}

/// Takes a slot of a bounded gauge, or says why not.
fn take_slot(
    metrics: &Arc<crate::metrics::Metrics>,
    field: fn(&crate::metrics::Metrics) -> &std::sync::atomic::AtomicU64,
    limit: u64,
    what: &str,
) -> Result<Gauge, Status> {
    let previous = field(metrics).fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let gauge = Gauge(metrics.clone(), field);
    if previous >= limit {
        return Err(Status::resource_exhausted(format!(
            "{limit} {what} are open already; retry later or share one stream between channels"
        )));
    }
    Ok(gauge)
}

/// Acks a stream may have in flight to its client (one response channel slot each).
const STREAM_RESPONSE_BUFFER: usize = 16;
/// Per-subscriber backlog for WatchAlerts; past it the subscriber is told to resume.
pub const SUBSCRIBER_BUFFER: usize = 1024;

fn deny(e: AuthError, rpc: &'static str) -> Status {
    match &e {
        AuthError::Missing | AuthError::Unknown => {
            tracing::warn!(rpc, reason = %e, "request denied: not authenticated");
            Status::unauthenticated(e.to_string())
        }
        AuthError::Forbidden { role, .. } => {
            tracing::warn!(rpc, role, "request denied: role lacks permission");
            Status::permission_denied(e.to_string())
        }
        AuthError::ChannelNotGranted { .. } => {
            tracing::warn!(rpc, role = "rig", reason = %e, "request denied: channel not granted");
            Status::permission_denied(e.to_string())
        }
    }
}

impl Api {
    /// Checks the caller's token; denials are logged with role and RPC only.
    fn authorize<T>(
        &self,
        request: &Request<T>,
        permission: Permission,
        rpc: &'static str,
    ) -> Result<Option<Principal>, Status> {
        let header = request
            .metadata()
            .get("authorization")
            .and_then(|v| v.to_str().ok());
        self.hub
            .auth
            .check(header, permission, rpc)
            .map_err(|e| deny(e, rpc))
    }

    async fn runs_of(&self, channel_key: i64) -> Result<HashMap<i64, RunRow>, Status> {
        Ok(store::get_runs(&self.hub.store.reader, channel_key)
            .await?
            .into_iter()
            .map(|r| (r.run_id, r))
            .collect())
    }

    fn key_of(
        &self,
        channel_id: &str,
    ) -> Result<(Arc<Mutex<ingest::ChannelRuntime>>, i64), Status> {
        let rt = self.hub.channel(channel_id)?;
        let key = rt.lock().expect("channel state poisoned").key;
        Ok((rt, key))
    }
}

#[tonic::async_trait]
impl pb::channel_service_server::ChannelService for Api {
    async fn put_channel(
        &self,
        request: Request<pb::PutChannelRequest>,
    ) -> Result<Response<pb::PutChannelResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Administer, "PutChannel")?;
        let c = request
            .into_inner()
            .channel
            .ok_or_else(|| invalid("channel", "unset", "a channel definition is required"))?;
        let current_sign = sign_from_pb(c.current_sign)?;
        let registry = self.hub.registry.read().expect("registry poisoned").clone();
        let chem_for_window = registry.get(&c.chemistry_id).ok();
        let (min_volts, max_volts) = match (c.min_volts, c.max_volts, &chem_for_window) {
            (0.0, 0.0, Some(chem)) => ChannelDef::default_window(chem),
            (lo, hi, _) => (lo, hi),
        };
        let def = ChannelDef {
            channel_id: c.channel_id,
            chemistry_id: c.chemistry_id,
            cells_in_series: c.cells_in_series,
            capacity_ah: c.capacity_ah,
            current_sign,
            default_temp_c: c.default_temp_c,
            min_volts,
            max_volts,
            e_standard_override_v: c.e_standard_override_v,
            resistance_ohm: c.resistance_ohm,
            equilibrium_tolerance_mv: if c.equilibrium_tolerance_mv == 0.0 {
                1.0
            } else {
                c.equilibrium_tolerance_mv
            },
            coulombic_efficiency: if c.coulombic_efficiency == 0.0 {
                1.0
            } else {
                c.coulombic_efficiency
            },
            faradaic_efficiency: if c.faradaic_efficiency == 0.0 {
                1.0
            } else {
                c.faradaic_efficiency
            },
            description: c.description,
            gas: c.gas.as_ref().map(convert::gas_from_pb),
            active_area_cm2: c.active_area_cm2,
        };
        let (run_id, new_run) = self.hub.put_channel(def.clone()).await?;
        tracing::info!(channel_id = %def.channel_id, run_id, new_run, "channel defined");
        Ok(Response::new(pb::PutChannelResponse {
            channel: Some(channel_to_pb(&def, run_id)),
            new_run,
        }))
    }

    async fn get_channel(
        &self,
        request: Request<pb::GetChannelRequest>,
    ) -> Result<Response<pb::GetChannelResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "GetChannel")?;
        let rt = self.hub.channel(&request.into_inner().channel_id)?;
        let g = rt.lock().expect("channel state poisoned");
        Ok(Response::new(pb::GetChannelResponse {
            channel: Some(channel_to_pb(&g.def, g.run_id)),
        }))
    }

    async fn list_channels(
        &self,
        request: Request<pb::ListChannelsRequest>,
    ) -> Result<Response<pb::ListChannelsResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "ListChannels")?;
        let q = request.into_inner();
        let page_size = match q.page_size {
            0 => MAX_CHANNELS_PER_PAGE,
            n => (n as usize).min(MAX_CHANNELS_PER_PAGE),
        };
        let map = self.hub.channels.read().expect("channel map poisoned");
        let mut ids: Vec<&String> = map.keys().filter(|id| **id > q.page_token).collect();
        ids.sort();
        let more = ids.len() > page_size;
        ids.truncate(page_size);
        let channels: Vec<_> = ids
            .iter()
            .map(|id| {
                let g = map[*id].lock().expect("channel state poisoned");
                channel_to_pb(&g.def, g.run_id)
            })
            .collect();
        let next_page_token = match (more, channels.last()) {
            (true, Some(last)) => last.channel_id.clone(),
            _ => String::new(),
        };
        Ok(Response::new(pb::ListChannelsResponse {
            channels,
            next_page_token,
        }))
    }

    async fn reset_timeline(
        &self,
        request: Request<pb::ResetTimelineRequest>,
    ) -> Result<Response<pb::ResetTimelineResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Operate, "ResetTimeline")?;
        let q = request.into_inner();
        let (seq, time_ns) = self.hub.reset_timeline(&q.channel_id, q.after_seq).await?;
        Ok(Response::new(pb::ResetTimelineResponse {
            last_stored_seq: seq,
            time_unix_ns: time_ns,
        }))
    }

    async fn set_channel_soc(
        &self,
        request: Request<pb::SetChannelSocRequest>,
    ) -> Result<Response<pb::SetChannelSocResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Operate, "SetChannelSoc")?;
        let q = request.into_inner();
        check_person("set_by", &q.set_by, &q.note)?;
        let time_ns = self
            .hub
            .set_soc(&q.channel_id, q.soc, &q.set_by, &q.note)
            .await?;
        Ok(Response::new(pb::SetChannelSocResponse {
            soc: q.soc,
            time_unix_ns: time_ns,
        }))
    }
}

/// Channels per ListChannels page at most: 1,000 × a 4 KiB description
/// stays well inside the 16 MiB message limit.
const MAX_CHANNELS_PER_PAGE: usize = 1000;

#[tonic::async_trait]
impl pb::ingest_service_server::IngestService for Api {
    type StreamReadingsStream = BoxStream<pb::StreamReadingsResponse>;

    async fn stream_readings(
        &self,
        request: Request<Streaming<pb::StreamReadingsRequest>>,
    ) -> Result<Response<Self::StreamReadingsStream>, Status> {
        let principal = self.authorize(&request, Permission::Ingest, "StreamReadings")?;
        let client = match &principal {
            Some(p) => format!("token {:?}", p.name),
            None => request
                .remote_addr()
                .map(|a| a.ip().to_string())
                .unwrap_or_else(|| "unknown".into()),
        };
        let client_slot = take_client_slot(
            &self.streams_by_client,
            client,
            self.limits.max_streams_per_client,
        )?;
        let idle = std::time::Duration::from_secs(self.limits.stream_idle_timeout_s);
        let mut inbound = request.into_inner();
        let shutdown = self.hub.shutdown.clone();
        if *shutdown.borrow() {
            return Err(Status::unavailable(
                "the server is shutting down; reconnect to another or retry shortly",
            ));
        }
        let slot = take_slot(
            &self.hub.metrics,
            |m| &m.ingest_streams,
            MAX_INGEST_STREAMS,
            "ingest streams",
        )?;
        let (tx, rx) = mpsc::channel(STREAM_RESPONSE_BUFFER);
        let hub = self.hub.clone();
        tokio::spawn(async move {
            let _slot = slot;
            let _client_slot = client_slot;
            loop {
                let message = tokio::select! {
                    m = tokio::time::timeout(idle, inbound.next()) => match m {
                        Ok(m) => m,
                        Err(_) => {
                            let _ = tx.send(Err(Status::deadline_exceeded(format!(
                                "no batch for {} s (limits.stream_idle_timeout_s): stream closed to free its slot; reconnect and resend after last_stored_seq",
                                idle.as_secs()
                            )))).await;
                            break;
                        }
                    },
                    _ = ingest::stopped(shutdown.clone()) => {
                        let _ = tx.send(Err(Status::unavailable(
                            "the server is shutting down; every acknowledged batch is stored: reconnect and resend after last_stored_seq",
                        ))).await;
                        break;
                    }
                };
                let Some(message) = message else { break };
                let message = match message {
                    Ok(m) => m,
                    Err(status) => {
                        // Undecodable or oversized message: tell the client why.
                        tracing::debug!(%status, "ingest stream ended by a bad message");
                        let _ = tx.send(Err(status)).await;
                        break;
                    }
                };
                let Some(batch) = message.batch else {
                    // Answered in-band, as the contract says: the stream stays open.
                    let refusal = pb::StreamReadingsResponse {
                        ack: Some(pb::BatchAck {
                            rejected: vec![pb::Rejection {
                                field: "batch".into(),
                                reason: "batch = unset: each message must carry a batch".into(),
                                ..Default::default()
                            }],
                            ..Default::default()
                        }),
                    };
                    if tx.send(Ok(refusal)).await.is_err() {
                        break;
                    }
                    continue;
                };
                if let Err(e) = auth::check_channel(principal.as_ref(), &batch.channel_id) {
                    let _ = tx.send(Err(deny(e, "StreamReadings"))).await;
                    break;
                }
                let pb::ReadingBatch {
                    channel_id,
                    batch_id,
                    readings: wire,
                } = batch;
                let readings: Vec<RawReading> = wire.iter().map(RawReading::from).collect();
                // The wire form is not needed past this point; free it before
                // waiting for the commit.
                drop(wire);
                let reply = match hub.ingest(&channel_id, batch_id, readings).await {
                    Ok(ack) => Ok(pb::StreamReadingsResponse {
                        ack: Some(pb::BatchAck {
                            channel_id: ack.channel_id,
                            batch_id: ack.batch_id,
                            accepted: ack.accepted,
                            duplicates: ack.duplicates,
                            out_of_order: ack.out_of_order,
                            rejected: ack
                                .rejected
                                .into_iter()
                                .map(|r| pb::Rejection {
                                    index: r.index,
                                    seq: r.seq,
                                    field: r.field.to_string(),
                                    reason: r.reason,
                                })
                                .collect(),
                            last_stored_seq: ack.last_stored_seq,
                        }),
                    }),
                    // Batch-level problems are answered in-band and the stream
                    // stays open; the rest end the stream with their status.
                    Err(e @ (IngestError::UnknownChannel(_) | IngestError::Invalid { .. })) => {
                        hub.metrics
                            .batches_refused
                            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        let message = e.to_string();
                        let field = match &e {
                            IngestError::UnknownChannel(_) => "channel_id",
                            _ => "readings",
                        };
                        Ok(pb::StreamReadingsResponse {
                            ack: Some(pb::BatchAck {
                                channel_id: channel_id.chars().take(80).collect(),
                                batch_id,
                                rejected: vec![pb::Rejection {
                                    index: 0,
                                    seq: 0,
                                    field: field.into(),
                                    reason: message,
                                }],
                                ..Default::default()
                            }),
                        })
                    }
                    Err(e) => {
                        hub.metrics
                            .batches_refused
                            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        Err(Status::from(e))
                    }
                };
                let fatal = reply.is_err();
                if tx.send(reply).await.is_err() || fatal {
                    break;
                }
            }
        });
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }

    async fn get_resume_point(
        &self,
        request: Request<pb::GetResumePointRequest>,
    ) -> Result<Response<pb::GetResumePointResponse>, Status> {
        let principal = self.authorize(&request, Permission::Ingest, "GetResumePoint")?;
        let channel_id = request.into_inner().channel_id;
        auth::check_channel(principal.as_ref(), &channel_id)
            .map_err(|e| deny(e, "GetResumePoint"))?;
        let rt = self.hub.channel(&channel_id)?;
        let max = rt.lock().expect("channel state poisoned").committed_seq;
        Ok(Response::new(pb::GetResumePointResponse {
            last_stored_seq: max.unwrap_or(0),
            any_stored: max.is_some(),
        }))
    }
}

/// Rows per QueryReadings response message.
const QUERY_PAGE_ROWS: u32 = 2_000;
/// How long a query waits for a free slot before it is refused.
const QUERY_WAIT: std::time::Duration = std::time::Duration::from_secs(10);
/// How long a client may leave a page unread before its query is ended
/// (freeing its slot and memory).
const QUERY_SEND_TIMEOUT: std::time::Duration = std::time::Duration::from_secs(30);

/// The range one QueryReadings call reads, page by page.
struct QueryPage {
    reader: sqlx::SqlitePool,
    channel_key: i64,
    start_ns: i64,
    end_ns: i64,
}

impl QueryPage {
    async fn stream_to(
        self,
        tx: mpsc::Sender<Result<pb::QueryReadingsResponse, Status>>,
        limit: u32,
        runs: &HashMap<i64, RunRow>,
    ) {
        let mut after = (self.start_ns, -1i64);
        let mut left = limit;
        while left > 0 {
            let want = left.min(QUERY_PAGE_ROWS);
            let rows = match store::query_readings_page(
                &self.reader,
                self.channel_key,
                self.start_ns,
                self.end_ns,
                after,
                want,
            )
            .await
            {
                Ok(rows) => rows,
                Err(e) => {
                    let _ = tx.send(Err(Status::from(e))).await;
                    return;
                }
            };
            let Some(last) = rows.last() else { return };
            after = (last.time_ns, last.seq as i64);
            left -= rows.len() as u32;
            let full = rows.len() as u32 == want;
            let readings = rows
                .iter()
                .map(|r| stored_to_pb(r, runs.get(&r.run_id)))
                .collect();
            drop(rows);
            let sent = tokio::time::timeout(
                QUERY_SEND_TIMEOUT,
                tx.send(Ok(pb::QueryReadingsResponse { readings })),
            )
            .await;
            match sent {
                Ok(Ok(())) if full => {}
                Ok(Ok(())) | Ok(Err(_)) => return,
                Err(_) => {
                    let _ = tx.try_send(Err(Status::deadline_exceeded(format!(
                        "the client read nothing for {} s; query ended to free its memory",
                        QUERY_SEND_TIMEOUT.as_secs()
                    ))));
                    return;
                }
            }
        }
    }
}
const DEFAULT_QUERY_LIMIT: u32 = 100_000;

#[tonic::async_trait]
impl pb::history_service_server::HistoryService for Api {
    type QueryReadingsStream = BoxStream<pb::QueryReadingsResponse>;

    async fn query_readings(
        &self,
        request: Request<pb::QueryReadingsRequest>,
    ) -> Result<Response<Self::QueryReadingsStream>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "QueryReadings")?;
        let q = request.into_inner();
        let (_, key) = self.key_of(&q.channel_id)?;
        let end = if q.end_unix_ns == 0 {
            i64::MAX
        } else {
            q.end_unix_ns
        };
        if end <= q.start_unix_ns {
            return Err(invalid(
                "end_unix_ns",
                q.end_unix_ns,
                "must be after start_unix_ns",
            ));
        }
        let limit = if q.limit == 0 {
            DEFAULT_QUERY_LIMIT
        } else {
            q.limit
        }
        .min(self.limits.max_query_rows);
        let permit = tokio::time::timeout(QUERY_WAIT, self.queries.clone().acquire_owned())
            .await
            .map_err(|_| {
                Status::resource_exhausted(format!(
                    "{MAX_CONCURRENT_QUERIES} history queries are running; retry shortly"
                ))
            })?
            .map_err(|_| Status::unavailable("the server is shutting down"))?;
        let runs = self.runs_of(key).await?;
        let page = QueryPage {
            reader: self.hub.store.reader.clone(),
            channel_key: key,
            start_ns: q.start_unix_ns,
            end_ns: end,
        };
        // One page in the channel and one being built at most: a client
        // that does not read holds ≈ 2 pages, and only for QUERY_SEND_TIMEOUT.
        let (tx, rx) = mpsc::channel(1);
        tokio::spawn(async move {
            let _permit = permit;
            page.stream_to(tx, limit, &runs).await;
        });
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }

    async fn query_buckets(
        &self,
        request: Request<pb::QueryBucketsRequest>,
    ) -> Result<Response<pb::QueryBucketsResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "QueryBuckets")?;
        let q = request.into_inner();
        let (_, key) = self.key_of(&q.channel_id)?;
        if q.bucket_width_ns <= 0 {
            return Err(invalid(
                "bucket_width_ns",
                q.bucket_width_ns,
                "must be positive",
            ));
        }
        let end = if q.end_unix_ns == 0 {
            i64::MAX
        } else {
            q.end_unix_ns
        };
        if end <= q.start_unix_ns {
            return Err(invalid(
                "end_unix_ns",
                q.end_unix_ns,
                "must be after start_unix_ns",
            ));
        }
        if (end.saturating_sub(q.start_unix_ns)) / q.bucket_width_ns > 100_000 && q.end_unix_ns != 0
        {
            return Err(invalid(
                "bucket_width_ns",
                q.bucket_width_ns,
                "gives more than 100,000 buckets; widen it",
            ));
        }
        let rows = store::query_buckets(
            &self.hub.store.reader,
            key,
            q.start_unix_ns,
            end,
            q.bucket_width_ns,
        )
        .await?;
        let runs = self.runs_of(key).await?;
        let buckets = rows
            .iter()
            .map(|b| {
                // ΔG = −nFE is linear in E, so its min/max/mean follow from E's
                // (using the run of the bucket's last reading).
                let n = runs.get(&b.last_run_id).map(|r| r.n_electrons).unwrap_or(1);
                let dg = |e: f64| electrochem::thermo::delta_g_kj_per_mol(n, e);
                let [e_min, e_max, e_mean, e_last] = b.cell_volts_used;
                let stats = |s: [f64; 4]| pb::Stats {
                    min: s[0],
                    max: s[1],
                    mean: s[2],
                    last: s[3],
                };
                pb::Bucket {
                    start_unix_ns: q.start_unix_ns + b.bucket * q.bucket_width_ns,
                    count: b.count,
                    volts: Some(stats(b.volts)),
                    soc: b.soc.map(stats),
                    delta_g_kj_per_mol: Some(pb::Stats {
                        min: dg(e_max),
                        max: dg(e_min),
                        mean: dg(e_mean),
                        last: dg(e_last),
                    }),
                }
            })
            .collect();
        Ok(Response::new(pb::QueryBucketsResponse { buckets }))
    }

    async fn get_channel_state(
        &self,
        request: Request<pb::GetChannelStateRequest>,
    ) -> Result<Response<pb::GetChannelStateResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "GetChannelState")?;
        let q = request.into_inner();
        let (rt, key) = self.key_of(&q.channel_id)?;
        let latest = store::latest_reading(&self.hub.store.reader, key).await?;
        let runs = self.runs_of(key).await?;
        let g = rt.lock().expect("channel state poisoned");
        let (resistance_ohm, resistance_source, uncertainty, age) =
            match (g.def.resistance_ohm, g.est.resistance) {
                (Some(r), _) => (Some(r), "configured", None, None),
                (None, Some(e)) => (
                    Some(e.ohm),
                    "current_step",
                    Some(e.uncertainty_ohm),
                    Some((g.last_time_ns - e.last_sample_ns) as f64 / 1e9),
                ),
                _ => (None, "none", None, None),
            };
        let latest_soc_model = latest.as_ref().and_then(|r| r.soc_model);
        let soc_counted = latest
            .as_ref()
            .and_then(|r| r.soc_fused)
            .filter(|_| g.def.capacity_ah > 0.0);
        let is_h2 = g.chemistry.id == crate::electrochem::builtin::WATER_CELL_ID;
        let h2 = is_h2.then(|| estimator::hydrogen_account(&g.est, &g.est_config));
        let latest_pb = latest
            .as_ref()
            .map(|r| stored_to_pb(r, runs.get(&r.run_id)));
        // On the HHV basis at the reading's temperature.
        let voltage_efficiency = latest_pb
            .as_ref()
            .and_then(|r| {
                r.derived
                    .as_ref()?
                    .hydrogen
                    .as_ref()?
                    .voltage_efficiency_hhv
            })
            .filter(|_| {
                latest
                    .as_ref()
                    .is_some_and(|r| r.amps.is_some_and(|i| i > 0.0))
            });
        let estimator_pb = pb::EstimatorState {
            resistance_ohm,
            resistance_uncertainty_ohm: uncertainty,
            resistance_age_s: age,
            resistance_source: resistance_source.into(),
            soc_counted,
            soc_disagreement: match (soc_counted, latest_soc_model) {
                (Some(c), Some(m)) => Some(c - m),
                _ => None,
            },
            soc_method: if g.def.capacity_ah > 0.0 {
                "anchored_count"
            } else {
                "model"
            }
            .into(),
            gaps: g.est.gaps,
            reaction_extent_mol: estimator::reaction_extent_mol(&g.est, g.chemistry.n_electrons),
            hydrogen_mol: h2.map(|h| h.hydrogen_mol),
            hydrogen_g: h2.map(|h| h.hydrogen_g),
            hydrogen_normal_litres: h2.map(|h| h.hydrogen_normal_litres),
            oxygen_mol: h2.map(|h| h.oxygen_mol),
            voltage_efficiency,
            specific_energy_kwh_per_kg_h2: h2.and_then(|h| h.specific_energy_kwh_per_kg),
        };
        Ok(Response::new(pb::GetChannelStateResponse {
            channel: Some(channel_to_pb(&g.def, g.run_id)),
            latest: latest_pb,
            estimator: Some(estimator_pb),
            last_seen_unix_ns: g.last_time_ns,
        }))
    }

    async fn list_cycles(
        &self,
        request: Request<pb::ListCyclesRequest>,
    ) -> Result<Response<pb::ListCyclesResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "ListCycles")?;
        let (rt, key) = self.key_of(&request.into_inner().channel_id)?;
        let rows = store::list_cycles(&self.hub.store.reader, key).await?;
        let mut cycles = Vec::with_capacity(rows.len() + 1);
        for (run_id, json) in rows {
            let c: estimator::CycleRecord = serde_json::from_str(&json)
                .map_err(|e| Status::internal(format!("stored cycle: {e}")))?;
            cycles.push(convert::cycle_to_pb(run_id, &c));
        }
        // The cycle still running lives in the channel's state, not the store.
        let g = rt.lock().expect("channel state poisoned");
        if let Some(open) = g.est.cycles.peek(&estimator::Counters::of(&g.est)) {
            cycles.push(convert::cycle_to_pb(g.run_id, &open));
        }
        Ok(Response::new(pb::ListCyclesResponse { cycles }))
    }
}

#[tonic::async_trait]
impl pb::chemistry_service_server::ChemistryService for Api {
    async fn list_chemistries(
        &self,
        request: Request<pb::ListChemistriesRequest>,
    ) -> Result<Response<pb::ListChemistriesResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "ListChemistries")?;
        let registry = self.hub.registry.read().expect("registry poisoned").clone();
        let chemistries = registry
            .iter()
            .map(|c| pb::ChemistryInfo {
                chemistry_id: c.id.clone(),
                name: c.name.clone(),
                reaction: c.reaction.clone(),
                n_electrons: c.n_electrons,
                e_standard_298_v: c.e_standard_298_volts,
                de_dt_mv_per_k: c.de_dt_volts_per_k * 1e3,
                delta_h_kj_per_mol: c.delta_h_kj_per_mol,
                thermoneutral_v: c.thermoneutral_volts(),
                min_cell_volts: c.min_cell_volts,
                max_cell_volts: c.max_cell_volts,
                soc_model: c.soc_model.name().into(),
                sources: c.sources.clone(),
                notes: c.notes.clone(),
                builtin: c.builtin,
            })
            .collect();
        Ok(Response::new(pb::ListChemistriesResponse { chemistries }))
    }

    async fn evaluate(
        &self,
        request: Request<pb::EvaluateRequest>,
    ) -> Result<Response<pb::EvaluateResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "Evaluate")?;
        let q = request.into_inner();
        let registry = self.hub.registry.read().expect("registry poisoned").clone();
        let chem = registry
            .get(&q.chemistry_id)
            .map_err(|e| Status::not_found(format!("chemistry_id: {e}")))?;
        let chem = match q.e_standard_override_v {
            Some(e) if e.is_finite() => Arc::new(chem.with_e_standard_override(e)),
            Some(e) => return Err(invalid("e_standard_override_v", e, "must be finite")),
            None => chem,
        };
        let temp_c = q.temp_c.unwrap_or(25.0);
        if !(temp_c.is_finite() && temp_c > -273.15) {
            return Err(invalid(
                "temp_c",
                temp_c,
                "must be a finite temperature above -273.15 °C",
            ));
        }
        let temp_k = temp_c + 273.15;
        let cells = q.cells_in_series.max(1);
        let tolerance = if q.equilibrium_tolerance_mv == 0.0 {
            1e-3
        } else {
            q.equilibrium_tolerance_mv / 1e3
        };
        let ev = match q.input {
            Some(pb::evaluate_request::Input::Volts(v)) => electrochem::evaluate(
                &chem,
                EvalRequest {
                    stack_volts: v,
                    cells_in_series: cells,
                    temp_k,
                    equilibrium_tolerance_volts: tolerance,
                },
            ),
            Some(pb::evaluate_request::Input::Soc(s)) => {
                electrochem::evaluate_at_soc(&chem, s, cells, temp_k, tolerance)
            }
            None => return Err(invalid("input", "unset", "give volts or soc")),
        }
        .map_err(|e| Status::invalid_argument(e.to_string()))?;
        let r = electrochem::report::EvalReport::new(&chem, &ev);
        Ok(Response::new(pb::EvaluateResponse {
            chemistry_id: r.chemistry_id,
            n_electrons: r.n_electrons,
            temp_k: r.temp_k,
            cell_volts: r.cell_volts,
            e_standard_v: r.e_standard_v,
            delta_g_kj_per_mol: r.delta_g_kj_per_mol,
            delta_g_standard_kj_per_mol: r.delta_g_standard_kj_per_mol,
            ln_q: r.ln_q,
            log10_q: r.log10_q,
            log10_k: r.log10_k,
            affinity_ln_k_over_q: r.affinity_ln_k_over_q,
            state: state_to_pb(ev.thermo.state),
            soc: r.soc,
            soc_model: r.soc_model.into(),
            soc_clamped: r.soc_clamped,
            thermoneutral_v: r.thermoneutral_v,
        }))
    }
}

fn passes(e: &AlertEvent, channel: &str, min_severity: i64) -> bool {
    (channel.is_empty() || e.alert.channel_id == channel) && e.alert.severity.code() >= min_severity
}

#[tonic::async_trait]
impl pb::alert_service_server::AlertService for Api {
    type WatchAlertsStream = BoxStream<pb::WatchAlertsResponse>;

    async fn watch_alerts(
        &self,
        request: Request<pb::WatchAlertsRequest>,
    ) -> Result<Response<Self::WatchAlertsStream>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "WatchAlerts")?;
        let q = request.into_inner();
        if !q.channel_id.is_empty() {
            self.hub.channel(&q.channel_id)?;
        }
        let min_severity = i64::from(q.min_severity);
        // Subscribe before replaying so nothing committed in between is missed;
        // the replay's last id filters out what the live feed repeats.
        let mut live = self.hub.events.subscribe();
        let shutdown = self.hub.shutdown.clone();
        let reader = self.hub.store.reader.clone();
        let slot = take_slot(
            &self.hub.metrics,
            |m| &m.subscribers,
            MAX_SUBSCRIBERS,
            "alert subscriptions",
        )?;
        let (tx, rx) = mpsc::channel(SUBSCRIBER_BUFFER);
        tokio::spawn(async move {
            let _slot = slot;
            // An after_id beyond the newest event means "from now on".
            let newest = match store::next_ids(&reader).await {
                Ok((_, next_event)) => next_event - 1,
                Err(e) => {
                    let _ = tx.send(Err(Status::from(e))).await;
                    return;
                }
            };
            let mut last = q.after_id.min(newest);
            loop {
                let page = match store::events_after(&reader, last, 1000).await {
                    Ok(p) => p,
                    Err(e) => {
                        let _ = tx.send(Err(Status::from(e))).await;
                        return;
                    }
                };
                let done = page.len() < 1000;
                for e in page {
                    last = e.event_id;
                    if passes(&e, &q.channel_id, min_severity)
                        && tx.send(Ok(event_to_pb(&e))).await.is_err()
                    {
                        return;
                    }
                }
                if done {
                    break;
                }
            }
            let live_marker = pb::WatchAlertsResponse {
                event: pb::AlertEventKind::Live as i32,
                alert: None,
                resume_after_id: last,
            };
            if tx.send(Ok(live_marker)).await.is_err() {
                return;
            }
            loop {
                let received = tokio::select! {
                    r = live.recv() => r,
                    _ = ingest::stopped(shutdown.clone()) => {
                        let _ = tx.send(Err(Status::unavailable(format!("server shutting down; reconnect with after_id = {last}")))).await;
                        return;
                    }
                };
                match received {
                    Ok(e) => {
                        if e.event_id <= last {
                            continue;
                        }
                        last = e.event_id;
                        if !passes(&e, &q.channel_id, min_severity) {
                            continue;
                        }
                        // try_send: a subscriber whose buffer is full is told
                        // where to resume and dropped; ingest never waits for it.
                        match tx.try_send(Ok(event_to_pb(&e))) {
                            Ok(()) => {}
                            Err(mpsc::error::TrySendError::Full(_)) => {
                                let resume = last - 1;
                                let _ = tx
                                    .send(Err(Status::resource_exhausted(format!(
                                        "subscriber fell behind; reconnect with after_id = {resume}"
                                    ))))
                                    .await;
                                return;
                            }
                            Err(mpsc::error::TrySendError::Closed(_)) => return,
                        }
                    }
                    Err(tokio::sync::broadcast::error::RecvError::Lagged(_)) => {
                        let _ = tx
                            .send(Ok(pb::WatchAlertsResponse {
                                event: pb::AlertEventKind::Overflow as i32,
                                alert: None,
                                resume_after_id: last,
                            }))
                            .await;
                        let _ = tx
                            .send(Err(Status::resource_exhausted(format!(
                                "subscriber fell behind; reconnect with after_id = {last}"
                            ))))
                            .await;
                        return;
                    }
                    Err(tokio::sync::broadcast::error::RecvError::Closed) => {
                        let _ = tx
                            .send(Err(Status::unavailable(format!(
                                "server shutting down; reconnect with after_id = {last}"
                            ))))
                            .await;
                        return;
                    }
                }
            }
        });
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }

    async fn list_alerts(
        &self,
        request: Request<pb::ListAlertsRequest>,
    ) -> Result<Response<pb::ListAlertsResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "ListAlerts")?;
        let q = request.into_inner();
        let key = if q.channel_id.is_empty() {
            None
        } else {
            Some(self.key_of(&q.channel_id)?.1)
        };
        let limit = match q.limit {
            0 => 100,
            l if l > 10_000 => return Err(invalid("limit", l, "must be at most 10000")),
            l => l,
        };
        let rows = store::list_alerts(
            &self.hub.store.reader,
            key,
            i64::from(q.min_severity),
            q.active_only,
            q.after_id,
            limit,
        )
        .await?;
        let next_after_id = if rows.len() == limit as usize {
            rows.last().map(|a| a.alert_id).unwrap_or(0)
        } else {
            0
        };
        Ok(Response::new(pb::ListAlertsResponse {
            alerts: rows.iter().map(alert_to_pb).collect(),
            next_after_id,
        }))
    }

    async fn acknowledge_alert(
        &self,
        request: Request<pb::AcknowledgeAlertRequest>,
    ) -> Result<Response<pb::AcknowledgeAlertResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Operate, "AcknowledgeAlert")?;
        let q = request.into_inner();
        check_person("acknowledged_by", &q.acknowledged_by, &q.note)?;
        let alert_id = q.alert_id;
        let outcome = self
            .hub
            .submit(|reply| ingest::Job::Acknowledge {
                alert_id,
                by: q.acknowledged_by,
                note: q.note,
                time_ns: ingest::now_ns(),
                reply,
            })
            .await?;
        let event = outcome
            .events
            .into_iter()
            .next()
            .ok_or(IngestError::AlertNotFound(alert_id))?;
        Ok(Response::new(pb::AcknowledgeAlertResponse {
            alert: Some(alert_to_pb(&event.alert)),
        }))
    }

    async fn get_alert_rules(
        &self,
        request: Request<pb::GetAlertRulesRequest>,
    ) -> Result<Response<pb::GetAlertRulesResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Read, "GetAlertRules")?;
        let rt = self.hub.channel(&request.into_inner().channel_id)?;
        let rules = rt.lock().expect("channel state poisoned").rules;
        Ok(Response::new(pb::GetAlertRulesResponse {
            rules: Some(rules_to_pb(&rules)),
        }))
    }

    async fn put_alert_rules(
        &self,
        request: Request<pb::PutAlertRulesRequest>,
    ) -> Result<Response<pb::PutAlertRulesResponse>, Status> {
        let _principal = self.authorize(&request, Permission::Operate, "PutAlertRules")?;
        let q = request.into_inner();
        let (rt, key) = self.key_of(&q.channel_id)?;
        let rules = rules_from_pb(
            q.rules
                .ok_or_else(|| invalid("rules", "unset", "rules are required"))?,
        )?;
        let json = serde_json::to_string(&rules).map_err(|e| Status::internal(e.to_string()))?;
        store::put_rules(&self.hub.store, key, &json).await?;
        rt.lock().expect("channel state poisoned").rules = rules;
        Ok(Response::new(pb::PutAlertRulesResponse {
            rules: Some(rules_to_pb(&rules)),
        }))
    }
}

pub fn severity_from_pb(code: i32) -> Severity {
    Severity::from_code(i64::from(code))
}
