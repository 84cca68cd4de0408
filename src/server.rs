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
use crate::service::{Daemon, StreamLimits};

/// The default listen address: loopback only, on a port of our own.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:7361";

/// Largest reply the daemon encodes (a declaration chunk of 8,192 ids is far smaller).
const MAX_REPLY: usize = 16 * 1024 * 1024;
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
    /// Bytes per message and per client stream (submissions, holdout creation).
    pub streams: StreamLimits,
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
            streams: StreamLimits::default(),
        }
    }
}

/// Interval of the daemon's HTTP/2 keepalive pings.
pub const KEEPALIVE: Duration = Duration::from_secs(20);

/// Bytes a new connection must send before it counts as started: the HTTP/2 client preface is
/// 24 bytes and a TLS ClientHello is longer, so a peer that sends a byte or two and then stalls
/// stays under the handshake deadline, and can be shed, like a silent one.
const STARTED_BYTES: usize = 24;

/// File descriptors kept free beyond the connection slots: the database and its journal, the
/// listener, the runtime, checkpoint files, and the one connection being accepted.
pub const FD_RESERVE: usize = 64;

/// What the accept loop shares with a connection that has not started yet.
#[derive(Default)]
struct Shared {
    /// The connection has sent [`STARTED_BYTES`]; it can no longer be shed.
    started: std::sync::atomic::AtomicBool,
    /// Set by the accept loop: fail the next read, closing the connection.
    shed: std::sync::atomic::AtomicBool,
    /// Wakes the connection's task when it is shed while waiting for bytes.
    waker: std::sync::Mutex<Option<std::task::Waker>>,
}

impl Shared {
    /// Sheds the connection unless it has started; true when it was shed.
    fn shed(&self) -> bool {
        use std::sync::atomic::Ordering::SeqCst;
        if self.started.load(SeqCst) || self.shed.swap(true, SeqCst) {
            return false;
        }
        let waker = self.waker.lock().map(|mut w| w.take()).unwrap_or(None);
        if let Some(w) = waker {
            w.wake();
        }
        true
    }
}

/// A TCP connection that holds one of the limited slots while open and fails its reads when
/// the peer stays silent past its deadline (the handshake timeout until it has sent
/// [`STARTED_BYTES`], the idle timeout after), or when the accept loop sheds it to make room.
pub(crate) struct Limited {
    inner: tokio::net::TcpStream,
    _slot: tokio::sync::OwnedSemaphorePermit,
    limits: Limits,
    received: usize,
    shared: std::sync::Arc<Shared>,
    deadline: std::pin::Pin<Box<tokio::time::Sleep>>,
}

impl Limited {
    fn started(&self) -> bool {
        self.received >= STARTED_BYTES
    }

    fn shed_error() -> std::io::Error {
        std::io::Error::new(
            std::io::ErrorKind::ConnectionAborted,
            "shed: every connection slot was taken and this connection had not spoken",
        )
    }
}

