//! The HTTP listeners' connections: a bounded number at once, each closed
//! after an idle stretch, TLS when the server has `[tls]` (the same
//! certificate, key and client CA as gRPC). Handshakes run beside the
//! accept loop, so a client that stalls in one holds only its own place.

use crate::config::TlsPem;
use crate::error::FieldError;
use crate::listen::{ACCEPT_BACKOFF, IdleLimited};
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;
use tokio::io::{AsyncRead, AsyncWrite};
use tokio::net::TcpListener;
use tokio::sync::{Semaphore, mpsc};
use tokio_rustls::TlsAcceptor;
use tokio_rustls::rustls;

/// A connection, plain or TLS.
pub trait Conn: AsyncRead + AsyncWrite + Send + Unpin {}
impl<T: AsyncRead + AsyncWrite + Send + Unpin> Conn for T {}

/// How long a TLS handshake may take.
const HANDSHAKE_LIMIT: Duration = Duration::from_secs(10);

/// Connections ready to serve, as axum takes them.
pub struct Bounded {
    ready: mpsc::Receiver<(Box<dyn Conn>, SocketAddr)>,
    local: SocketAddr,
}

impl Bounded {
    /// At most `connections` open at once, each closed after `idle`
    /// without a byte either way; TLS through `tls` when given.
    pub fn new(
        inner: TcpListener,
        connections: usize,
        idle: Duration,
        tls: Option<TlsAcceptor>,
    ) -> std::io::Result<Bounded> {
        let local = inner.local_addr()?;
        let (tx, ready) = mpsc::channel(connections.max(1));
        let places = Arc::new(Semaphore::new(connections));
        tokio::spawn(accept_loop(inner, places, idle, tls, tx));
        Ok(Bounded { ready, local })
    }
}

async fn accept_loop(
    inner: TcpListener,
    places: Arc<Semaphore>,
    idle: Duration,
    tls: Option<TlsAcceptor>,
    tx: mpsc::Sender<(Box<dyn Conn>, SocketAddr)>,
) {
    loop {
        let Ok(place) = places.clone().acquire_owned().await else {
            return;
        };
        let (stream, addr) = tokio::select! {
            accepted = inner.accept() => match accepted {
                Ok(pair) => pair,
                Err(e) => {
                    // Out of file descriptors, typically: back off, don't spin.
                    tracing::warn!(error = %e, "HTTP accept failed");
                    tokio::time::sleep(ACCEPT_BACKOFF).await;
                    continue;
                }
            },
            _ = tx.closed() => return,
        };
        let io = IdleLimited::holding(stream, idle, place);
        match &tls {
            None => {
                if tx.send((Box::new(io), addr)).await.is_err() {
                    return;
                }
            }
            Some(acceptor) => {
                let (acceptor, tx) = (acceptor.clone(), tx.clone());
                tokio::spawn(async move {
                    match tokio::time::timeout(HANDSHAKE_LIMIT, acceptor.accept(io)).await {
                        Ok(Ok(tls)) => {
                            let _ = tx.send((Box::new(tls), addr)).await;
                        }
                        Ok(Err(e)) => tracing::debug!(%addr, error = %e, "TLS handshake failed"),
                        Err(_) => tracing::debug!(%addr, "TLS handshake timed out"),
                    }
                });
            }
        }
    }
}

impl axum::serve::Listener for Bounded {
    type Io = Box<dyn Conn>;
    type Addr = SocketAddr;

    async fn accept(&mut self) -> (Self::Io, SocketAddr) {
        match self.ready.recv().await {
            Some(pair) => pair,
            // The accept loop only ends when this listener is dropped.
            None => std::future::pending().await,
        }
    }

    fn local_addr(&self) -> std::io::Result<SocketAddr> {
        Ok(self.local)
    }
}

