//! gRPC shell: one file per proto service, thin handlers that convert at
//! the edge and call the hub. Authorization: the [`authz`] layer; errors
//! become statuses in [`status`] only.

pub mod alert;
pub mod authz;
pub mod channel;
pub mod chemistry;
pub mod codec;
pub mod convert;
pub mod history;
pub mod ingest;
pub mod status;

use crate::config::Limits;
use crate::ingest::Hub;
use crate::pb;
use std::pin::Pin;
use std::sync::Arc;
use tokio_stream::Stream;

type BoxStream<T> = Pin<Box<dyn Stream<Item = Result<T, tonic::Status>> + Send>>;

/// Largest gRPC message sent, and accepted outside ingest: 16 MiB.
pub const MAX_MESSAGE_BYTES: usize = 16 * 1024 * 1024;
/// Largest ingest message accepted: 1 MiB (a full batch of 10,000 readings
/// is ≈ 400 kB); it bounds what a flood of streams makes the server decode.
pub const MAX_INGEST_MESSAGE_BYTES: usize = 1024 * 1024;

/// The name the health service reports ingest under.
pub const INGEST_SERVICE_NAME: &str = "gibbsline.v1.IngestService";

/// Adds the five services, each with its message limits, to a router.
pub fn add_services<L>(
    router: tonic::transport::server::Router<L>,
    hub: &Arc<Hub>,
    limits: Limits,
) -> tonic::transport::server::Router<L> {
    use pb::{
        alert_service_server::AlertServiceServer, channel_service_server::ChannelServiceServer,
        chemistry_service_server::ChemistryServiceServer,
        history_service_server::HistoryServiceServer, ingest_service_server::IngestServiceServer,
    };
    let hub = || hub.clone();
    macro_rules! limited {
        ($server:expr, $decode:expr) => {
            $server
                .max_decoding_message_size($decode)
                .max_encoding_message_size(MAX_MESSAGE_BYTES)
        };
    }
    let ingest = ingest::IngestApi {
        hub: hub(),
        limits,
        slots: Default::default(),
    };
    let history = history::HistoryApi::new(hub(), limits.max_query_rows);
    router
        .add_service(limited!(
            ChannelServiceServer::new(channel::ChannelApi { hub: hub() }),
            MAX_MESSAGE_BYTES
        ))
        .add_service(limited!(
            IngestServiceServer::new(ingest),
            MAX_INGEST_MESSAGE_BYTES
        ))
        .add_service(limited!(
            HistoryServiceServer::new(history),
            MAX_MESSAGE_BYTES
        ))
        .add_service(limited!(
            ChemistryServiceServer::new(chemistry::ChemistryApi { hub: hub() }),
            MAX_MESSAGE_BYTES
        ))
        .add_service(limited!(
            AlertServiceServer::new(alert::AlertApi { hub: hub() }),
            MAX_MESSAGE_BYTES
        ))
}
