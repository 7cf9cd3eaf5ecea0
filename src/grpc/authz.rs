//! Authorization for every RPC in one place: a tower layer in front of the
//! services maps the method's path to the permission it needs, checks the
//! bearer token, and hands the caller to the handler as a request
//! extension ([`caller`]). Handlers never check tokens themselves.
//!
//! Paths outside the table (health, reflection) pass unchecked; a method
//! of ours missing from the table is refused, and a test keeps the table
//! equal to the protos.

use crate::auth::{AuthError, Permission, Principal, TokenTable};
use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use tonic::Status;

/// The package every service of ours lives in.
const PACKAGE_PREFIX: &str = "/gibbsline.v1.";

/// Each RPC's full path and the permission it needs.
pub static METHODS: [(&str, Permission); 21] = [
    (
        "/gibbsline.v1.ChannelService/PutChannel",
        Permission::Administer,
    ),
    ("/gibbsline.v1.ChannelService/GetChannel", Permission::Read),
    (
        "/gibbsline.v1.ChannelService/ListChannels",
        Permission::Read,
    ),
    (
        "/gibbsline.v1.ChannelService/ResetTimeline",
        Permission::Operate,
    ),
    (
        "/gibbsline.v1.ChannelService/SetChannelSoc",
        Permission::Operate,
    ),
    ("/gibbsline.v1.ChannelService/FitOcvModel", Permission::Read),
    (
        "/gibbsline.v1.ChannelService/ApplyOcvFit",
        Permission::Operate,
    ),
    (
        "/gibbsline.v1.IngestService/StreamReadings",
        Permission::Ingest,
    ),
    (
        "/gibbsline.v1.IngestService/GetResumePoint",
        Permission::Ingest,
    ),
    (
        "/gibbsline.v1.HistoryService/QueryReadings",
        Permission::Read,
    ),
    (
        "/gibbsline.v1.HistoryService/QueryBuckets",
        Permission::Read,
    ),
    (
        "/gibbsline.v1.HistoryService/GetChannelState",
        Permission::Read,
    ),
    ("/gibbsline.v1.HistoryService/ListCycles", Permission::Read),
    (
        "/gibbsline.v1.ChemistryService/ListChemistries",
        Permission::Read,
    ),
    ("/gibbsline.v1.ChemistryService/Evaluate", Permission::Read),
    ("/gibbsline.v1.AlertService/WatchAlerts", Permission::Read),
    ("/gibbsline.v1.AlertService/ListAlerts", Permission::Read),
    (
        "/gibbsline.v1.AlertService/AcknowledgeAlert",
        Permission::Operate,
    ),
    ("/gibbsline.v1.AlertService/GetAlertRules", Permission::Read),
    (
        "/gibbsline.v1.AlertService/PutAlertRules",
        Permission::Operate,
    ),
    (
        "/gibbsline.v1.AlertService/ListDeliveries",
        Permission::Read,
    ),
];

/// Who called, as the layer found them; `None` on an open server.
#[derive(Debug, Clone)]
pub struct Caller(pub Option<Principal>);

/// The caller the layer let through (none on an open server).
pub fn caller<T>(request: &tonic::Request<T>) -> Option<Principal> {
    request
        .extensions()
        .get::<Caller>()
        .and_then(|c| c.0.clone())
}

/// The status a denial gets; logged with the role and RPC, never the token.
pub fn deny(e: AuthError, rpc: &str) -> Status {
    match &e {
        AuthError::Missing | AuthError::Unknown => {
            tracing::warn!(rpc, reason = %e, "request denied: not authenticated");
            Status::unauthenticated(e.to_string())
        }
        AuthError::Forbidden { role, .. } => {
            tracing::warn!(rpc, role, "request denied: role lacks permission");
            Status::permission_denied(e.to_string())
        }
        AuthError::ChannelNotGranted { .. } => {
            tracing::warn!(rpc, role = "rig", reason = %e, "request denied: channel not granted");
            Status::permission_denied(e.to_string())
        }
    }
}

