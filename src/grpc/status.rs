//! The one table from the crate's errors to gRPC status codes.

use crate::alerts::feed::{FeedEnd, TooManySubscribers};
use crate::ingest::IngestError;
use crate::ingest::session::AdmitError;
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
            IngestError::ShuttingDown | IngestError::Store(StoreError::Fenced(_)) => {
                Status::unavailable(message)
            }
            IngestError::OwnedElsewhere(o) => owned_elsewhere(&o, message),
            IngestError::StoredUnusable { .. } => Status::failed_precondition(message),
            IngestError::Store(StoreError::Unwritable { fault, .. }) => {
                tracing::warn!(error = %message, "write refused by storage");
                storage_status(fault, message)
            }
            IngestError::Store(StoreError::InUse { .. } | StoreError::Open { .. }) => {
                Status::failed_precondition(message)
            }
            IngestError::Store(StoreError::Connect { .. }) => Status::unavailable(message),
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

/// UNAVAILABLE (what rigs retry), naming the owner in the message and in
/// the `gibbsline-owner` metadata a rig or balancer can follow.
fn owned_elsewhere(o: &crate::ingest::ownership::OwnedElsewhere, message: String) -> Status {
    let mut status = Status::unavailable(message);
    if let Ok(v) = o.owner_addr.parse() {
        status.metadata_mut().insert("gibbsline-owner", v);
    }
    status
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

/// INVALID_ARGUMENT saying `field = value: reason`, as every refusal does.
pub fn invalid(field: &str, value: impl std::fmt::Display, reason: &str) -> Status {
    Status::invalid_argument(format!("{field} = {value}: {reason}"))
}

impl From<AdmitError> for Status {
    fn from(e: AdmitError) -> Status {
        match e {
            AdmitError::ShuttingDown => Status::unavailable(e.to_string()),
            AdmitError::ClientBusy { .. } | AdmitError::ServerBusy { .. } => {
                Status::resource_exhausted(e.to_string())
            }
        }
    }
}

impl From<TooManySubscribers> for Status {
    fn from(e: TooManySubscribers) -> Status {
        Status::resource_exhausted(e.to_string())
    }
}

impl From<FeedEnd> for Status {
    fn from(e: FeedEnd) -> Status {
        match e {
            FeedEnd::Store(e) => e.into(),
            FeedEnd::ShuttingDown { .. } => Status::unavailable(e.to_string()),
            FeedEnd::FellBehind { .. } => Status::resource_exhausted(e.to_string()),
        }
    }
}

/// An operator action's name (1–200 characters) and note (≤ 4 KiB).
pub fn check_person(field: &str, name: &str, note: &str) -> Result<(), Status> {
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
