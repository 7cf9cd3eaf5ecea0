//! One rig's ingest stream: admission (per-client and server-wide slots),
//! then batch after batch through [`Hub::ingest`] until the client stops,
//! goes idle, sends something broken or the server begins to stop.
//!
//! The shell hands in the decoded messages and turns each [`Reply`] and
//! [`End`] into its own wire form; nothing here knows the protocol.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use super::{Ack, Hub, IngestError, RawReading, stopped};
use crate::auth::{self, AuthError, Principal};
use crate::metrics::Slot;
use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::{Stream, StreamExt};

/// Ingest streams open at once, server-wide. Each holds at most one batch:
/// while decoding, ≤ 1 MiB of wire bytes and ≈ 0.5 MB decoded; while it
/// waits for its commit, only the derived rows (≈ 1.4 MB for 10,000
/// readings; the wire and raw forms are dropped by then). That bounds
/// ingest memory to roughly 128 × 1.5 MB ≈ 190 MB in the very worst case;
/// excess streams are refused.
pub const MAX_INGEST_STREAMS: u64 = 128;
/// Replies a stream may have in flight to its client.
const REPLY_BUFFER: usize = 16;

/// One message off the stream, decoded by the shell.
pub enum Inbound {
    Batch {
        channel_id: String,
        batch_id: u64,
        readings: Vec<RawReading>,
        /// From a recording: alerts stored historical, not pushed.
        historical: bool,
    },
    /// A message without a batch: answered in-band, the stream stays open.
    NoBatch,
}

/// What the client is told about one message; the stream stays open.
#[derive(Debug)]
pub enum Reply {
    Ack(Ack),
    /// The batch as a whole was refused (unknown channel, bad batch).
    Refused {
        channel_id: String,
        batch_id: u64,
        field: &'static str,
        reason: String,
    },
    NoBatch,
}

/// Why a stream ended; `E` is the shell's own decoding error.
#[derive(Debug, thiserror::Error)]
pub enum End<E: std::fmt::Display> {
    #[error(
        "no readings for {} s (limits.stream_idle_timeout_s): stream closed to free its slot; reconnect and resend after last_stored_seq",
        .0.as_secs()
    )]
    Idle(Duration),
    #[error(
        "the server is shutting down; every acknowledged batch is stored: reconnect and resend after last_stored_seq"
    )]
    ShuttingDown,
    #[error("{0}")]
    Inbound(E),
    #[error(transparent)]
    Denied(AuthError),
    #[error(transparent)]
    Failed(IngestError),
}

/// Why a stream was not let in.
#[derive(Debug, thiserror::Error)]
pub enum AdmitError {
    #[error(
        "client {client}: {limit} ingest streams open already (limits.max_streams_per_client); share one stream between channels"
    )]
    ClientBusy { client: String, limit: u64 },
    #[error("{limit} {what} are open already; retry later or share one stream between channels")]
    ServerBusy { limit: u64, what: &'static str },
    #[error("the server is shutting down; reconnect to another or retry shortly")]
    ShuttingDown,
}

/// Ingest streams open per client (by token name and by peer address):
/// one client cannot take every slot.
#[derive(Clone, Default)]
pub struct ClientSlots(Arc<Mutex<HashMap<String, u64>>>);

/// A client's stream slot, given back when the stream ends.
pub struct ClientSlot {
    slots: ClientSlots,
    client: String,
}

impl Drop for ClientSlot {
    fn drop(&mut self) {
        let mut map = self.slots.0.lock().expect("client map poisoned");
        if let Some(n) = map.get_mut(&self.client) {
            *n -= 1;
            if *n == 0 {
                map.remove(&self.client);
            }
        }
    }
}

impl ClientSlots {
    /// A place for `client` if it holds fewer than `limit`.
    pub fn take(&self, client: String, limit: u64) -> Option<ClientSlot> {
        let mut map = self.0.lock().expect("client map poisoned");
        let open = map.entry(client.clone()).or_insert(0);
        if *open >= limit {
            return None;
        }
        *open += 1;
        Some(ClientSlot {
            slots: self.clone(),
            client,
        })
    }
}

/// The caller of one stream and the rules it streams under.
pub struct Session {
    pub hub: Arc<Hub>,
    pub principal: Option<Principal>,
    /// The peer's address (IP), or "unknown".
    pub address: String,
    pub idle: Duration,
    pub max_streams_per_client: u64,
}

/// The slots an admitted stream holds until it ends.
struct Admitted {
    _token: Option<ClientSlot>,
    _address: ClientSlot,
    _server: Slot,
}