/// The decision for one request path: pass (not ours), the caller, or a denial.
fn decide(
    tokens: &TokenTable,
    path: &str,
    authorization: Option<&str>,
) -> Result<Option<Caller>, Status> {
    if !path.starts_with(PACKAGE_PREFIX) {
        return Ok(None);
    }
    let Some(&(full, permission)) = METHODS.iter().find(|(p, _)| *p == path) else {
        return Err(Status::unimplemented(format!("{path}: no such method")));
    };
    let rpc = full.rsplit('/').next().unwrap_or(full);
    tokens
        .check(authorization, permission, rpc)
        .map(|p| Some(Caller(p)))
        .map_err(|e| deny(e, rpc))
}

/// The layer: `Server::builder().layer(AuthLayer::new(tokens))`.
#[derive(Clone)]
pub struct AuthLayer {
    tokens: Arc<TokenTable>,
}

impl AuthLayer {
    /// Checks every call against `tokens` (an empty table: an open server).
    pub fn new(tokens: TokenTable) -> AuthLayer {
        AuthLayer {
            tokens: Arc::new(tokens),
        }
    }
}

impl<S> tower_layer::Layer<S> for AuthLayer {
    type Service = Authorize<S>;
    fn layer(&self, inner: S) -> Authorize<S> {
        Authorize {
            inner,
            tokens: self.tokens.clone(),
        }
    }
}

/// The service [`AuthLayer`] wraps: refuses or passes each call, with the
/// caller attached to the request for the handler.
#[derive(Clone)]
pub struct Authorize<S> {
    inner: S,
    tokens: Arc<TokenTable>,
}

type BoxFuture<T, E> = Pin<Box<dyn Future<Output = Result<T, E>> + Send>>;

impl<S, B, R> tower_service::Service<http::Request<B>> for Authorize<S>
where
    S: tower_service::Service<http::Request<B>, Response = http::Response<R>>,
    S::Future: Send + 'static,
    S::Error: Send + 'static,
    R: Default + Send + 'static,
{
    type Response = http::Response<R>;
    type Error = S::Error;
    type Future = BoxFuture<Self::Response, Self::Error>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), Self::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, mut request: http::Request<B>) -> Self::Future {
        let authorization = request
            .headers()
            .get("authorization")
            .and_then(|v| v.to_str().ok());
        match decide(&self.tokens, request.uri().path(), authorization) {
            Ok(caller) => {
                if let Some(caller) = caller {
                    request.extensions_mut().insert(caller);
                }
                Box::pin(self.inner.call(request))
            }
            Err(status) => Box::pin(std::future::ready(Ok(status.into_http()))),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use prost::Message;

    #[test]
    fn every_rpc_in_the_protos_has_a_permission() {
        let set = prost_types::FileDescriptorSet::decode(crate::pb::FILE_DESCRIPTOR_SET).unwrap();
        let mut paths: Vec<String> = set
            .file
            .iter()
            .flat_map(|f| {
                let package = f.package().to_string();
                f.service.iter().flat_map(move |s| {
                    let package = package.clone();
                    s.method
                        .iter()
                        .map(move |m| format!("/{package}.{}/{}", s.name(), m.name()))
                })
            })
            .collect();
        paths.sort();
        let mut table: Vec<String> = METHODS.iter().map(|(p, _)| p.to_string()).collect();
        table.sort();
        assert_eq!(paths, table);
    }

    #[test]
    fn open_servers_pass_and_unknown_methods_are_refused() {
        let open = TokenTable::default();
        let ours = "/gibbsline.v1.AlertService/ListAlerts";
        assert!(matches!(decide(&open, ours, None), Ok(Some(Caller(None)))));
        assert!(matches!(
            decide(&open, "/grpc.health.v1.Health/Check", None),
            Ok(None)
        ));
        let e = decide(&open, "/gibbsline.v1.AlertService/DropAll", None).unwrap_err();
        assert_eq!(e.code(), tonic::Code::Unimplemented);
    }
}
