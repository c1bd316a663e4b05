//! The HTTP surface: GET /metrics (Prometheus text format 0.0.4), GET /healthz (the process
//! runs), GET /readyz (state resumed from the database and the state volume writable; 503
//! otherwise). Every other path is 404, and other methods on these paths 405.
//!
//! With a web config (export/web.rs), connections are TLS and every request but the probes
//! needs basic-auth credentials.
//!
//! The accept loop is our own, on hyper, so that a slow or hostile client cannot hold the
//! server: request headers must arrive within a timeout, a connection lives at most a bounded
//! time, and past a cap on open connections new ones are closed at once.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;
use prometheus_client::registry::Registry;

/// What the handlers share.
pub struct Shared {
    pub registry: Registry,
    /// Set once the state is resumed; cleared while the state volume refuses writes.
    pub ready: AtomicBool,
}

async fn metrics(State(s): State<Arc<Shared>>) -> impl IntoResponse {
    let body = super::registry::render(&s.registry);
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], body)
}

async fn healthz() -> &'static str {
    "ok\n"
}

async fn readyz(State(s): State<Arc<Shared>>) -> (StatusCode, &'static str) {
    if s.ready.load(Ordering::SeqCst) {
        (StatusCode::OK, "ready\n")
    } else {
        (StatusCode::SERVICE_UNAVAILABLE, "not ready\n")
    }
}

/// The router for the three endpoints.
pub fn router(shared: Arc<Shared>) -> Router {
    Router::new()
        .route("/metrics", get(metrics))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .fallback(|| async { (StatusCode::NOT_FOUND, "not found\n") })
        .with_state(shared)
}

/// Limits on the HTTP surface.
#[derive(Clone, Copy, Debug)]
pub struct Limits {
    /// Open connections at most; more are closed on accept.
    pub max_connections: usize,
    /// Time allowed for a request's headers to arrive.
    pub header_read_timeout: Duration,
    /// Longest life of one connection (keep-alive included).
    pub connection_lifetime: Duration,
}

/// Serves one connection's requests, for at most the connection lifetime.
async fn serve_connection<I>(io: I, router: Router, limits: Limits)
where
    I: tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin + Send + 'static,
{
    let service = hyper_util::service::TowerToHyperService::new(router);
    let conn = hyper::server::conn::http1::Builder::new()
        .timer(hyper_util::rt::TokioTimer::new())
        .header_read_timeout(limits.header_read_timeout)
        .serve_connection(hyper_util::rt::TokioIo::new(io), service);
    let _ = tokio::time::timeout(limits.connection_lifetime, conn).await;
}

/// Serves `router` on `listener` until `stop` is notified; over TLS when `tls` is given (the
/// handshake must finish within the header-read timeout, so a silent client cannot hold a
/// connection slot).
pub async fn serve(
    listener: tokio::net::TcpListener,
    router: Router,
    limits: Limits,
    stop: Arc<tokio::sync::Notify>,
    tls: Option<Arc<tokio_rustls::rustls::ServerConfig>>,
) {
    let acceptor = tls.map(tokio_rustls::TlsAcceptor::from);
    let permits = Arc::new(tokio::sync::Semaphore::new(limits.max_connections));
    loop {
        let accepted = tokio::select! {
            _ = stop.notified() => break,
            a = listener.accept() => a,
        };
        let Ok((stream, _peer)) = accepted else { continue };
        let Ok(permit) = permits.clone().try_acquire_owned() else {
            tracing::debug!("connection limit reached; closing a new connection");
            drop(stream);
            continue;
        };
        let (router, acceptor) = (router.clone(), acceptor.clone());
        tokio::spawn(async move {
            match acceptor {
                None => serve_connection(stream, router, limits).await,
                Some(a) => match tokio::time::timeout(limits.header_read_timeout, a.accept(stream)).await {
                    Ok(Ok(tls)) => serve_connection(tls, router, limits).await,
                    Ok(Err(e)) => tracing::debug!(error = %e, "TLS handshake failed"),
                    Err(_) => tracing::debug!("TLS handshake timed out"),
                },
            }
            drop(permit);
        });
    }
}
