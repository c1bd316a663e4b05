//! The HTTP surface under slow and greedy clients: request headers must arrive within
//! `header_read_timeout`, and past `max_connections` new connections are closed at once.

mod common;

use std::io::{Read, Write};
use std::net::TcpStream;
use std::time::{Duration, Instant};

use common::{Daemon, TempDir};

fn start(tag: &str, extra: &str) -> (TempDir, Daemon) {
    let dir = TempDir::new(tag);
    let port = common::free_port();
    let cfg = common::simple_config(&dir, port, extra, "web", "", "[ { name: all, last: 10 } ]");
    let d = Daemon::start(&cfg, port);
    (dir, d)
}

/// Seconds until the server closes a connection on which we send `partial` and then nothing.
fn closed_after(port: u16, partial: &[u8]) -> f64 {
    let mut s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    s.write_all(partial).unwrap();
    let t = Instant::now();
    let mut buf = [0u8; 1024];
    loop {
        match s.read(&mut buf) {
            Ok(0) | Err(_) => return t.elapsed().as_secs_f64(),
            Ok(_) => {} // an error response (408) before the close is fine
        }
    }
}

#[test]
fn slow_headers_are_cut_off() {
    let (_dir, d) = start("http-slow", "header_read_timeout: 300ms");
    let waited = closed_after(d.port, b"GET /metrics HTTP/1.1\r\nHost: x\r\n");
    assert!(waited < 3.0, "closed after {waited} s");
    assert_eq!(d.get("/healthz").unwrap().0, 200, "the server still answers others");
}

#[test]
fn connections_past_the_cap_are_closed_at_once() {
    let (_dir, d) = start("http-cap", "max_connections: 3\nheader_read_timeout: 2s");
    let idle: Vec<TcpStream> = (0..3).map(|_| TcpStream::connect(("127.0.0.1", d.port)).unwrap()).collect();
    std::thread::sleep(Duration::from_millis(100));
    let waited = closed_after(d.port, b"");
    assert!(waited < 1.0, "the fourth connection was held {waited} s");
    drop(idle);
    d.wait_until(Duration::from_secs(10), |d| d.get("/healthz").map(|r| r.0 == 200).unwrap_or(false));
}

#[test]
fn other_methods_and_paths() {
    let (_dir, d) = start("http-paths", "");
    for (m, p, want) in [
        ("GET", "/metrics", 200),
        ("HEAD", "/healthz", 200),
        ("PUT", "/readyz", 405),
        ("DELETE", "/metrics", 405),
        ("GET", "/", 404),
        ("GET", "/metrics/x", 404),
    ] {
        assert_eq!(common::http(d.port, m, p).unwrap().0, want, "{m} {p}");
    }
}
