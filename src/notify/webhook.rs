//! One webhook: an event POSTed as JSON with hyper's HTTP/1.1 client,
//! signed so the receiver can tell it came from this server and was not
//! replayed: `Gibbsline-Signature: sha256=<hex HMAC-SHA256(secret,
//! "<timestamp>.<body>")>` with `Gibbsline-Timestamp` (Unix seconds), and
//! `Idempotency-Key` = the event id (a repeat after a lost answer carries
//! the same key). Any 2xx answer is delivery; anything else, a refused
//! connection or a timeout is a failure, retried.

use super::WebhookSpec;
use hmac::{Hmac, KeyInit, Mac};
use http_body_util::{BodyExt, Full};
use hyper::body::Bytes;
use hyper_util::rt::TokioIo;
use sha2::Sha256;
use std::sync::Arc;
use std::time::Duration;
use tokio::net::TcpStream;
use tokio_rustls::TlsConnector;
use tokio_rustls::rustls;

/// Connect, send and answer, each within this.
const STEP_LIMIT: Duration = Duration::from_secs(10);

/// Where a webhook goes, from its URL.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct Endpoint {
    https: bool,
    host: String,
    port: u16,
    path: String,
}

impl Endpoint {
    /// `http[s]://host[:port][/path]`. A URL with a control character or
    /// a space is refused (CR/LF in it would write headers of their own).
    pub(super) fn parse(url: &str) -> Result<Endpoint, &'static str> {
        if url.chars().any(|c| c.is_control() || c == ' ') {
            return Err("contains a control character or a space (CR/LF would inject headers)");
        }
        let (https, rest) = if let Some(r) = url.strip_prefix("https://") {
            (true, r)
        } else if let Some(r) = url.strip_prefix("http://") {
            (false, r)
        } else {
            return Err("expected http://host[:port]/path or https://…");
        };
        let (authority, path) = match rest.find('/') {
            Some(i) => (&rest[..i], rest[i..].to_string()),
            None => (rest, "/".to_string()),
        };
        let (host, port) = match authority.rsplit_once(':') {
            Some((h, p)) if !h.ends_with(']') || authority.starts_with('[') => (
                h.to_string(),
                p.parse().map_err(|_| "the port is not a number")?,
            ),
            _ => (authority.to_string(), if https { 443 } else { 80 }),
        };
        if host.is_empty() || authority.contains('@') {
            return Err("no host (credentials in the URL are not accepted; use the secret)");
        }
        Ok(Endpoint {
            https,
            host: host.trim_matches(['[', ']']).to_string(),
            port,
            path,
        })
    }
}

/// Link-local addresses (169.254.0.0/16, fe80::/10), where cloud metadata
/// services answer with credentials: an alert body must not be sent there
/// by a config typo or a hostile DNS answer unless the operator said so.
pub(super) fn is_link_local(ip: std::net::IpAddr) -> bool {
    match ip {
        std::net::IpAddr::V4(v4) => v4.is_link_local(),
        std::net::IpAddr::V6(v6) => {
            v6.to_ipv4_mapped().is_some_and(|v4| v4.is_link_local())
                || (v6.segments()[0] & 0xffc0) == 0xfe80
        }
    }
}

/// A host that names a metadata service or a link-local address.
pub(super) fn names_link_local(host: &str) -> bool {
    let host = host.trim_end_matches('.').to_ascii_lowercase();
    host == "metadata.google.internal"
        || host == "metadata"
        || host.parse::<std::net::IpAddr>().is_ok_and(is_link_local)
}

impl Endpoint {
    pub(super) fn host(&self) -> &str {
        &self.host
    }
}

pub(super) struct Webhook {
    endpoint: Endpoint,
    allow_link_local: bool,
    authority: String,
    secret: Vec<u8>,
    tls: Option<TlsConnector>,
}

impl Webhook {
    pub(super) fn new(spec: &WebhookSpec) -> Webhook {
        let endpoint = Endpoint::parse(&spec.url).expect("validated with the config");
        let tls = endpoint.https.then(connector);
        Webhook {
            authority: format!("{}:{}", endpoint.host, endpoint.port),
            endpoint,
            allow_link_local: spec.allow_link_local,
            secret: spec.secret.as_bytes().to_vec(),
            tls,
        }
    }

    /// POSTs `body`; `Ok` on a 2xx answer.
    pub(super) async fn post(&self, event_id: u64, body: &[u8]) -> Result<(), String> {
        let tcp = within(self.connect()).await??;
        let _ = tcp.set_nodelay(true);
        let request = self.request(event_id, body)?;
        match &self.tls {
            None => exchange(tcp, request).await,
            Some(tls) => {
                let name = rustls::pki_types::ServerName::try_from(self.endpoint.host.clone())
                    .map_err(|e| format!("host {}: {e}", self.endpoint.host))?;
                let stream = within(tls.connect(name, tcp))
                    .await?
                    .map_err(|e| format!("TLS with {}: {e}", self.authority))?;
                exchange(stream, request).await
            }
        }
    }

    /// Resolves and connects, refusing a link-local address the name
    /// resolved to (unless allowed).
    async fn connect(&self) -> Result<TcpStream, String> {
        let target = (self.endpoint.host.as_str(), self.endpoint.port);
        let addrs: Vec<std::net::SocketAddr> = tokio::net::lookup_host(target)
            .await
            .map_err(|e| format!("resolve {}: {e}", self.authority))?
            .filter(|a| self.allow_link_local || !is_link_local(a.ip()))
            .collect();
        if addrs.is_empty() {
            return Err(format!(
                "{} resolves to no address but link-local ones (metadata services); set allow_link_local = true on this webhook if that is meant",
                self.authority
            ));
        }
        TcpStream::connect(&addrs[..])
            .await
            .map_err(|e| format!("connect {}: {e}", self.authority))
    }

