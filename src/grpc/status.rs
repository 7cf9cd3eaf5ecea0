//! The one table from the crate's errors to gRPC status codes.

use crate::ingest::IngestError;
use crate::store::{StorageFault, StoreError};
use tonic::Status;

impl From<IngestError> for Status {
    fn from(e: IngestError) -> Status {
        let message = e.to_string();
        match e {
            IngestError::UnknownChannel(_) | IngestError::AlertNotFound(_) => {
                Status::not_found(message)
            }
            IngestError::Invalid { .. } => Status::invalid_argument(message),
            IngestError::BatchTooLarge(_) => Status::resource_exhausted(message),
            IngestError::ShuttingDown => Status::unavailable(message),
            IngestError::Store(StoreError::Unwritable { fault, .. }) => {
                tracing::warn!(error = %message, "write refused by storage");
                storage_status(fault, message)
            }
            IngestError::Store(StoreError::InUse { .. }) => Status::failed_precondition(message),
            IngestError::Store(
                StoreError::Database(_)
                | StoreError::Migrate(_)
                | StoreError::Corrupt(_)
                | StoreError::Failed(_),
            ) => {
                tracing::error!(error = %message, "storage failure");
                Status::internal(message)
            }
        }
    }
}

/// gRPC's own guide to codes: RESOURCE_EXHAUSTED covers "the entire file
/// system is out of space"; UNAVAILABLE is what a client retries.
fn storage_status(fault: StorageFault, message: String) -> Status {
    match fault {
        StorageFault::Full => Status::resource_exhausted(message),
        StorageFault::ReadOnly | StorageFault::Missing => Status::failed_precondition(message),
        StorageFault::Corrupt => Status::data_loss(message),
        StorageFault::Io | StorageFault::Busy => Status::unavailable(message),
    }
}

impl From<StoreError> for Status {
    fn from(e: StoreError) -> Status {
        IngestError::Store(e).into()
    }
}

pub fn invalid(field: &str, value: impl std::fmt::Display, reason: &str) -> Status {
    Status::invalid_argument(format!("{field} = {value}: {reason}"))
}
