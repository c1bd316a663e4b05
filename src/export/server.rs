//! The HTTP surface: GET /metrics (Prometheus text format 0.0.4), GET /healthz (the process
//! runs), GET /readyz (state resumed from the database and the state volume writable; 503
//! otherwise). Every other path is 404, and other methods on these paths 405.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

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