impl tokio::io::AsyncRead for Limited {
    fn poll_read(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        buf: &mut tokio::io::ReadBuf<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        use std::sync::atomic::Ordering::SeqCst;
        use std::task::Poll;
        if !self.started() && self.shared.shed.load(SeqCst) {
            tracing::debug!("shedding a connection that has not spoken");
            return Poll::Ready(Err(Limited::shed_error()));
        }
        let before = buf.filled().len();
        match std::pin::Pin::new(&mut self.inner).poll_read(cx, buf) {
            Poll::Ready(Ok(())) => {
                let n = buf.filled().len() - before;
                if n > 0 {
                    let was_started = self.started();
                    self.received = self.received.saturating_add(n);
                    if self.started() {
                        if !was_started {
                            self.shared.started.store(true, SeqCst);
                        }
                        let idle = self.limits.idle_timeout;
                        self.deadline
                            .as_mut()
                            .reset(tokio::time::Instant::now() + idle);
                    }
                }
                Poll::Ready(Ok(()))
            }
            Poll::Ready(Err(e)) => Poll::Ready(Err(e)),
            Poll::Pending => {
                if !self.started() {
                    if let Ok(mut w) = self.shared.waker.lock() {
                        *w = Some(cx.waker().clone());
                    }
                    // Shed between the first check and storing the waker: nobody will wake us.
                    if self.shared.shed.load(SeqCst) {
                        return Poll::Ready(Err(Limited::shed_error()));
                    }
                }
                match self.deadline.as_mut().poll(cx) {
                    Poll::Ready(()) => {
                        let what = if self.started() { "idle" } else { "silent" };
                        tracing::debug!(what, "closing a connection past its deadline");
                        Poll::Ready(Err(std::io::Error::new(
                            std::io::ErrorKind::TimedOut,
                            format!("connection {what} past its deadline"),
                        )))
                    }
                    Poll::Pending => Poll::Pending,
                }
            }
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

/// The soft limit on open files of this process (`ulimit -n`), from `/proc/self/limits`;
/// `None` when unknown or unlimited.
pub fn open_files_limit() -> Option<usize> {
    let text = std::fs::read_to_string("/proc/self/limits").ok()?;
    let line = text.lines().find(|l| l.starts_with("Max open files"))?;
    line["Max open files".len()..]
        .split_whitespace()
        .next()?
        .parse()
        .ok()
}

/// `--max-connections`, lowered when the process may not open that many files plus
/// [`FD_RESERVE`] (so a full house never leaves the daemon without descriptors).
pub fn connection_slots(max_connections: usize, open_files: Option<usize>) -> usize {
    let wanted = max_connections.max(1);
    match open_files {
        Some(files) if wanted.saturating_add(FD_RESERVE) > files => {
            files.saturating_sub(FD_RESERVE).max(1)
        }
        _ => wanted,
    }
}

/// Sheds the oldest connection in `waiting` that has not started; true when one was shed.
/// Entries that closed or started on their own are dropped on the way.
fn shed_oldest(waiting: &mut std::collections::VecDeque<std::sync::Weak<Shared>>) -> bool {
    while let Some(weak) = waiting.pop_front() {
        if let Some(shared) = weak.upgrade()
            && shared.shed()
        {
            return true;
        }
    }
    false
}

/// Accepts connections, each wrapped in [`Limited`] and holding one of the slots. When every
/// slot is taken, a new connection sheds the oldest connection that has not spoken yet (an
/// idle peer: a real client speaks at once), so idle connections cannot keep a real client
/// out; when every slot is held by a connection that has spoken, the new one waits for a slot.
/// Either is logged, at most every 10 s.
pub(crate) fn limited_incoming(
    listener: TcpListener,
    limits: Limits,
) -> tokio_stream::wrappers::ReceiverStream<std::io::Result<Limited>> {
    let (tx, rx) = tokio::sync::mpsc::channel(16);
    let open_files = open_files_limit();
    let max = connection_slots(limits.max_connections, open_files);
    if max < limits.max_connections {
        tracing::warn!(
            max_connections = limits.max_connections,
            slots = max,
            open_files = open_files.unwrap_or_default(),
            reserve = FD_RESERVE,
            "--max-connections lowered: the process may not open that many files (ulimit -n) \
             and keeps some for the database and itself"
        );
    }
    let slots = std::sync::Arc::new(tokio::sync::Semaphore::new(max));
    tokio::spawn(async move {
        let mut waiting: std::collections::VecDeque<std::sync::Weak<Shared>> =
            std::collections::VecDeque::new();
        let mut last_warning: Option<tokio::time::Instant> = None;
        let (mut shed_since, mut waited_since) = (0u64, 0u64);
        loop {
            let stream = match listener.accept().await {
                Ok((stream, _)) => stream,
                Err(e) => {
                    tracing::warn!(error = %e, "accepting a connection failed");
                    // Out of descriptors or similar: wait a little instead of spinning.
                    tokio::time::sleep(Duration::from_millis(100)).await;
                    continue;
                }
            };
            let slot = match slots.clone().try_acquire_owned() {
                Ok(slot) => slot,
                Err(tokio::sync::TryAcquireError::Closed) => return,
                Err(tokio::sync::TryAcquireError::NoPermits) => {
                    if shed_oldest(&mut waiting) {
                        shed_since += 1;
                    } else {
                        waited_since += 1;
                    }
                    let now = tokio::time::Instant::now();
                    if last_warning.is_none_or(|t| now - t >= Duration::from_secs(10)) {
                        tracing::warn!(
                            max_connections = max,
                            shed = shed_since,
                            waited = waited_since,
                            "connection limit reached: connections that had not spoken were \
                             shed; with none to shed, new connections wait for a slot"
                        );
                        last_warning = Some(now);
                        (shed_since, waited_since) = (0, 0);
                    }
                    // A shed connection frees its slot as soon as its task sees the flag; if
                    // none frees within a second, shed the next one that has not spoken.
                    loop {
                        let wait = slots.clone().acquire_owned();
                        match tokio::time::timeout(Duration::from_secs(1), wait).await {
                            Ok(Ok(slot)) => break slot,
                            Ok(Err(_)) => return,
                            Err(_) => {
                                shed_oldest(&mut waiting);
                            }
                        }
                    }
                }
            };
            // Without TCP_NODELAY, Nagle's algorithm and the peer's delayed ACK hold every
            // small reply back about 40 ms.
            let _ = stream.set_nodelay(true);
            let shared = std::sync::Arc::new(Shared::default());
            waiting.push_back(std::sync::Arc::downgrade(&shared));
            if waiting.len() > 2 * max {
                waiting.retain(|w| {
                    w.upgrade()
                        .is_some_and(|s| !s.started.load(std::sync::atomic::Ordering::SeqCst))
                });
            }
            let conn = Limited {
                inner: stream,
                _slot: slot,
                limits,
                received: 0,
                shared,
                deadline: Box::pin(tokio::time::sleep(limits.handshake_timeout)),
            };
            if tx.send(Ok(conn)).await.is_err() {
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
    let daemon = daemon.with_limits(limits.streams);
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
                .max_decoding_message_size(limits.streams.max_message_bytes)
                .max_encoding_message_size(MAX_REPLY),
        )
        .add_service(
            SubmissionsServer::new(daemon.clone())
                .max_decoding_message_size(limits.streams.max_message_bytes)
                .max_encoding_message_size(MAX_REPLY),
        )
        .add_service(LedgerServer::new(daemon.clone()))
        .add_service(UsersServer::new(daemon))
        .serve_with_incoming_shutdown(limited_incoming(listener, limits), on_shutdown)
        .await
        .map_err(|e| Error::Internal(format!("transport: {e}")))?;
    tracing::info!("stopped");
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slots_leave_a_reserve_of_descriptors() {
        assert_eq!(connection_slots(512, Some(1024)), 512);
        assert_eq!(connection_slots(512, None), 512);
        assert_eq!(connection_slots(5000, Some(1024)), 1024 - FD_RESERVE);
        assert_eq!(connection_slots(10, Some(8)), 1);
        assert_eq!(connection_slots(0, Some(1024)), 1);
    }

    #[test]
    fn a_connection_that_has_started_is_never_shed() {
        let shared = Shared::default();
        shared
            .started
            .store(true, std::sync::atomic::Ordering::SeqCst);
        assert!(!shared.shed());
        let silent = std::sync::Arc::new(Shared::default());
        let mut waiting = std::collections::VecDeque::new();
        let started = std::sync::Arc::new(shared);
        waiting.push_back(std::sync::Arc::downgrade(&started));
        waiting.push_back(std::sync::Arc::downgrade(&silent));
        assert!(shed_oldest(&mut waiting), "the silent one is shed");
        assert!(silent.shed.load(std::sync::atomic::Ordering::SeqCst));
        assert!(!shed_oldest(&mut waiting), "nothing left to shed");
    }
}