/// The TLS set-up for HTTP from the server's PEM files: its certificate
/// and key, and client certificates required when a client CA is set.
pub fn acceptor(pem: &TlsPem) -> Result<TlsAcceptor, FieldError> {
    use rustls::pki_types::pem::PemObject;
    use rustls::pki_types::{CertificateDer, PrivateKeyDer};
    let bad = |what: &str, e: &dyn std::fmt::Display| {
        FieldError::new(format!("tls.{what}"), "(file)", e.to_string())
    };
    let certs = CertificateDer::pem_slice_iter(&pem.cert)
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| bad("cert", &e))?;
    let key = PrivateKeyDer::from_pem_slice(&pem.key).map_err(|e| bad("key", &e))?;
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let builder = rustls::ServerConfig::builder_with_provider(provider.clone())
        .with_safe_default_protocol_versions()
        .map_err(|e| bad("cert", &e))?;
    let builder = match &pem.client_ca {
        None => builder.with_no_client_auth(),
        Some(ca) => {
            let mut roots = rustls::RootCertStore::empty();
            for cert in CertificateDer::pem_slice_iter(ca) {
                roots
                    .add(cert.map_err(|e| bad("client_ca", &e))?)
                    .map_err(|e| bad("client_ca", &e))?;
            }
            let verifier = rustls::server::WebPkiClientVerifier::builder_with_provider(
                Arc::new(roots),
                provider,
            )
            .build()
            .map_err(|e| bad("client_ca", &e))?;
            builder.with_client_cert_verifier(verifier)
        }
    };
    let mut config = builder
        .with_single_cert(certs, key)
        .map_err(|e| bad("key", &e))?;
    config.alpn_protocols = vec![b"http/1.1".to_vec()];
    Ok(TlsAcceptor::from(Arc::new(config)))
}

/// How long a client may take to send a whole request head (and how long
/// a kept-alive connection may wait for its next one): a client that
/// trickles a header byte at a time is cut off here, whatever the idle
/// limit says.
pub const HEAD_LIMIT: Duration = Duration::from_secs(10);

/// The peer of the connection a request came on, for per-client limits.
#[derive(Debug, Clone, Copy)]
pub struct Peer(pub SocketAddr);

/// Serves `app` on every connection `listener` hands over until `stop`
/// resolves, then lets the open ones finish their answers (live feeds end
/// by themselves when the server stops). Each request carries its
/// [`Peer`], and every answer `X-Content-Type-Options: nosniff`.
pub async fn serve(
    mut listener: Bounded,
    app: axum::Router,
    stop: impl std::future::Future<Output = ()>,
) {
    let (closing_tx, closing_rx) = tokio::sync::watch::channel(());
    tokio::pin!(stop);
    loop {
        let (io, addr) = tokio::select! {
            next = axum::serve::Listener::accept(&mut listener) => next,
            () = &mut stop => break,
        };
        let service = with_peer(app.clone(), addr);
        let mut closing = closing_rx.clone();
        tokio::spawn(async move {
            let mut builder = hyper::server::conn::http1::Builder::new();
            builder
                .timer(hyper_util::rt::TokioTimer::new())
                .header_read_timeout(HEAD_LIMIT);
            let conn = builder.serve_connection(hyper_util::rt::TokioIo::new(io), service);
            tokio::pin!(conn);
            tokio::select! {
                result = conn.as_mut() => {
                    if let Err(e) = result {
                        tracing::debug!(%addr, error = %e, "HTTP connection ended");
                    }
                    return;
                }
                _ = closing.changed() => conn.as_mut().graceful_shutdown(),
            }
            let _ = conn.await;
        });
    }
    drop(closing_rx);
    let _ = closing_tx.send(());
    closing_tx.closed().await;
}

/// `app` as hyper calls it on one connection.
fn with_peer(
    app: axum::Router,
    addr: SocketAddr,
) -> impl hyper::service::Service<
    http::Request<hyper::body::Incoming>,
    Response = axum::response::Response,
    Error = std::convert::Infallible,
    Future = impl Send,
> + Clone {
    hyper::service::service_fn(move |mut request: http::Request<hyper::body::Incoming>| {
        request.extensions_mut().insert(Peer(addr));
        let mut app = app.clone();
        async move {
            let mut answer =
                tower_service::Service::call(&mut app, request.map(axum::body::Body::new)).await?;
            answer.headers_mut().insert(
                http::header::X_CONTENT_TYPE_OPTIONS,
                http::HeaderValue::from_static("nosniff"),
            );
            Ok(answer)
        }
    })
}
