//! The HTTP surface: GET /metrics (Prometheus text format 0.0.4), GET / (the status page, from
//! the same snapshot), GET /healthz (the process
//! runs), GET /readyz (200 once the committed state has been resumed and published, and from
//! then on for good; 503 before). Every other path is 404, and other methods on these paths 405.
//!
//! With a web config (export/web.rs), connections are TLS and every request but the probes
//! needs basic-auth credentials.
//!
//! The accept loop is our own, on hyper, because the scrape path must stay open to Prometheus
//! whatever else connects. Every connection sits in a table with its phase (TLS handshake,
//! waiting for a request, reading one, serving one) and the time it last finished a request.
//! Each phase has a deadline. When the table is full, the newcomer is admitted by closing a
//! connection that is not serving a request: one of the peer address that holds the most such
//! connections, and of those the one longest without finishing a request. Only when every slot
//! is serving a request is the newcomer refused. So sockets that never send a byte, slow
//! senders and half-done TLS handshakes cannot keep a scraper out: they are the oldest, and
//! they are evicted first.

use std::collections::HashMap;
use std::net::IpAddr;
use std::sync::atomic::{AtomicBool, AtomicU32, AtomicU64, AtomicU8, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use axum::extract::State;
use axum::http::{header, HeaderValue, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;
use prometheus_client::registry::Registry;

/// What the handlers share.
pub struct Shared {
    pub registry: Registry,
    /// The snapshot the registry encodes, for the status page (None: no page, as in the fleet
    /// view, whose report is its /metrics).
    pub snapshot: Option<super::registry::SharedSnapshot>,
    /// Set once the state is resumed; cleared while the state volume refuses writes.
    pub ready: AtomicBool,
}

async fn metrics(State(s): State<Arc<Shared>>) -> impl IntoResponse {
    let body = super::registry::render(&s.registry);
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], body)
}

/// Only inline styles may load: the page runs no script and fetches nothing, whatever a
/// hostile name in it might try.
const PAGE_POLICY: &str =
    "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'";

async fn status_page(State(s): State<Arc<Shared>>) -> axum::response::Response {
    let Some(shared) = &s.snapshot else { return (StatusCode::NOT_FOUND, "not found\n").into_response() };
    let snap = shared.read().expect("snapshot lock poisoned").clone();
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_millis() as i64);
    let body = super::page::render(&snap, now);
    (
        [
            (header::CONTENT_TYPE, HeaderValue::from_static("text/html; charset=utf-8")),
            (header::CONTENT_SECURITY_POLICY, HeaderValue::from_static(PAGE_POLICY)),
            (header::X_CONTENT_TYPE_OPTIONS, HeaderValue::from_static("nosniff")),
        ],
        body,
    )
        .into_response()
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

/// The router for the four endpoints.
pub fn router(shared: Arc<Shared>) -> Router {
    Router::new()
        .route("/", get(status_page))
        .route("/metrics", get(metrics))
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .fallback(|| async { (StatusCode::NOT_FOUND, "not found\n") })
        .with_state(shared)
}

pub use crate::config::HttpLimits as Limits;

/// The read buffer hyper may grow per connection: the header limit plus room for a small
/// request body. Together with the response being written this bounds a connection's memory.
fn read_buffer_bytes(limits: &Limits) -> usize {
    // At least 9 KiB (the header limit is ≥ 1 KiB), above hyper's 8 KiB minimum.
    limits.max_header_bytes + 8 * 1024
}

/// Counts of the listener, exported as metrics.
#[derive(Debug, Default)]
pub struct ListenerStats {
    /// Connections open now.
    pub open: AtomicU64,
    /// Connections accepted since start.
    pub accepted: AtomicU64,
    /// Connections refused because every slot was serving a request.
    pub rejected: AtomicU64,
    /// Connections closed to admit a newer one.
    pub evicted: AtomicU64,
    /// Connections closed because a phase deadline passed (handshake, headers, idle, lifetime).
    pub timed_out: AtomicU64,
}

