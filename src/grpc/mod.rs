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
mod ocv;
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

/// The five services, built once: the gRPC router serves them and the
/// JSON API calls the same objects in-process, so both share one set of
/// limits (query slots, ingest admission).
#[derive(Clone)]
pub struct Apis {
    /// `ChannelService`.
    pub channel: Arc<channel::ChannelApi>,
    /// `IngestService`.
    pub ingest: Arc<ingest::IngestApi>,
    /// `HistoryService`.
    pub history: Arc<history::HistoryApi>,
    /// `ChemistryService`.
    pub chemistry: Arc<chemistry::ChemistryApi>,
    /// `AlertService`.
    pub alert: Arc<alert::AlertApi>,
}

impl Apis {
    /// The services over `hub`, with the server's limits.
    pub fn new(hub: &Arc<Hub>, limits: Limits) -> Apis {
        Apis {
            channel: Arc::new(channel::ChannelApi { hub: hub.clone() }),
            ingest: Arc::new(ingest::IngestApi {
                hub: hub.clone(),
                limits,
                slots: Default::default(),
            }),
            history: Arc::new(history::HistoryApi::new(hub.clone(), limits.max_query_rows)),
            chemistry: Arc::new(chemistry::ChemistryApi { hub: hub.clone() }),
            alert: Arc::new(alert::AlertApi { hub: hub.clone() }),
        }
    }
}

/// Adds the five services, each with its message limits, to a router.
pub fn add_services<L>(
    router: tonic::transport::server::Router<L>,
    apis: &Apis,
) -> tonic::transport::server::Router<L> {
    use pb::{
        alert_service_server::AlertServiceServer, channel_service_server::ChannelServiceServer,
        chemistry_service_server::ChemistryServiceServer,
        history_service_server::HistoryServiceServer, ingest_service_server::IngestServiceServer,
    };
    macro_rules! limited {
        ($server:expr, $decode:expr) => {
            $server
                .max_decoding_message_size($decode)
                .max_encoding_message_size(MAX_MESSAGE_BYTES)
        };
    }
    router
        .add_service(limited!(
            ChannelServiceServer::from_arc(apis.channel.clone()),
            MAX_MESSAGE_BYTES
        ))
        .add_service(limited!(
            IngestServiceServer::from_arc(apis.ingest.clone()),
            MAX_INGEST_MESSAGE_BYTES
        ))
        .add_service(limited!(
            HistoryServiceServer::from_arc(apis.history.clone()),
            MAX_MESSAGE_BYTES
        ))
        .add_service(limited!(
            ChemistryServiceServer::from_arc(apis.chemistry.clone()),
            MAX_MESSAGE_BYTES
        ))
        .add_service(limited!(
            AlertServiceServer::from_arc(apis.alert.clone()),
            MAX_MESSAGE_BYTES
        ))
}
