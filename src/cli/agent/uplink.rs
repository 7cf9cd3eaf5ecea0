//! One channel's spooled readings to the server: on every (re)connection,
//! ask where the server's copy ends (`GetResumePoint`), forget what it
//! has, then stream the rest in seq order and forget each batch once its
//! ack comes (the server acks only after commit). A break of any kind
//! ends the stream; the next connection starts from the resume point
//! again, so nothing is lost and a resend is a duplicate, never a double.

use super::spool::Spool;
use crate::cli::client;
use gibbsline::pb;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::{Notify, mpsc};
use tokio_stream::StreamExt;

/// Readings per batch sent.
const BATCH: u32 = 1000;
/// Batches sent and not yet acknowledged at most.
const IN_FLIGHT: usize = 4;
const RETRY_FIRST: Duration = Duration::from_millis(250);
const RETRY_MAX: Duration = Duration::from_secs(10);
/// With nothing new, the spool is looked at again after this.
const IDLE_LOOK: Duration = Duration::from_millis(500);

pub(crate) async fn run(
    addr: String,
    channel: String,
    spool: Arc<Spool>,
    wake: Arc<Notify>,
    known: Arc<Notify>,
) {
    let mut retry = RETRY_FIRST;
    loop {
        match session(&addr, &channel, &spool, &wake, &known).await {
            Ok(()) => retry = RETRY_FIRST,
            // A spool fault was logged where it happened, with its path;
            // it is not the server's doing.
            Err(e) if e.downcast_ref::<super::spool::SpoolFault>().is_some() => {
                tokio::time::sleep(retry).await;
                retry = (retry * 2).min(RETRY_MAX);
            }
            Err(e) => {
                tracing::warn!(channel, error = %e, retry_ms = retry.as_millis() as u64, "server link");
                tokio::time::sleep(retry).await;
                retry = (retry * 2).min(RETRY_MAX);
            }
        }
    }
}

/// A fresh connection: the channel's sign, and where the server's copy
/// ends (what the spool may forget, and where a new spool's seqs go on).
async fn resume(
    addr: &str,
    channel: &str,
    spool: &Spool,
    known: &Notify,
) -> anyhow::Result<(IngestServiceClient<client::Conn>, f64, u64)> {
    let conn = client::connect(addr).await?;
    let to_wire = crate::cli::import::sign_to_wire(&conn, channel).await?;
    let mut ingest = IngestServiceClient::new(conn);
    let resume = ingest
        .get_resume_point(pb::GetResumePointRequest {
            channel_id: channel.to_string(),
        })
        .await?
        .into_inner();
    let stored = if resume.any_stored {
        resume.last_stored_seq
    } else {
        0
    };
    spool.learn_next_seq(channel, stored + 1).await?;
    known.notify_one();
    spool.trim(channel, stored).await?;
    tracing::info!(channel, resume_after = stored, "streaming from the spool");
    Ok((ingest, to_wire, stored))
}

/// One connection's worth: resume, then stream until something breaks.
async fn session(
    addr: &str,
    channel: &str,
    spool: &Spool,
    wake: &Notify,
    known: &Notify,
) -> anyhow::Result<()> {
    let (mut ingest, to_wire, stored) = resume(addr, channel, spool, known).await?;
    let (tx, rx) = mpsc::channel(IN_FLIGHT);
    let mut acks = ingest
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await?
        .into_inner();
    let mut sent_up_to = stored;
    let mut in_flight = 0usize;
    loop {
        if in_flight < IN_FLIGHT {
            let rows = spool.after(channel, sent_up_to, BATCH).await?;
            if let Some(last) = rows.last() {
                let batch = pb::ReadingBatch {
                    historical: false,
                    channel_id: channel.to_string(),
                    batch_id: last.seq,
                    readings: rows.iter().map(|r| r.to_pb(to_wire)).collect(),
                };
                sent_up_to = last.seq;
                tx.send(pb::StreamReadingsRequest { batch: Some(batch) })
                    .await
                    .map_err(|_| anyhow::anyhow!("the stream closed"))?;
                in_flight += 1;
                continue;
            }
        }
        tokio::select! {
            ack = acks.next() => {
                let ack = ack.ok_or_else(|| anyhow::anyhow!("the server ended the stream"))??
                    .ack
                    .unwrap_or_default();
                for r in &ack.rejected {
                    tracing::warn!(channel, seq = r.seq, field = r.field, reason = r.reason, "reading refused by the server");
                }
                // Everything up to the batch's last seq is stored, a
                // duplicate or refused: none of it is sent again.
                spool.trim(channel, ack.batch_id).await?;
                in_flight = in_flight.saturating_sub(1);
            }
            _ = wake.notified(), if in_flight < IN_FLIGHT => {}
            _ = tokio::time::sleep(IDLE_LOOK), if in_flight < IN_FLIGHT => {}
        }
    }
}
