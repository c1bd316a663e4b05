//! The HTTP surface's limits.

use super::*;

/// Limits on the HTTP surface; each bounds what one client can hold.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct HttpLimits {
    /// Open connections at most.
    pub max_connections: usize,
    /// Time allowed for the TLS handshake and the first request's headers (from accept), and
    /// for a later request's headers (from its first byte).
    pub header_read_timeout: Duration,
    /// How long a kept-alive connection may wait for its next request (or take to read a
    /// response).
    pub keep_alive_idle: Duration,
    /// Requests served on one connection; the last is answered with `Connection: close`.
    pub max_requests_per_connection: u32,
    /// Longest life of one connection, whatever it does.
    pub connection_lifetime: Duration,
    /// Largest request head (request line and headers); larger ones get 431.
    pub max_header_bytes: usize,
}

impl Default for HttpLimits {
    fn default() -> Self {
        HttpLimits {
            max_connections: 64,
            header_read_timeout: Duration::from_secs(10),
            keep_alive_idle: Duration::from_secs(90),
            max_requests_per_connection: 1000,
            connection_lifetime: Duration::from_secs(600),
            max_header_bytes: 16 * 1024,
        }
    }
}

/// The HTTP surface's limits, each checked against a stated range.
pub(super) fn http_limits(c: &mut Checker, raw: &RawConfig) -> HttpLimits {
    let d = HttpLimits::default();
    let mut int = |v: &Option<Spanned<i64>>, key: &str, lo: i64, hi: i64, default: i64| match v {
        None => default,
        Some(m) if (lo..=hi).contains(&m.value) => m.value,
        Some(m) => {
            c.push(m, key, format!("must lie in [{lo}, {hi}], got {}", m.value));
            default
        }
    };
    let max_connections = int(&raw.max_connections, "max_connections", 1, 65_536, d.max_connections as i64) as usize;
    let max_requests_per_connection =
        int(&raw.max_requests_per_connection, "max_requests_per_connection", 1, 1_000_000, 1000) as u32;
    // hyper's read buffer cannot be smaller than 8 KiB; 1 MiB of headers is already hostile.
    let max_header_bytes =
        int(&raw.max_header_bytes, "max_header_bytes", 1024, 1 << 20, d.max_header_bytes as i64) as usize;
    let mut dur = |v: &Option<Spanned<String>>, key: &str, default: Duration| match v {
        None => default,
        Some(h) => parse_duration(&h.value).unwrap_or_else(|e| {
            c.push(h, key, e);
            default
        }),
    };
    let limits = HttpLimits {
        max_connections,
        header_read_timeout: dur(&raw.header_read_timeout, "header_read_timeout", d.header_read_timeout),
        keep_alive_idle: dur(&raw.keep_alive_idle, "keep_alive_idle", d.keep_alive_idle),
        max_requests_per_connection,
        connection_lifetime: dur(&raw.connection_lifetime, "connection_lifetime", d.connection_lifetime),
        max_header_bytes,
    };
    if let Some(l) = &raw.connection_lifetime {
        if limits.connection_lifetime < limits.header_read_timeout {
            c.push(l, "connection_lifetime", "must be at least header_read_timeout");
        }
    }
    limits
}
