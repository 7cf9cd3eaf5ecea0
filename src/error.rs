//! The error values every layer uses when it refuses what it was given:
//! the field, the value as given, and why. Each layer still has its own
//! enum for what can go wrong in it; these are what those enums carry
//! for bad input, so a message always names the field and the value.

use std::fmt::Display;

/// A value a field may not have: `field = value: reason`.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{field} = {value}: {reason}")]
pub struct FieldError {
    /// The field as the user wrote it (`limits.max_query_rows`, `token[0].sha256`).
    pub field: String,
    /// The value as given, shown readably (quoted when it is text).
    pub value: String,
    /// What it must be instead.
    pub reason: String,
}

impl FieldError {
    /// A refusal of `value` for `field`.
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
    /// The name as given.
    pub value: String,
    /// The names it takes, as a phrase: "full, normal or off".
    pub expected: &'static str,
}
