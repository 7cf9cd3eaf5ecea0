//! The accepting side of the gRPC (and HTTP) ports: an accept loop that backs off
//! (and says so) when the process is out of file descriptors, and
//! connections that are closed after a stretch with no bytes either way.
//!
//! A live HTTP/2 client answers the server's keepalive pings (every 30 s),
//! so only a connection that never spoke, or stopped answering, reaches
//! the idle limit: at the descriptor limit those would otherwise lock
//! every new client out while the old accept loop spun.

use std::io;
use std::pin::Pin;
use std::task::{Context, Poll};
use std::time::Duration;
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{OwnedSemaphorePermit, mpsc};
use tokio::time::{Instant, Sleep};
use tokio_stream::wrappers::ReceiverStream;

/// Accepted connections waiting for the server to take them.
const ACCEPT_QUEUE: usize = 64;
/// Pause after a failed accept (EMFILE and the like).
pub const ACCEPT_BACKOFF: Duration = Duration::from_millis(200);

/// The stream of connections `tonic` serves; the loop ends with the stream.
pub fn incoming(
    listener: TcpListener,
    idle_timeout: Duration,
) -> ReceiverStream<io::Result<IdleLimited>> {
    let (tx, rx) = mpsc::channel(ACCEPT_QUEUE);
    tokio::spawn(async move {
        let mut failures = 0u64;
        loop {
            let accepted = tokio::select! {
                a = listener.accept() => a,
                () = tx.closed() => return,
            };
            match accepted {
                Ok((stream, _)) => {
                    let _ = stream.set_nodelay(true);
                    if tx
                        .send(Ok(IdleLimited::new(stream, idle_timeout)))
                        .await
                        .is_err()
                    {
                        return;
                    }
                }
                Err(e) => {
                    failures += 1;
                    // Logged on the first and every hundredth: a descriptor
                    // shortage repeats five times a second.
                    if failures % 100 == 1 {
                        tracing::warn!(error = %e, failures, "accept failed; backing off (out of file descriptors?)");
                    }
                    tokio::time::sleep(ACCEPT_BACKOFF).await;
                }
            }
        }
    });
    ReceiverStream::new(rx)
}

/// A TCP stream that fails with `TimedOut` after `idle` without traffic.
pub struct IdleLimited {
    inner: TcpStream,
    idle: Duration,
    deadline: Pin<Box<Sleep>>,
    /// A place among a bounded number of connections, held while open.
    _place: Option<OwnedSemaphorePermit>,
}

impl IdleLimited {
    fn new(inner: TcpStream, idle: Duration) -> IdleLimited {
        IdleLimited {
            inner,
            idle,
            deadline: Box::pin(tokio::time::sleep(idle)),
            _place: None,
        }
    }

    /// A connection that holds `place` until it closes.
    pub fn holding(inner: TcpStream, idle: Duration, place: OwnedSemaphorePermit) -> IdleLimited {
        IdleLimited {
            _place: Some(place),
            ..IdleLimited::new(inner, idle)
        }
    }

    fn touch(&mut self) {
        self.deadline.as_mut().reset(Instant::now() + self.idle);
    }

    fn expired(&mut self, cx: &mut Context<'_>) -> bool {
        self.deadline.as_mut().poll(cx).is_ready()
    }
}

fn idle_error(idle: Duration) -> io::Error {
    io::Error::new(
        io::ErrorKind::TimedOut,
        format!("connection idle for {} s", idle.as_secs()),
    )
}

impl AsyncRead for IdleLimited {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        match Pin::new(&mut self.inner).poll_read(cx, buf) {
            Poll::Ready(Ok(())) => {
                if buf.filled().len() > before {
                    self.touch();
                }
                Poll::Ready(Ok(()))
            }
            Poll::Ready(Err(e)) => Poll::Ready(Err(e)),
            Poll::Pending if self.expired(cx) => Poll::Ready(Err(idle_error(self.idle))),
            Poll::Pending => Poll::Pending,
        }
    }
}

impl AsyncWrite for IdleLimited {
    fn poll_write(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        data: &[u8],
    ) -> Poll<io::Result<usize>> {
        match Pin::new(&mut self.inner).poll_write(cx, data) {
            Poll::Ready(Ok(n)) => {
                if n > 0 {
                    self.touch();
                }
                Poll::Ready(Ok(n))
            }
            Poll::Pending if self.expired(cx) => Poll::Ready(Err(idle_error(self.idle))),
            other => other,
        }
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_shutdown(cx)
    }
}

impl tonic::transport::server::Connected for IdleLimited {
    type ConnectInfo = tonic::transport::server::TcpConnectInfo;

    fn connect_info(&self) -> Self::ConnectInfo {
        self.inner.connect_info()
    }
}
