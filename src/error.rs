//! The error values every layer uses when it refuses what it was given:
//! the field, the value as given, and why. Each layer still has its own
//! enum for what can go wrong in it; these are what those enums carry
//! for bad input, so a message always names the field and the value.

use std::fmt::Display;

/// A value a field may not have: `field = value: reason`.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{field} = {value}: {reason}")]
pub struct FieldError {
    pub field: String,
    pub value: String,
    pub reason: String,
}

impl FieldError {
    pub fn new(field: impl Into<String>, value: impl Display, reason: impl Into<String>) -> Self {
        FieldError {
            field: field.into(),
            value: value.to_string(),
            reason: reason.into(),
        }
    }
}

/// A name that is none of the ones a setting takes (a role, a
/// durability). The caller knows which flag or field it came from and
/// says so around it.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{value:?}: expected {expected}")]
pub struct UnknownChoice {
    pub value: String,
    /// The names it takes, as a phrase: "full, normal or off".
    pub expected: &'static str,
}
