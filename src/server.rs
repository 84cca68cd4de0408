//! The gRPC server: the caller binds the listener and passes a shutdown future
//! (`main` passes ctrl-c/SIGTERM, tests pass a oneshot).

use std::future::Future;
use std::time::Duration;

use tokio::net::TcpListener;
use tonic::transport::Server;
use tonic_health::ServingStatus;

use crate::error::{Error, Result};
use crate::proto::v1::{
    FILE_DESCRIPTOR_SET, holdouts_server::HoldoutsServer, ledger_server::LedgerServer,
    submissions_server::SubmissionsServer, users_server::UsersServer,
};
use crate::service::Daemon;

/// The default listen address: loopback only, on a port of our own.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:7361";

/// Largest gRPC message accepted (a prediction chunk); chunks are far smaller in practice.
const MAX_MESSAGE: usize = 16 * 1024 * 1024;
/// HTTP/2 windows: large prediction streams are much steadier with 4 MiB windows.
const WINDOW: u32 = 4 * 1024 * 1024;

/// Names under which health is reported, besides the overall "" entry.
const SERVICE_NAMES: &[&str] = &[
    "holdout.v1.Holdouts",
    "holdout.v1.Submissions",
    "holdout.v1.Ledger",
    "holdout.v1.Users",
];

/// Connection limits (each a `holdout serve` flag).
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// Connections served at once; more wait to be accepted.
    pub max_connections: usize,
    /// A connection that sends nothing this long after it was accepted is closed (a client
    /// sends its first bytes at once).
    pub handshake_timeout: Duration,
    /// A connection that then sends nothing this long is closed. Live clients answer the
    /// daemon's keepalive pings (every [`KEEPALIVE`]), so only dead or idle peers reach it.
    pub idle_timeout: Duration,
    /// Concurrent calls (HTTP/2 streams) per connection.
    pub max_streams: u32,
}

/// TLS for the daemon: its certificate chain and key (PEM), and optionally the CA that client
/// certificates must chain to (mutual TLS: clients without one are refused).
#[derive(Debug, Clone)]
pub struct Tls {
    /// Certificate chain, PEM.
    pub cert_pem: Vec<u8>,
    /// Private key, PEM.
    pub key_pem: Vec<u8>,
    /// CA for client certificates, PEM.
    pub client_ca_pem: Option<Vec<u8>>,
}

impl Default for Limits {
    fn default() -> Limits {
        Limits {
            max_connections: 512,
            handshake_timeout: Duration::from_secs(5),
            idle_timeout: Duration::from_secs(120),
            max_streams: 64,
        }
    }
}

/// Interval of the daemon's HTTP/2 keepalive pings.
pub const KEEPALIVE: Duration = Duration::from_secs(20);

/// A TCP connection that holds one of the limited slots while open and fails its reads when
/// the peer stays silent past its deadline (the handshake timeout before the first byte, the
/// idle timeout after).
struct Limited {
    inner: tokio::net::TcpStream,
    _slot: tokio::sync::OwnedSemaphorePermit,
    limits: Limits,
    started: bool,
    deadline: std::pin::Pin<Box<tokio::time::Sleep>>,
}

impl tokio::io::AsyncRead for Limited {
    fn poll_read(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        buf: &mut tokio::io::ReadBuf<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        use std::task::Poll;
        let before = buf.filled().len();
        match std::pin::Pin::new(&mut self.inner).poll_read(cx, buf) {
            Poll::Ready(Ok(())) => {
                if buf.filled().len() > before {
                    let idle = self.limits.idle_timeout;
                    self.started = true;
                    self.deadline
                        .as_mut()
                        .reset(tokio::time::Instant::now() + idle);
                }
                Poll::Ready(Ok(()))
            }
            Poll::Ready(Err(e)) => Poll::Ready(Err(e)),
            Poll::Pending => match self.deadline.as_mut().poll(cx) {
                Poll::Ready(()) => {
                    let what = if self.started { "idle" } else { "silent" };
                    tracing::debug!(what, "closing a connection past its deadline");
                    Poll::Ready(Err(std::io::Error::new(
                        std::io::ErrorKind::TimedOut,
                        format!("connection {what} past its deadline"),
                    )))
                }
                Poll::Pending => Poll::Pending,
            },
        }
    }
}

impl tokio::io::AsyncWrite for Limited {
    fn poll_write(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        buf: &[u8],
    ) -> std::task::Poll<std::io::Result<usize>> {
        std::pin::Pin::new(&mut self.inner).poll_write(cx, buf)
    }

    fn poll_flush(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        std::pin::Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        std::pin::Pin::new(&mut self.inner).poll_shutdown(cx)
    }
}

impl tonic::transport::server::Connected for Limited {
    type ConnectInfo = tonic::transport::server::TcpConnectInfo;

    fn connect_info(&self) -> Self::ConnectInfo {
        self.inner.connect_info()
    }
}

