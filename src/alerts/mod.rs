//! Operator alerts. `rules` is the pure engine; the ingest path runs it on
//! every derived reading and stores its changes with the reading.
//!
//! These alerts are monitoring aids, not a safety system: they do not
//! replace hardware interlocks, battery-management cut-offs, gas detection
//! or ventilation.

pub mod rules;

pub use rules::{
    AlertChange, AlertKind, AlertRules, ChannelRuleState, RaisedAlert, Severity, Threshold,
};
