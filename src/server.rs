//! The gRPC server: the caller binds the listener and passes a shutdown future
//! (`main` passes ctrl-c/SIGTERM, tests pass a oneshot).

use std::future::Future;
use std::time::Duration;

use tokio::net::TcpListener;
use tonic::transport::Server;
use tonic::transport::server::TcpIncoming;
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

/// Serves the daemon on an already-bound listener until `shutdown` completes.
///
/// Health reports SERVING once the services are registered and NOT_SERVING as soon as shutdown
/// begins; in-flight calls then finish before this returns.
pub async fn serve<F>(listener: TcpListener, daemon: Daemon, shutdown: F) -> Result<()>
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

    Server::builder()
        .initial_stream_window_size(WINDOW)
        .initial_connection_window_size(WINDOW)
        .http2_keepalive_interval(Some(Duration::from_secs(30)))
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
        // Without TCP_NODELAY, Nagle's algorithm and the peer's delayed ACK hold every small
        // reply back about 40 ms.
        .serve_with_incoming_shutdown(
            TcpIncoming::from(listener).with_nodelay(Some(true)),
            on_shutdown,
        )
        .await
        .map_err(|e| Error::Internal(format!("transport: {e}")))?;
    tracing::info!("stopped");
    Ok(())
}
