//! Operator alerts. `rules` is the pure engine; the ingest path runs it on
//! every derived reading and stores its changes with the reading. `feed`
//! is the shell side: stored events replayed, then the live ones.
//!
//! These alerts are monitoring aids, not a safety system: they do not
//! replace hardware interlocks, battery-management cut-offs, gas detection
//! or ventilation.

pub mod feed;
pub mod rules;

pub use rules::{
    AlertChange, AlertKind, AlertRules, ChannelRuleState, RaisedAlert, Severity, Threshold,
};
