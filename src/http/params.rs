//! Query-string parameters, each parsed with an error that names it and
//! its value; a parameter nobody asked for is refused (a typo would
//! otherwise change nothing and say nothing).

use super::error::ApiError;
use std::collections::HashMap;
use std::str::FromStr;

/// The query string's parameters, taken one by one.
#[derive(Debug, Default)]
pub struct Params(HashMap<String, String>);

impl Params {
    /// The parameters as axum parsed them.
    pub fn new(map: HashMap<String, String>) -> Params {
        Params(map)
    }

    /// `name`, parsed, or `None` when absent; `what` says what it must be.
    pub fn take<T: FromStr>(&mut self, name: &str, what: &str) -> Result<Option<T>, ApiError> {
        match self.0.remove(name) {
            None => Ok(None),
            Some(text) => text
                .parse()
                .map(Some)
                .map_err(|_| ApiError::invalid(name, &text, what)),
        }
    }

    /// `name` as text, or empty.
    pub fn text(&mut self, name: &str) -> String {
        self.0.remove(name).unwrap_or_default()
    }

    /// `true`/`false` (or absent: false).
    pub fn flag(&mut self, name: &str) -> Result<bool, ApiError> {
        Ok(self.take(name, "expected true or false")?.unwrap_or(false))
    }

    /// Refuses whatever is left.
    pub fn done(self) -> Result<(), ApiError> {
        match self.0.into_iter().next() {
            None => Ok(()),
            Some((name, value)) => Err(ApiError::invalid(
                &name,
                &value,
                "no such parameter here (see /api/v1/openapi.json)",
            )),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_bad_value_and_an_unknown_name_are_both_named() {
        let mut p = Params::new(HashMap::from([
            ("limit".to_string(), "ten".to_string()),
            ("lmit".to_string(), "10".to_string()),
        ]));
        let e = p.take::<u32>("limit", "a whole number").unwrap_err();
        assert_eq!(e.status(), axum::http::StatusCode::BAD_REQUEST);
        assert!(format!("{e:?}").contains("limit = \\\"ten\\\""), "{e:?}");
        let e = p.done().unwrap_err();
        assert!(format!("{e:?}").contains("lmit"), "{e:?}");
    }
}
