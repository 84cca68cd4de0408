//! The read-only web view (`holdout serve --web ADDR`): plain server-rendered pages of the
//! holdouts, each holdout's status with its burn-down chart, the ladder leaderboard or the best
//! interval per team, and the ranking of a closed sealed round; each page also as JSON.
//!
//! It listens on its own address (off unless asked for) and gets the gRPC listener's hardening:
//! the same TLS identity (and client CA), the same refusal of plaintext on a non-loopback
//! address (checked by the command line), its own pool of connection slots with the same
//! handshake and idle deadlines and shedding of silent connections
//! ([`crate::server::Limits`]), a deadline for reading a request's head and for answering it,
//! small request heads, no request bodies, and GET and HEAD only.
//!
//! What a page shows is decided by the engine ([`crate::engine::Visibility`]), the rule the
//! command line's calls use: a visitor without a token is [`crate::auth::Caller::public`];
//! with a token (HTTP Basic password, or `Authorization: Bearer`) it is that user. Exact
//! scores are never asked for, so no page can carry one.

mod html;
mod pages;

use std::future::Future;
use std::sync::Arc;
use std::time::Duration;

use axum::body::Body;
use axum::http::{HeaderValue, Method, Request, Response, StatusCode, header};
use hyper_util::rt::{TokioIo, TokioTimer};
use tokio::io::{AsyncRead, AsyncWrite};
use tokio::net::TcpListener;
use tokio_stream::StreamExt as _;

use crate::engine::Db;
use crate::error::{Error, Result};
use crate::server::{Limits, Tls};

/// Longest request target (path and query) accepted; longer ones get 414.
pub const MAX_URI_BYTES: usize = 2048;
/// Bytes of a request head (request line and headers) hyper buffers at most.
pub const MAX_HEAD_BYTES: usize = 16 * 1024;
/// Headers per request at most.
pub const MAX_HEADERS: usize = 64;
/// A request head must arrive within this long.
pub const HEAD_TIMEOUT: Duration = Duration::from_secs(10);
/// A page must be ready within this long (else 503).
pub const PAGE_TIMEOUT: Duration = Duration::from_secs(30);
/// Connections still open at shutdown get this long to finish their request.
const DRAIN: Duration = Duration::from_secs(5);

/// The TLS acceptor of the web view from the daemon's identity (and client CA): HTTP/1.1 over
/// TLS, built before anything is served so a bad file fails the start.
///
/// # Errors
/// [`Error::InvalidArgument`] naming the flag whose file does not load.
pub fn tls_acceptor(tls: &Tls) -> Result<tokio_rustls::TlsAcceptor> {
    use tokio_rustls::rustls;
    use tokio_rustls::rustls::pki_types::pem::PemObject as _;
    use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer};
    let bad = |flag: &str, e: &dyn std::fmt::Display| {
        Error::invalid(
            flag.to_string(),
            format!("TLS setup of the web view failed: {e}"),
        )
    };
    let certs: Vec<CertificateDer<'static>> = CertificateDer::pem_slice_iter(&tls.cert_pem)
        .collect::<std::result::Result<_, _>>()
        .map_err(|e| bad("--tls-cert", &e))?;
    let key = PrivateKeyDer::from_pem_slice(&tls.key_pem).map_err(|e| bad("--tls-key", &e))?;
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let builder = rustls::ServerConfig::builder_with_provider(provider.clone())
        .with_safe_default_protocol_versions()
        .map_err(|e| bad("--tls-cert", &e))?;
    let builder = match &tls.client_ca_pem {
        Some(ca) => {
            let mut roots = rustls::RootCertStore::empty();
            for cert in CertificateDer::pem_slice_iter(ca) {
                let cert = cert.map_err(|e| bad("--tls-client-ca", &e))?;
                roots.add(cert).map_err(|e| bad("--tls-client-ca", &e))?;
            }
            let verifier = rustls::server::WebPkiClientVerifier::builder_with_provider(
                Arc::new(roots),
                provider,
            )
            .build()
            .map_err(|e| bad("--tls-client-ca", &e))?;
            builder.with_client_cert_verifier(verifier)
        }
        None => builder.with_no_client_auth(),
    };
    let mut config = builder
        .with_single_cert(certs, key)
        .map_err(|e| bad("--tls-cert", &e))?;
    config.alpn_protocols = vec![b"http/1.1".to_vec()];
    Ok(tokio_rustls::TlsAcceptor::from(Arc::new(config)))
}