// Phases of a connection.
const HANDSHAKE: u8 = 0;
const WAITING: u8 = 1;
const READING: u8 = 2;
const SERVING: u8 = 3;

/// One connection's entry in the table.
#[derive(Debug)]
struct Conn {
    peer: IpAddr,
    phase: AtomicU8,
    /// Milliseconds since the table's epoch at which the current phase's deadline started.
    phase_since: AtomicU64,
    /// Milliseconds since the epoch at accept or at the end of the last request served: the
    /// eviction order.
    last_done: AtomicU64,
    requests: AtomicU32,
    /// Set at the first byte received (TLS handshake bytes included): a connection that has
    /// sent nothing is evicted before any that has.
    heard: AtomicBool,
    evict: tokio::sync::Notify,
}

/// The open connections, behind one lock (held only for a scan of at most `max_connections`).
struct Table {
    epoch: Instant,
    conns: Mutex<HashMap<u64, Arc<Conn>>>,
    next: AtomicU64,
    stats: Arc<ListenerStats>,
}

impl Table {
    fn now_ms(&self) -> u64 {
        self.epoch.elapsed().as_millis() as u64
    }

    /// Admits a connection from `peer`, evicting one if the table is full; None when every
    /// slot is serving a request.
    fn admit(&self, peer: IpAddr, cap: usize) -> Option<(u64, Arc<Conn>)> {
        let mut conns = self.conns.lock().unwrap_or_else(|p| p.into_inner());
        if conns.len() >= cap {
            let victim = pick_victim(&conns)?;
            if let Some(v) = conns.remove(&victim) {
                v.evict.notify_one();
                self.stats.evicted.fetch_add(1, Ordering::Relaxed);
            }
        }
        let now = self.now_ms();
        let c = Arc::new(Conn {
            peer,
            phase: AtomicU8::new(HANDSHAKE),
            phase_since: AtomicU64::new(now),
            last_done: AtomicU64::new(now),
            requests: AtomicU32::new(0),
            heard: AtomicBool::new(false),
            evict: tokio::sync::Notify::new(),
        });
        let id = self.next.fetch_add(1, Ordering::Relaxed);
        conns.insert(id, c.clone());
        self.stats.open.store(conns.len() as u64, Ordering::Relaxed);
        self.stats.accepted.fetch_add(1, Ordering::Relaxed);
        Some((id, c))
    }

    fn remove(&self, id: u64) {
        let mut conns = self.conns.lock().unwrap_or_else(|p| p.into_inner());
        conns.remove(&id);
        self.stats.open.store(conns.len() as u64, Ordering::Relaxed);
    }
}

/// The connection to close for a newcomer: not serving a request; from the peer address with
/// the most such connections (so one flooding address evicts itself, not a scraper elsewhere);
/// among those, one that has sent nothing at all before one that has (a scraper mid-way through
/// its TLS handshake outranks sockets that never spoke); then the one longest without finishing
/// a request.
fn pick_victim(conns: &HashMap<u64, Arc<Conn>>) -> Option<u64> {
    let mut per_peer: HashMap<IpAddr, u32> = HashMap::new();
    for c in conns.values() {
        if c.phase.load(Ordering::Acquire) != SERVING {
            *per_peer.entry(c.peer).or_default() += 1;
        }
    }
    conns
        .iter()
        .filter(|(_, c)| c.phase.load(Ordering::Acquire) != SERVING)
        .max_by_key(|(id, c)| {
            (
                per_peer[&c.peer],
                !c.heard.load(Ordering::Relaxed),
                std::cmp::Reverse(c.last_done.load(Ordering::Relaxed)),
                std::cmp::Reverse(**id),
            )
        })
        .map(|(id, _)| *id)
}