/// Accepts connections while a slot is free, each wrapped in [`Limited`].
fn limited_incoming(
    listener: TcpListener,
    limits: Limits,
) -> tokio_stream::wrappers::ReceiverStream<std::io::Result<Limited>> {
    let (tx, rx) = tokio::sync::mpsc::channel(16);
    let slots = std::sync::Arc::new(tokio::sync::Semaphore::new(limits.max_connections.max(1)));
    tokio::spawn(async move {
        loop {
            let Ok(slot) = slots.clone().acquire_owned().await else {
                return;
            };
            let conn = match listener.accept().await {
                Ok((stream, _)) => {
                    // Without TCP_NODELAY, Nagle's algorithm and the peer's delayed ACK hold
                    // every small reply back about 40 ms.
                    let _ = stream.set_nodelay(true);
                    Ok(Limited {
                        inner: stream,
                        _slot: slot,
                        limits,
                        started: false,
                        deadline: Box::pin(tokio::time::sleep(limits.handshake_timeout)),
                    })
                }
                Err(e) => {
                    tracing::warn!(error = %e, "accepting a connection failed");
                    // Out of descriptors or similar: wait a little instead of spinning.
                    tokio::time::sleep(Duration::from_millis(100)).await;
                    continue;
                }
            };
            if tx.send(conn).await.is_err() {
                return;
            }
        }
    });
    tokio_stream::wrappers::ReceiverStream::new(rx)
}

/// Serves the daemon on an already-bound listener until `shutdown` completes, with the default
/// [`Limits`].
pub async fn serve<F>(listener: TcpListener, daemon: Daemon, shutdown: F) -> Result<()>
where
    F: Future<Output = ()> + Send + 'static,
{
    serve_with_limits(listener, daemon, shutdown, Limits::default(), None).await
}

/// Serves the daemon on an already-bound listener until `shutdown` completes.
///
/// Health reports SERVING once the services are registered and NOT_SERVING as soon as shutdown
/// begins; in-flight calls then finish before this returns.
pub async fn serve_with_limits<F>(
    listener: TcpListener,
    daemon: Daemon,
    shutdown: F,
    limits: Limits,
    tls: Option<Tls>,
) -> Result<()>
where
    F: Future<Output = ()> + Send + 'static,
{
    let (reporter, health) = tonic_health::server::health_reporter();
    let reflection_v1 = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()
        .map_err(|e| Error::Internal(format!("reflection: {e}")))?;
    // Python's grpcio-reflection speaks only v1alpha.
    let reflection_v1alpha = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1alpha()
        .map_err(|e| Error::Internal(format!("reflection: {e}")))?;

    for name in std::iter::once(&"").chain(SERVICE_NAMES) {
        reporter
            .set_service_status(*name, ServingStatus::Serving)
            .await;
    }

    let addr = listener.local_addr()?;
    tracing::info!(%addr, "serving holdout.v1");

    // Health follows the database thread: NOT_SERVING while it does not answer within 10 s
    // (a wedged disk, a stopped thread), SERVING again when it does.
    let stopping = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    {
        let (reporter, stopping, db) = (reporter.clone(), stopping.clone(), daemon.db().clone());
        tokio::spawn(async move {
            let mut last = true;
            let mut tick = tokio::time::interval(Duration::from_secs(5));
            loop {
                tick.tick().await;
                if stopping.load(std::sync::atomic::Ordering::SeqCst) {
                    break;
                }
                let ok = db.ping(Duration::from_secs(10)).await;
                if ok != last && !stopping.load(std::sync::atomic::Ordering::SeqCst) {
                    let status = if ok {
                        tracing::info!("the database thread answers again: SERVING");
                        ServingStatus::Serving
                    } else {
                        tracing::error!("the database thread does not answer: NOT_SERVING");
                        ServingStatus::NotServing
                    };
                    for name in std::iter::once(&"").chain(SERVICE_NAMES) {
                        reporter.set_service_status(*name, status).await;
                    }
                    last = ok;
                }
            }
        });
    }
    let shutdown_reporter = reporter.clone();
    let on_shutdown = async move {
        shutdown.await;
        stopping.store(true, std::sync::atomic::Ordering::SeqCst);
        tracing::info!("shutting down: health NOT_SERVING, finishing in-flight calls");
        for name in std::iter::once(&"").chain(SERVICE_NAMES) {
            shutdown_reporter
                .set_service_status(*name, ServingStatus::NotServing)
                .await;
        }
    };

    let mut builder = Server::builder();
    if let Some(tls) = tls {
        let mut config = tonic::transport::ServerTlsConfig::new().identity(
            tonic::transport::Identity::from_pem(tls.cert_pem, tls.key_pem),
        );
        if let Some(ca) = tls.client_ca_pem {
            config = config.client_ca_root(tonic::transport::Certificate::from_pem(ca));
        }
        builder = builder
            .tls_config(config)
            .map_err(|e| Error::invalid("--tls-cert", format!("TLS setup failed: {e}")))?;
        tracing::info!("TLS on");
    }
    builder
        .initial_stream_window_size(WINDOW)
        .initial_connection_window_size(WINDOW)
        .http2_keepalive_interval(Some(KEEPALIVE))
        .http2_keepalive_timeout(Some(Duration::from_secs(20)))
        .max_concurrent_streams(Some(limits.max_streams))
        .add_service(health)
        .add_service(reflection_v1)
        .add_service(reflection_v1alpha)
        .add_service(
            HoldoutsServer::new(daemon.clone())
                .max_decoding_message_size(MAX_MESSAGE)
                .max_encoding_message_size(MAX_MESSAGE),
        )
        .add_service(
            SubmissionsServer::new(daemon.clone())
                .max_decoding_message_size(MAX_MESSAGE)
                .max_encoding_message_size(MAX_MESSAGE),
        )
        .add_service(LedgerServer::new(daemon.clone()))
        .add_service(UsersServer::new(daemon))
        .serve_with_incoming_shutdown(limited_incoming(listener, limits), on_shutdown)
        .await
        .map_err(|e| Error::Internal(format!("transport: {e}")))?;
    tracing::info!("stopped");
    Ok(())
}