impl Session {
    /// Admits the stream and runs it on its own task; the replies come
    /// back as a stream, ending with the reason it stopped (if any).
    pub fn start<S, E>(
        self,
        slots: &ClientSlots,
        inbound: S,
    ) -> Result<impl Stream<Item = Result<Reply, End<E>>> + use<S, E>, AdmitError>
    where
        S: Stream<Item = Result<Inbound, E>> + Send + Unpin + 'static,
        E: std::fmt::Display + Send + 'static,
    {
        let limit = self.max_streams_per_client;
        let busy = |client: &str| AdmitError::ClientBusy {
            client: client.to_string(),
            limit,
        };
        // Held to the limit by token and by address alike: several tokens
        // from one machine, or one token from many, take no more.
        let by_token = match &self.principal {
            Some(p) => {
                let client = format!("token {:?}", p.name);
                Some(
                    slots
                        .take(client.clone(), limit)
                        .ok_or_else(|| busy(&client))?,
                )
            }
            None => None,
        };
        let address = format!("address {}", self.address);
        let by_address = slots
            .take(address.clone(), limit)
            .ok_or_else(|| busy(&address))?;
        if self.hub.is_shutting_down() {
            return Err(AdmitError::ShuttingDown);
        }
        let server = self
            .hub
            .metrics()
            .take_slot(|m| &m.ingest_streams, MAX_INGEST_STREAMS)
            .ok_or(AdmitError::ServerBusy {
                limit: MAX_INGEST_STREAMS,
                what: "ingest streams",
            })?;
        let admitted = Admitted {
            _token: by_token,
            _address: by_address,
            _server: server,
        };
        let (tx, rx) = mpsc::channel(REPLY_BUFFER);
        tokio::spawn(async move {
            let _admitted = admitted;
            self.serve(inbound, tx).await;
        });
        Ok(ReceiverStream::new(rx))
    }

    async fn serve<S, E>(self, mut inbound: S, tx: mpsc::Sender<Result<Reply, End<E>>>)
    where
        S: Stream<Item = Result<Inbound, E>> + Unpin,
        E: std::fmt::Display,
    {
        // Idleness counts from the last batch that carried readings: an
        // empty batch or a message without one keeps no slot alive.
        let mut idle_from = tokio::time::Instant::now();
        loop {
            let message = match self.next_message(&mut inbound, idle_from + self.idle).await {
                Ok(Some(m)) => m,
                Ok(None) => return,
                Err(end) => {
                    let _ = tx.send(Err(end)).await;
                    return;
                }
            };
            if matches!(&message, Inbound::Batch { readings, .. } if !readings.is_empty()) {
                idle_from = tokio::time::Instant::now();
            }
            let reply = self.answer(message).await;
            let fatal = reply.is_err();
            if tx.send(reply).await.is_err() || fatal {
                return;
            }
        }
    }

    /// The next message, or why there is none: idle limit, shutdown, a
    /// broken message. `Ok(None)` when the client closed its side.
    async fn next_message<S, E>(
        &self,
        inbound: &mut S,
        idle_at: tokio::time::Instant,
    ) -> Result<Option<Inbound>, End<E>>
    where
        S: Stream<Item = Result<Inbound, E>> + Unpin,
        E: std::fmt::Display,
    {
        tokio::select! {
            m = tokio::time::timeout_at(idle_at, inbound.next()) => match m {
                Ok(Some(Ok(m))) => Ok(Some(m)),
                Ok(Some(Err(e))) => {
                    tracing::debug!(error = %e, "ingest stream ended by a bad message");
                    Err(End::Inbound(e))
                }
                Ok(None) => Ok(None),
                Err(_) => Err(End::Idle(self.idle)),
            },
            _ = stopped(self.hub.shutdown_signal()) => Err(End::ShuttingDown),
        }
    }

    /// One message's answer: an ack, an in-band refusal, or the end.
    async fn answer<E: std::fmt::Display>(&self, message: Inbound) -> Result<Reply, End<E>> {
        let Inbound::Batch {
            channel_id,
            batch_id,
            readings,
            historical,
        } = message
        else {
            return Ok(Reply::NoBatch);
        };
        auth::check_channel(self.principal.as_ref(), &channel_id).map_err(End::Denied)?;
        match self
            .hub
            .ingest(&channel_id, batch_id, readings, historical)
            .await
        {
            Ok(ack) => Ok(Reply::Ack(ack)),
            // Batch-level problems are answered in-band and the stream
            // stays open; the rest end the stream.
            Err(e @ (IngestError::UnknownChannel(_) | IngestError::Invalid { .. })) => {
                self.count_refused();
                let field = match &e {
                    IngestError::UnknownChannel(_) => "channel_id",
                    _ => "readings",
                };
                Ok(Reply::Refused {
                    channel_id: channel_id.chars().take(80).collect(),
                    batch_id,
                    field,
                    reason: e.to_string(),
                })
            }
            Err(e) => {
                self.count_refused();
                Err(End::Failed(e))
            }
        }
    }

    fn count_refused(&self) {
        self.hub
            .metrics()
            .batches_refused
            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    }
}
