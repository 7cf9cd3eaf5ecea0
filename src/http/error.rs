//! Every refusal of the HTTP shell as one JSON shape, in one place:
//! `{"error": {"code": "invalid_argument", "message": "limit = \"x\": …"}}`
//! with the HTTP status a gRPC code corresponds to.

use axum::Json;
use axum::http::{StatusCode, header};
use axum::response::{IntoResponse, Response};

/// A refused request: the status and the words the client sees.
#[derive(Debug)]
pub struct ApiError {
    status: StatusCode,
    code: &'static str,
    message: String,
}

impl ApiError {
    /// A bad path or query value, naming the field and the value.
    pub fn invalid(field: &str, value: &str, reason: &str) -> ApiError {
        ApiError {
            status: StatusCode::BAD_REQUEST,
            code: "invalid_argument",
            message: format!("{field} = {value:?}: {reason}"),
        }
    }

    /// The HTTP status (for tests and logs).
    pub fn status(&self) -> StatusCode {
        self.status
    }
}

impl From<tonic::Status> for ApiError {
    fn from(s: tonic::Status) -> ApiError {
        use tonic::Code;
        let (status, code) = match s.code() {
            Code::InvalidArgument | Code::OutOfRange => {
                (StatusCode::BAD_REQUEST, "invalid_argument")
            }
            Code::NotFound => (StatusCode::NOT_FOUND, "not_found"),
            Code::AlreadyExists => (StatusCode::CONFLICT, "already_exists"),
            Code::FailedPrecondition | Code::Aborted => {
                (StatusCode::CONFLICT, "failed_precondition")
            }
            Code::Unauthenticated => (StatusCode::UNAUTHORIZED, "unauthenticated"),
            Code::PermissionDenied => (StatusCode::FORBIDDEN, "permission_denied"),
            Code::ResourceExhausted => (StatusCode::TOO_MANY_REQUESTS, "resource_exhausted"),
            Code::Unavailable => (StatusCode::SERVICE_UNAVAILABLE, "unavailable"),
            Code::DeadlineExceeded => (StatusCode::GATEWAY_TIMEOUT, "deadline_exceeded"),
            Code::Unimplemented => (StatusCode::NOT_IMPLEMENTED, "unimplemented"),
            _ => (StatusCode::INTERNAL_SERVER_ERROR, "internal"),
        };
        ApiError {
            status,
            code,
            message: s.message().to_string(),
        }
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let body = Json(serde_json::json!({
            "error": { "code": self.code, "message": self.message }
        }));
        if self.status == StatusCode::UNAUTHORIZED {
            let challenge = [(header::WWW_AUTHENTICATE, "Bearer")];
            return (self.status, challenge, body).into_response();
        }
        (self.status, body).into_response()
    }
}
