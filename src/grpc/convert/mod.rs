//! Conversions between generated protobuf types and the crate's own, at
//! the edge of the gRPC shell. Conversions that can fail name the field.

mod alert;
mod channel;
mod reading;
mod state;

pub use alert::{alert_to_pb, event_to_pb, rules_from_pb, rules_to_pb};
pub use channel::{channel_from_pb, channel_to_pb, chemistry_to_pb, gas_from_pb, sign_from_pb};
pub use reading::{columns_of, cycle_to_pb, hydrogen_to_pb, state_to_pb, stored_to_pb};
pub use state::{buckets_to_pb, estimator_to_pb};
