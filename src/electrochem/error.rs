//! Errors of the electrochemistry core. Every message names the field and
//! the value, so a user can find the line to fix.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use std::fmt::Display;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ChemistryError {
    #[error("{field} = {value}: {reason}")]
    Invalid {
        field: String,
        value: String,
        reason: String,
    },
    #[error("unknown chemistry id {0:?}")]
    UnknownChemistry(String),
    #[error("duplicate chemistry id {0:?}")]
    DuplicateChemistry(String),
    #[error("{path}: {message}")]
    File { path: String, message: String },
}

impl ChemistryError {
    pub fn invalid(
        field: impl Into<String>,
        value: impl Display,
        reason: impl Into<String>,
    ) -> Self {
        ChemistryError::Invalid {
            field: field.into(),
            value: value.to_string(),
            reason: reason.into(),
        }
    }
}