/// Serves the web view on an already-bound listener until `shutdown` completes; connections
/// still open then get a few seconds to finish. With `tls` (from [`tls_acceptor`]) every
/// connection is HTTPS.
///
/// # Errors
/// [`Error::Io`] when the listener's address cannot be read.
pub async fn serve_web<F>(
    listener: TcpListener,
    db: Db,
    shutdown: F,
    limits: Limits,
    tls: Option<tokio_rustls::TlsAcceptor>,
) -> Result<()>
where
    F: Future<Output = ()> + Send + 'static,
{
    let acceptor = tls;
    let addr = listener.local_addr()?;
    tracing::info!(%addr, tls = acceptor.is_some(), "serving the web view");
    let app = pages::router(db);
    let mut incoming = crate::server::limited_incoming(listener, limits);
    let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
    let mut tasks = tokio::task::JoinSet::new();
    tokio::pin!(shutdown);
    loop {
        let conn = tokio::select! {
            () = &mut shutdown => break,
            conn = incoming.next() => conn,
        };
        let Some(conn) = conn else { break };
        let conn = match conn {
            Ok(conn) => conn,
            Err(e) => {
                tracing::debug!(error = %e, "web: accepting a connection failed");
                continue;
            }
        };
        let (app, stop, acceptor) = (app.clone(), stop_rx.clone(), acceptor.clone());
        let handshake = limits.handshake_timeout;
        tasks.spawn(async move {
            match acceptor {
                None => serve_connection(conn, app, stop).await,
                Some(acceptor) => {
                    match tokio::time::timeout(handshake, acceptor.accept(conn)).await {
                        Ok(Ok(tls)) => serve_connection(tls, app, stop).await,
                        Ok(Err(e)) => tracing::debug!(error = %e, "web: TLS handshake failed"),
                        Err(_) => tracing::debug!("web: TLS handshake past its deadline"),
                    }
                }
            }
        });
        // Reap finished connections so the set does not grow with every one ever served.
        while tasks.try_join_next().is_some() {}
    }
    tracing::info!("web view shutting down: finishing open requests");
    let _ = stop_tx.send(true);
    let _ = tokio::time::timeout(DRAIN + Duration::from_secs(1), async {
        while tasks.join_next().await.is_some() {}
    })
    .await;
    tasks.abort_all();
    tracing::info!("web view stopped");
    Ok(())
}

/// One HTTP/1.1 connection: keep-alive, a deadline for each request head, small heads.
async fn serve_connection<I>(io: I, app: axum::Router, mut stop: tokio::sync::watch::Receiver<bool>)
where
    I: AsyncRead + AsyncWrite + Unpin + Send + 'static,
{
    let service = hyper_util::service::TowerToHyperService::new(app);
    let mut builder = hyper::server::conn::http1::Builder::new();
    builder
        .timer(TokioTimer::new())
        .header_read_timeout(HEAD_TIMEOUT)
        .max_buf_size(MAX_HEAD_BYTES)
        .max_headers(MAX_HEADERS)
        .keep_alive(true);
    let conn = builder.serve_connection(TokioIo::new(io), service);
    tokio::pin!(conn);
    tokio::select! {
        result = conn.as_mut() => {
            if let Err(e) = result {
                tracing::debug!(error = %e, "web: connection ended with an error");
            }
        }
        () = async {
            // The guard is dropped here: it may not be held across the select.
            let _ = stop.wait_for(|s| *s).await.map(|_| ());
        } => {
            conn.as_mut().graceful_shutdown();
            let _ = tokio::time::timeout(DRAIN, conn).await;
        }
    }
}

/// A plain-text reply with the status.
fn refuse(status: StatusCode, text: &str) -> Response<Body> {
    let mut response = Response::new(Body::from(format!("{text}\n")));
    *response.status_mut() = status;
    response.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("text/plain; charset=utf-8"),
    );
    response
}

/// Refuses what a read-only view never needs (other methods, bodies, long targets), gives every
/// page a deadline, and sets headers that keep pages out of frames, caches and script hosts.
async fn guard(request: Request<Body>, next: axum::middleware::Next) -> Response<Body> {
    let mut response = if request.method() != Method::GET && request.method() != Method::HEAD {
        let mut r = refuse(
            StatusCode::METHOD_NOT_ALLOWED,
            "this view is read-only: GET and HEAD only",
        );
        r.headers_mut()
            .insert(header::ALLOW, HeaderValue::from_static("GET, HEAD"));
        r
    } else if request
        .uri()
        .path_and_query()
        .is_some_and(|pq| pq.as_str().len() > MAX_URI_BYTES)
    {
        refuse(
            StatusCode::URI_TOO_LONG,
            &format!("the request target is longer than {MAX_URI_BYTES} bytes"),
        )
    } else if has_body(&request) {
        let mut r = refuse(
            StatusCode::PAYLOAD_TOO_LARGE,
            "this view takes no request bodies",
        );
        // The unread body must not be taken for the next request.
        r.headers_mut()
            .insert(header::CONNECTION, HeaderValue::from_static("close"));
        r
    } else {
        match tokio::time::timeout(PAGE_TIMEOUT, next.run(request)).await {
            Ok(r) => r,
            Err(_) => refuse(
                StatusCode::SERVICE_UNAVAILABLE,
                "the page took too long; try again",
            ),
        }
    };
    let headers = response.headers_mut();
    for (name, value) in [
        (
            header::CONTENT_SECURITY_POLICY,
            "default-src 'none'; style-src 'unsafe-inline'; img-src 'self' data:; \
             form-action 'none'; frame-ancestors 'none'; base-uri 'none'",
        ),
        (header::X_CONTENT_TYPE_OPTIONS, "nosniff"),
        (header::X_FRAME_OPTIONS, "DENY"),
        (header::REFERRER_POLICY, "no-referrer"),
        (header::CACHE_CONTROL, "no-store"),
    ] {
        headers.insert(name, HeaderValue::from_static(value));
    }
    response
}

/// Whether a request announces a body (a length above 0, or chunked encoding).
fn has_body(request: &Request<Body>) -> bool {
    let headers = request.headers();
    headers.contains_key(header::TRANSFER_ENCODING)
        || headers
            .get(header::CONTENT_LENGTH)
            .is_some_and(|v| v.to_str().ok().and_then(|s| s.trim().parse::<u64>().ok()) != Some(0))
}