/// Resolves when the connection's current phase has outlived its deadline.
async fn phase_deadline(c: &Conn, limits: &Limits, epoch: Instant) {
    loop {
        let phase = c.phase.load(Ordering::Acquire);
        let since = c.phase_since.load(Ordering::Acquire);
        let allowed = match phase {
            HANDSHAKE | READING => limits.header_read_timeout,
            WAITING if c.requests.load(Ordering::Relaxed) == 0 => limits.header_read_timeout,
            WAITING => limits.keep_alive_idle,
            // A request being served is bounded by the connection lifetime alone.
            _ => limits.connection_lifetime,
        };
        let deadline = epoch + Duration::from_millis(since) + allowed;
        if Instant::now() >= deadline {
            // Re-read: the phase may have moved on while we computed.
            if c.phase.load(Ordering::Acquire) == phase && c.phase_since.load(Ordering::Acquire) == since {
                return;
            }
            continue;
        }
        // Wake at the deadline, or sooner to notice a phase change (cheap: one timer per
        // connection, at most a few per second).
        tokio::time::sleep_until(deadline.min(Instant::now() + Duration::from_millis(250)).into()).await;
    }
}

/// The connection's stream, noting its first byte and, when `phases` (on the HTTP layer, above
/// any TLS), when the bytes of a new request begin to arrive.
struct Tracked<I> {
    io: I,
    conn: Arc<Conn>,
    epoch: Instant,
    phases: bool,
}

impl<I: tokio::io::AsyncRead + Unpin> tokio::io::AsyncRead for Tracked<I> {
    fn poll_read(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        buf: &mut tokio::io::ReadBuf<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        let before = buf.filled().len();
        let r = std::pin::Pin::new(&mut self.io).poll_read(cx, buf);
        if buf.filled().len() > before {
            let c = &self.conn;
            c.heard.store(true, Ordering::Relaxed);
            if self.phases
                && c.phase.compare_exchange(WAITING, READING, Ordering::AcqRel, Ordering::Acquire).is_ok()
                && c.requests.load(Ordering::Relaxed) > 0
            {
                // A kept-alive connection's next request: its headers are timed from here.
                // The first request's stay timed from accept.
                c.phase_since.store(self.epoch.elapsed().as_millis() as u64, Ordering::Release);
            }
        }
        r
    }
}

