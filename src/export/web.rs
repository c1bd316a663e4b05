//! Basic auth on the HTTP surface, as the web configuration (config/web.rs) asks for it.

use axum::extract::Request;
use axum::http::{header, StatusCode};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};

use crate::config::web::WebConfig;

/// Axum middleware: 401 with a Basic challenge unless the request carries valid credentials.
/// /healthz and /readyz stay open, so that orchestrator probes need no secret (they reveal
/// only "ok" or "ready").
pub async fn require_auth(
    axum::extract::State(web): axum::extract::State<WebConfig>,
    req: Request,
    next: Next,
) -> Response {
    let path = req.uri().path();
    if path == "/healthz" || path == "/readyz" {
        return next.run(req).await;
    }
    let auth = req.headers().get(header::AUTHORIZATION).and_then(|v| v.to_str().ok());
    // bcrypt takes tens of milliseconds: off the async workers.
    let (web2, auth) = (web.clone(), auth.map(str::to_string));
    let ok = tokio::task::spawn_blocking(move || web2.check(auth.as_deref())).await.unwrap_or(false);
    if ok {
        next.run(req).await
    } else {
        (StatusCode::UNAUTHORIZED, [(header::WWW_AUTHENTICATE, "Basic realm=\"riskbound\"")], "unauthorized\n")
            .into_response()
    }
}
