//! `IngestService`: rigs stream readings; the session in
//! [`crate::ingest::session`] does the work, this file speaks the wire.

use super::BoxStream;
use super::authz::{caller, deny};
use crate::auth;
use crate::config::Limits;
use crate::ingest::session::{ClientSlots, End, Inbound, Reply, Session};
use crate::ingest::{Ack, Hub, RawReading};
use crate::pb;
use std::sync::Arc;
use tokio_stream::StreamExt;
use tonic::{Request, Response, Status, Streaming};

/// `IngestService`: the rigs' readings stream and its resume point.
pub struct IngestApi {
    pub(super) hub: Arc<Hub>,
    pub(super) limits: Limits,
    pub(super) slots: ClientSlots,
}

#[tonic::async_trait]
impl pb::ingest_service_server::IngestService for IngestApi {
    type StreamReadingsStream = BoxStream<pb::StreamReadingsResponse>;

    async fn stream_readings(
        &self,
        request: Request<Streaming<pb::StreamReadingsRequest>>,
    ) -> Result<Response<Self::StreamReadingsStream>, Status> {
        let principal = caller(&request);
        let address = request
            .remote_addr()
            .map(|a| a.ip().to_string())
            .unwrap_or_else(|| "unknown".into());
        let session = Session {
            hub: self.hub.clone(),
            principal,
            address,
            idle: std::time::Duration::from_secs(self.limits.stream_idle_timeout_s),
            max_streams_per_client: self.limits.max_streams_per_client,
        };
        let inbound = request.into_inner().map(|m| m.map(inbound_of));
        let replies = session.start(&self.slots, inbound)?;
        Ok(Response::new(Box::pin(
            replies.map(|r| r.map(reply_to_pb).map_err(end_to_status)),
        )))
    }

    async fn get_resume_point(
        &self,
        request: Request<pb::GetResumePointRequest>,
    ) -> Result<Response<pb::GetResumePointResponse>, Status> {
        let principal = caller(&request);
        let channel_id = request.into_inner().channel_id;
        auth::check_channel(principal.as_ref(), &channel_id)
            .map_err(|e| deny(e, "GetResumePoint"))?;
        let max = self.hub.resume_point(&channel_id).await?;
        Ok(Response::new(pb::GetResumePointResponse {
            last_stored_seq: max.unwrap_or(0),
            any_stored: max.is_some(),
        }))
    }
}

fn inbound_of(message: pb::StreamReadingsRequest) -> Inbound {
    match message.batch {
        Some(batch) => Inbound::Batch {
            channel_id: batch.channel_id,
            batch_id: batch.batch_id,
            // The wire form is dropped here, before the commit is awaited.
            readings: batch.readings.iter().map(RawReading::from).collect(),
            historical: batch.historical,
        },
        None => Inbound::NoBatch,
    }
}

fn ack_to_pb(ack: Ack) -> pb::BatchAck {
    pb::BatchAck {
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
    }
}

fn reply_to_pb(reply: Reply) -> pb::StreamReadingsResponse {
    let ack = match reply {
        Reply::Ack(ack) => ack_to_pb(ack),
        Reply::Refused {
            channel_id,
            batch_id,
            field,
            reason,
        } => pb::BatchAck {
            channel_id,
            batch_id,
            rejected: vec![pb::Rejection {
                field: field.into(),
                reason,
                ..Default::default()
            }],
            ..Default::default()
        },
        Reply::NoBatch => pb::BatchAck {
            rejected: vec![pb::Rejection {
                field: "batch".into(),
                reason: "batch = unset: each message must carry a batch".into(),
                ..Default::default()
            }],
            ..Default::default()
        },
    };
    pb::StreamReadingsResponse { ack: Some(ack) }
}

fn end_to_status(end: End<Status>) -> Status {
    match end {
        End::Idle(_) => Status::deadline_exceeded(end.to_string()),
        End::ShuttingDown => Status::unavailable(end.to_string()),
        // Undecodable or oversized message: the client is told why.
        End::Inbound(status) => status,
        End::Denied(e) => deny(e, "StreamReadings"),
        End::Failed(e) => e.into(),
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn health_reports_ingest_under_its_proto_name() {
        use tonic::server::NamedService;
        type Server = crate::pb::ingest_service_server::IngestServiceServer<super::IngestApi>;
        assert_eq!(Server::NAME, super::super::INGEST_SERVICE_NAME);
    }
}