impl<I: tokio::io::AsyncWrite + Unpin> tokio::io::AsyncWrite for Tracked<I> {
    fn poll_write(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        buf: &[u8],
    ) -> std::task::Poll<std::io::Result<usize>> {
        std::pin::Pin::new(&mut self.io).poll_write(cx, buf)
    }
    fn poll_flush(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        std::pin::Pin::new(&mut self.io).poll_flush(cx)
    }
    fn poll_shutdown(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        std::pin::Pin::new(&mut self.io).poll_shutdown(cx)
    }
    fn poll_write_vectored(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        bufs: &[std::io::IoSlice<'_>],
    ) -> std::task::Poll<std::io::Result<usize>> {
        std::pin::Pin::new(&mut self.io).poll_write_vectored(cx, bufs)
    }
    fn is_write_vectored(&self) -> bool {
        self.io.is_write_vectored()
    }
}

/// Serves one connection's requests until the client closes it or the caller drops it.
async fn serve_connection<I>(io: I, conn: Arc<Conn>, router: Router, limits: Limits, epoch: Instant)
where
    I: tokio::io::AsyncRead + tokio::io::AsyncWrite + Unpin + Send + 'static,
{
    use hyper::service::Service as _;
    let now = || epoch.elapsed().as_millis() as u64;
    conn.phase.store(WAITING, Ordering::Release);
    let inner = hyper_util::service::TowerToHyperService::new(router);
    let c = conn.clone();
    let max_requests = limits.max_requests_per_connection;
    let service = hyper::service::service_fn(move |req| {
        let served = c.requests.fetch_add(1, Ordering::Relaxed) + 1;
        c.phase.store(SERVING, Ordering::Release);
        let fut = inner.call(req);
        let c = c.clone();
        async move {
            let mut resp = fut.await?;
            if served >= max_requests {
                resp.headers_mut().insert(header::CONNECTION, HeaderValue::from_static("close"));
            }
            let t = now();
            c.last_done.store(t, Ordering::Relaxed);
            c.phase_since.store(t, Ordering::Release);
            c.phase.store(WAITING, Ordering::Release);
            Ok::<_, std::convert::Infallible>(resp)
        }
    });
    let tracked = Tracked { io, conn: conn.clone(), epoch, phases: true };
    let mut builder = hyper::server::conn::http1::Builder::new();
    builder
        .timer(hyper_util::rt::TokioTimer::new())
        // Our own phase deadlines replace hyper's header timer, which also runs while a
        // kept-alive connection waits.
        .header_read_timeout(None)
        .max_header_size(limits.max_header_bytes)
        .max_buf_size(read_buffer_bytes(&limits));
    // Eviction and the deadlines are watched by the caller, around the TLS handshake too.
    let _ = builder.serve_connection(hyper_util::rt::TokioIo::new(tracked), service).await;
}

/// Serves the three endpoints of `shared` on `listener` from a task of `runtime` until `stop`
/// is notified: over TLS, and behind basic auth (probes excepted), as `web` says.
pub fn spawn(
    runtime: &tokio::runtime::Runtime,
    listener: tokio::net::TcpListener,
    shared: Arc<Shared>,
    web: &crate::config::web::WebConfig,
    limits: Limits,
    stats: Arc<ListenerStats>,
    stop: Arc<tokio::sync::Notify>,
) -> tokio::task::JoinHandle<()> {
    let mut app = router(shared);
    if !web.users.is_empty() {
        app = app.layer(axum::middleware::from_fn_with_state(web.clone(), super::web::require_auth));
    }
    let tls = web.tls.clone();
    runtime.spawn(serve(listener, app, limits, stop, tls, stats))
}

/// Serves `router` on `listener` until `stop` is notified; over TLS when `tls` is given.
pub async fn serve(
    listener: tokio::net::TcpListener,
    router: Router,
    limits: Limits,
    stop: Arc<tokio::sync::Notify>,
    tls: Option<Arc<tokio_rustls::rustls::ServerConfig>>,
    stats: Arc<ListenerStats>,
) {
    let acceptor = tls.map(tokio_rustls::TlsAcceptor::from);
    let table =
        Arc::new(Table { epoch: Instant::now(), conns: Mutex::new(HashMap::new()), next: AtomicU64::new(0), stats });
    loop {
        let accepted = tokio::select! {
            _ = stop.notified() => break,
            a = listener.accept() => a,
        };
        let Ok((stream, peer)) = accepted else {
            // Out of file descriptors or a transient accept error: do not spin.
            tokio::time::sleep(Duration::from_millis(10)).await;
            continue;
        };
        let Some((id, conn)) = table.admit(peer.ip(), limits.max_connections) else {
            table.stats.rejected.fetch_add(1, Ordering::Relaxed);
            tracing::debug!("every connection slot is serving a request; closing a new connection");
            drop(stream);
            continue;
        };
        let (router, acceptor, table) = (router.clone(), acceptor.clone(), table.clone());
        tokio::spawn(async move {
            let epoch = table.epoch;
            let timed_out = async {
                tokio::select! {
                    _ = tokio::time::sleep(limits.connection_lifetime) => true,
                    _ = phase_deadline(&conn, &limits, epoch) => true,
                    _ = conn.evict.notified() => false,
                }
            };
            let work = async {
                match acceptor {
                    None => serve_connection(stream, conn.clone(), router, limits, epoch).await,
                    Some(a) => match a.accept(Tracked { io: stream, conn: conn.clone(), epoch, phases: false }).await {
                        Ok(tls) => serve_connection(tls, conn.clone(), router, limits, epoch).await,
                        Err(e) => tracing::debug!(error = %e, "TLS handshake failed"),
                    },
                }
            };
            tokio::select! {
                _ = work => {}
                t = timed_out => if t { table.stats.timed_out.fetch_add(1, Ordering::Relaxed); },
            }
            table.remove(id);
        });
        // Let the new connection's task run once before the next accept: a client that sent
        // its request with the connection (every scraper does) is then serving before newer
        // connections could evict it.
        tokio::task::yield_now().await;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table() -> Table {
        Table {
            epoch: Instant::now(),
            conns: Mutex::new(HashMap::new()),
            next: AtomicU64::new(0),
            stats: Arc::default(),
        }
    }

    fn ip(s: &str) -> IpAddr {
        s.parse().unwrap()
    }

    #[test]
    fn a_full_table_evicts_the_longest_idle_of_the_busiest_address() {
        let t = table();
        let (a, b) = (ip("10.0.0.1"), ip("10.0.0.2"));
        let (scraper, _) = t.admit(a, 4).unwrap();
        for _ in 0..3 {
            t.admit(b, 4).unwrap();
        }
        // Make the scraper's connection the oldest by far.
        t.conns.lock().unwrap()[&scraper].last_done.store(0, Ordering::Relaxed);
        for ms in [10, 20, 30] {
            for (id, c) in t.conns.lock().unwrap().iter() {
                if *id != scraper && c.last_done.load(Ordering::Relaxed) == 0 {
                    c.last_done.store(ms, Ordering::Relaxed);
                    break;
                }
            }
        }
        // A newcomer from b evicts b's oldest; so does one from a, while b holds more.
        for newcomer in [b, a] {
            let before: Vec<u64> = t.conns.lock().unwrap().keys().copied().collect();
            t.admit(newcomer, 4).unwrap();
            let conns = t.conns.lock().unwrap();
            let gone: Vec<&u64> = before.iter().filter(|id| !conns.contains_key(id)).collect();
            assert_eq!(gone.len(), 1);
            assert_ne!(*gone[0], scraper, "the scraper's address holds the fewest connections");
        }
        assert!(t.conns.lock().unwrap().contains_key(&scraper));
        assert_eq!(t.stats.evicted.load(Ordering::Relaxed), 2);
        assert_eq!(t.conns.lock().unwrap().len(), 4);
    }

    #[test]
    fn a_silent_socket_goes_before_a_client_that_has_spoken() {
        let t = table();
        let (talker, c) = t.admit(ip("10.0.0.1"), 2).unwrap();
        c.heard.store(true, Ordering::Relaxed);
        c.last_done.store(0, Ordering::Relaxed); // the oldest
        let (silent, _) = t.admit(ip("10.0.0.1"), 2).unwrap();
        t.admit(ip("10.0.0.1"), 2).unwrap();
        let conns = t.conns.lock().unwrap();
        assert!(conns.contains_key(&talker) && !conns.contains_key(&silent));
    }

    #[test]
    fn requests_being_served_are_never_evicted() {
        let t = table();
        let mut ids = Vec::new();
        for _ in 0..3 {
            let (id, c) = t.admit(ip("10.0.0.9"), 3).unwrap();
            c.phase.store(SERVING, Ordering::Release);
            ids.push(id);
        }
        assert!(t.admit(ip("10.0.0.9"), 3).is_none(), "every slot serves a request: the newcomer is refused");
        // One finishes: it (and only it) may now go.
        t.conns.lock().unwrap()[&ids[1]].phase.store(WAITING, Ordering::Release);
        t.admit(ip("10.0.0.8"), 3).unwrap();
        let conns = t.conns.lock().unwrap();
        assert!(conns.contains_key(&ids[0]) && conns.contains_key(&ids[2]) && !conns.contains_key(&ids[1]));
    }
}