    fn request(&self, event_id: u64, body: &[u8]) -> Result<hyper::Request<Full<Bytes>>, String> {
        let timestamp = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_secs());
        let signature = sign(&self.secret, timestamp, body);
        hyper::Request::post(self.endpoint.path.as_str())
            .header(hyper::header::HOST, self.authority.as_str())
            .header(hyper::header::CONTENT_TYPE, "application/json")
            .header(
                hyper::header::USER_AGENT,
                concat!("gibbsline/", env!("CARGO_PKG_VERSION")),
            )
            .header("Gibbsline-Timestamp", timestamp.to_string())
            .header("Gibbsline-Signature", format!("sha256={signature}"))
            .header("Gibbsline-Event-Id", event_id.to_string())
            .header("Idempotency-Key", event_id.to_string())
            .body(Full::new(Bytes::copy_from_slice(body)))
            .map_err(|e| e.to_string())
    }
}

/// The signature a receiver recomputes: hex HMAC-SHA256 of
/// `"<timestamp>.<body>"` under the shared secret.
pub(super) fn sign(secret: &[u8], timestamp: u64, body: &[u8]) -> String {
    let mut mac =
        <Hmac<Sha256> as KeyInit>::new_from_slice(secret).expect("HMAC takes any key length");
    mac.update(timestamp.to_string().as_bytes());
    mac.update(b".");
    mac.update(body);
    hex(&mac.finalize().into_bytes())
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

async fn within<F: std::future::Future>(f: F) -> Result<F::Output, String> {
    tokio::time::timeout(STEP_LIMIT, f)
        .await
        .map_err(|_| format!("no answer within {} s", STEP_LIMIT.as_secs()))
}

/// One request on a fresh connection; `Ok` on 2xx.
async fn exchange<S>(io: S, request: hyper::Request<Full<Bytes>>) -> Result<(), String>
where
    S: tokio::io::AsyncRead + tokio::io::AsyncWrite + Send + Unpin + 'static,
{
    let (mut send, conn) = within(hyper::client::conn::http1::handshake(TokioIo::new(io)))
        .await?
        .map_err(|e| e.to_string())?;
    let driver = tokio::spawn(conn);
    let answer = within(send.send_request(request))
        .await?
        .map_err(|e| e.to_string());
    let outcome = match answer {
        Ok(response) => {
            let status = response.status();
            // Read (and drop) the body so the receiver sees a clean close.
            let _ = within(response.into_body().collect()).await;
            if status.is_success() {
                Ok(())
            } else {
                Err(format!("HTTP {status}"))
            }
        }
        Err(e) => Err(e),
    };
    driver.abort();
    outcome
}

/// HTTPS trusting the system's root certificates (a lab's own CA goes
/// into the system store).
fn connector() -> TlsConnector {
    let mut roots = rustls::RootCertStore::empty();
    let found = rustls_native_certs::load_native_certs();
    for e in &found.errors {
        tracing::warn!(error = %e, "reading the system's root certificates");
    }
    let (added, _) = roots.add_parsable_certificates(found.certs);
    tracing::debug!(added, "root certificates for webhooks");
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let config = rustls::ClientConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()
        .expect("ring supports the default versions")
        .with_root_certificates(roots)
        .with_no_client_auth();
    TlsConnector::from(Arc::new(config))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn urls_parse_into_their_parts() {
        let e = Endpoint::parse("http://127.0.0.1:9000/hooks/gibbsline?x=1").unwrap();
        assert_eq!(
            (e.https, e.host.as_str(), e.port, e.path.as_str()),
            (false, "127.0.0.1", 9000, "/hooks/gibbsline?x=1")
        );
        let e = Endpoint::parse("https://alerts.lab.example").unwrap();
        assert_eq!((e.https, e.port, e.path.as_str()), (true, 443, "/"));
        assert!(Endpoint::parse("http://user:pw@host/x").is_err());
        assert!(Endpoint::parse("mqtt://host").is_err());
        assert!(Endpoint::parse("http://host:port/").is_err());
        for injected in [
            "http://host/x\r\nX-Evil: 1",
            "http://host/a b",
            "http://ho\nst/",
        ] {
            assert!(Endpoint::parse(injected).is_err(), "{injected:?}");
        }
    }

    #[test]
    fn link_local_and_metadata_hosts_are_recognised() {
        for host in [
            "169.254.169.254",
            "169.254.0.1",
            "fe80::1",
            "::ffff:169.254.169.254",
            "metadata.google.internal",
            "METADATA.google.internal.",
        ] {
            assert!(names_link_local(host), "{host}");
        }
        for host in [
            "127.0.0.1",
            "10.0.0.5",
            "alerts.lab.example",
            "::1",
            "fec0::1",
        ] {
            assert!(!names_link_local(host), "{host}");
        }
    }

    /// The primitive against RFC 4231 section 4.3 (test case 2: key
    /// "Jefe"), then the signature as that primitive over "timestamp.body".
    #[test]
    fn the_signature_is_hmac_sha256_of_timestamp_dot_body() {
        let mut mac = <Hmac<Sha256> as KeyInit>::new_from_slice(b"Jefe").unwrap();
        mac.update(b"what do ya want for nothing?");
        assert_eq!(
            hex(&mac.finalize().into_bytes()),
            "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
        );
        let mut mac = <Hmac<Sha256> as KeyInit>::new_from_slice(b"k").unwrap();
        mac.update(b"1700000000.{}");
        assert_eq!(
            sign(b"k", 1_700_000_000, b"{}"),
            hex(&mac.finalize().into_bytes())
        );
    }
}
