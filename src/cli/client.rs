//! Connecting to a server from the client commands. `https://` addresses
//! use TLS (`GIBBSLINE_CA_FILE` for a private CA; `GIBBSLINE_CLIENT_CERT`
//! and `GIBBSLINE_CLIENT_KEY` for client certificates); `GIBBSLINE_TOKEN`
//! is sent as a bearer token on every call.

use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint, Identity};

/// The server could not be reached: exit code 3.
#[derive(Debug, thiserror::Error)]
#[error("cannot reach the server at {addr}: {reason} (is `gibbsline serve` running there?)")]
pub(crate) struct Unreachable {
    pub addr: String,
    pub reason: String,
}

/// Adds the bearer token, if any, to each request.
#[derive(Clone)]
pub(crate) struct Token(Option<tonic::metadata::MetadataValue<tonic::metadata::Ascii>>);

impl tonic::service::Interceptor for Token {
    fn call(
        &mut self,
        mut request: tonic::Request<()>,
    ) -> Result<tonic::Request<()>, tonic::Status> {
        if let Some(v) = &self.0 {
            request.metadata_mut().insert("authorization", v.clone());
        }
        Ok(request)
    }
}

pub(crate) type Conn = InterceptedService<Channel, Token>;

fn read_env_file(var: &str) -> anyhow::Result<Option<Vec<u8>>> {
    match std::env::var(var) {
        Ok(path) => {
            Ok(Some(std::fs::read(&path).map_err(|e| {
                super::UsageError(format!("{var}={path}: {e}"))
            })?))
        }
        Err(_) => Ok(None),
    }
}

pub(crate) async fn connect(addr: &str) -> anyhow::Result<Conn> {
    let url = if addr.starts_with("http://") || addr.starts_with("https://") {
        addr.to_string()
    } else {
        format!("http://{addr}")
    };
    let mut endpoint = Endpoint::from_shared(url.clone())
        .map_err(|e| super::UsageError(format!("--connect {addr}: {e}")))?
        .connect_timeout(std::time::Duration::from_secs(5));
    if url.starts_with("https://") {
        let mut tls = ClientTlsConfig::new();
        if let Some(ca) = read_env_file("GIBBSLINE_CA_FILE")? {
            tls = tls.ca_certificate(Certificate::from_pem(ca));
        }
        if let (Some(cert), Some(key)) = (
            read_env_file("GIBBSLINE_CLIENT_CERT")?,
            read_env_file("GIBBSLINE_CLIENT_KEY")?,
        ) {
            tls = tls.identity(Identity::from_pem(cert, key));
        }
        endpoint = endpoint
            .tls_config(tls)
            .map_err(|e| super::UsageError(format!("--connect {addr}: {e}")))?;
    }
    let token =
        match std::env::var("GIBBSLINE_TOKEN") {
            Ok(t) => Some(format!("Bearer {t}").parse().map_err(|_| {
                super::UsageError("GIBBSLINE_TOKEN: not a valid header value".into())
            })?),
            Err(_) => None,
        };
    let channel = endpoint.connect().await.map_err(|e| Unreachable {
        addr: addr.to_string(),
        reason: e.to_string(),
    })?;
    Ok(InterceptedService::new(channel, Token(token)))
}

pub(crate) fn now_ns() -> i64 {
    gibbsline::ingest::now_ns()
}

/// A refused call as the CLI reports it: what the caller got wrong (an
/// unknown channel, a bad argument) is a usage error, exit 2, in one
/// line; the rest keep their status.
pub(crate) fn status_error(status: tonic::Status) -> anyhow::Error {
    match status.code() {
        tonic::Code::NotFound | tonic::Code::InvalidArgument | tonic::Code::FailedPrecondition => {
            super::UsageError(status.message().to_string()).into()
        }
        _ => status.into(),
    }
}

/// Every channel, following ListChannels pages.
pub(crate) async fn all_channels(conn: &Conn) -> anyhow::Result<Vec<gibbsline::pb::Channel>> {
    use gibbsline::pb;
    let mut client = pb::channel_service_client::ChannelServiceClient::new(conn.clone());
    let mut out = Vec::new();
    let mut page_token = String::new();
    loop {
        let request = pb::ListChannelsRequest {
            page_size: 0,
            page_token,
        };
        let page = client.list_channels(request).await?.into_inner();
        out.extend(page.channels);
        if page.next_page_token.is_empty() {
            return Ok(out);
        }
        page_token = page.next_page_token;
    }
}
