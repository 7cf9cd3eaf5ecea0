//! The one table from the crate's errors to gRPC status codes.

use crate::ingest::IngestError;
use crate::store::StoreError;
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
            IngestError::Store(
                StoreError::Database(_) | StoreError::Migrate(_) | StoreError::Corrupt(_),
            ) => {
                tracing::error!(error = %message, "storage failure");
                Status::internal(message)
            }
        }
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
