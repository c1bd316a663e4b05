//! The HTTP surface under slow, greedy and hostile clients, with the real binary on loopback.
//! Each limit of the listener has a test; the flood tests hold hundreds of sockets that never
//! send a request, plus slow senders and, over TLS, handshakes that never finish, while a
//! scraper fetches /metrics.

mod common;

use std::io::{ErrorKind, Read, Write};
use std::net::TcpStream;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use common::{Daemon, TempDir};

fn start(tag: &str, extra: &str) -> (TempDir, Daemon) {
    let dir = TempDir::new(tag);
    let port = common::free_port();
    let cfg = common::simple_config(&dir, port, extra, "web", "", "[ { name: all, last: 10 } ]");
    let d = Daemon::start(&cfg, port);
    (dir, d)
}

fn connect(port: u16) -> TcpStream {
    let s = TcpStream::connect(("127.0.0.1", port)).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    s
}

/// Reads until the server closes the connection; the seconds that took and what was read.
fn read_until_closed(s: &mut TcpStream) -> (f64, String) {
    let t = Instant::now();
    let mut got = Vec::new();
    let mut buf = [0u8; 4096];
    loop {
        match s.read(&mut buf) {
            Ok(0) | Err(_) => return (t.elapsed().as_secs_f64(), String::from_utf8_lossy(&got).into_owned()),
            Ok(n) => got.extend_from_slice(&buf[..n]),
        }
    }
}

/// Seconds until the server closes a connection on which we send `partial` and then nothing.
fn closed_after(port: u16, partial: &[u8]) -> f64 {
    let mut s = connect(port);
    s.write_all(partial).unwrap();
    read_until_closed(&mut s).0
}

/// True when the server has closed `s` (a read returns end of file or a reset at once).
fn is_closed(s: &TcpStream) -> bool {
    s.set_nonblocking(true).unwrap();
    let mut b = [0u8; 1];
    let closed = match (&*s).read(&mut b) {
        Ok(0) => true,
        Ok(_) => false,
        Err(e) => e.kind() != ErrorKind::WouldBlock,
    };
    s.set_nonblocking(false).unwrap();
    closed
}

/// Sends one keep-alive request and reads exactly one response (Content-Length framed).
fn keep_alive_get(s: &mut TcpStream, path: &str) -> String {
    write!(s, "GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n").unwrap();
    let mut head = Vec::new();
    let mut b = [0u8; 1];
    while !head.ends_with(b"\r\n\r\n") {
        assert_eq!(s.read(&mut b).unwrap(), 1, "closed mid-response");
        head.push(b[0]);
    }
    let head = String::from_utf8(head).unwrap();
    let len: usize = head
        .lines()
        .find_map(|l| l.to_ascii_lowercase().strip_prefix("content-length:").map(|v| v.trim().parse().unwrap()))
        .expect("content-length");
    let mut body = vec![0u8; len];
    s.read_exact(&mut body).unwrap();
    head
}

#[test]
fn slow_headers_are_cut_off() {
    let (_dir, d) = start("http-slow", "header_read_timeout: 300ms");
    let waited = closed_after(d.port, b"GET /metrics HTTP/1.1\r\nHost: x\r\n");
    assert!(waited < 3.0, "closed after {waited} s");
    assert_eq!(d.get("/healthz").unwrap().0, 200, "the server still answers others");
}

#[test]
fn a_full_table_evicts_the_oldest_idle_connection_to_admit_a_new_one() {
    let (_dir, d) = start("http-cap", "max_connections: 3\nheader_read_timeout: 20s");
    let idle: Vec<TcpStream> = (0..3)
        .map(|_| {
            let s = connect(d.port);
            std::thread::sleep(Duration::from_millis(50)); // a known order
            s
        })
        .collect();
    // The fourth is served, and the oldest idle connection made way for it.
    assert_eq!(common::http(d.port, "GET", "/healthz").unwrap().0, 200);
    std::thread::sleep(Duration::from_millis(100));
    let closed: Vec<bool> = idle.iter().map(is_closed).collect();
    assert_eq!(closed, [true, false, false]);
    let m = d.metrics();
    assert_eq!(m.get("riskbound_http_connections_evicted_total", &[]), Some(1.0));
    assert_eq!(m.get("riskbound_http_connections_max", &[]), Some(3.0));
}

#[test]
fn oversized_request_heads_get_431() {
    let (_dir, d) = start("http-431", "max_header_bytes: 2048");
    let mut s = connect(d.port);
    let big = "a".repeat(4096);
    write!(s, "GET /metrics HTTP/1.1\r\nHost: x\r\nX-Big: {big}\r\n\r\n").unwrap();
    let (_, reply) = read_until_closed(&mut s);
    assert!(reply.starts_with("HTTP/1.1 431"), "{reply:?}");
    // Just under the limit is served.
    let mut s = connect(d.port);
    let fits = "a".repeat(1500);
    write!(s, "GET /healthz HTTP/1.1\r\nHost: x\r\nX-Big: {fits}\r\nConnection: close\r\n\r\n").unwrap();
    assert!(read_until_closed(&mut s).1.starts_with("HTTP/1.1 200"));
}

#[test]
fn kept_alive_connections_close_when_idle() {
    let (_dir, d) = start("http-idle", "keep_alive_idle: 500ms\nheader_read_timeout: 5s");
    let mut s = connect(d.port);
    assert!(keep_alive_get(&mut s, "/healthz").starts_with("HTTP/1.1 200"));
    let (waited, _) = read_until_closed(&mut s);
    assert!((0.3..3.0).contains(&waited), "idle connection closed after {waited} s (keep_alive_idle 500ms)");
    assert!(d.metrics().get("riskbound_http_connections_timed_out_total", &[]).unwrap() >= 1.0);
}

#[test]
fn a_connection_serves_at_most_max_requests() {
    let (_dir, d) = start("http-reqs", "max_requests_per_connection: 3");
    let mut s = connect(d.port);
    for i in 1..=3 {
        let head = keep_alive_get(&mut s, "/healthz").to_ascii_lowercase();
        assert!(head.starts_with("http/1.1 200"));
        assert_eq!(head.contains("connection: close"), i == 3, "request {i}: {head}");
    }
    let (waited, rest) = read_until_closed(&mut s);
    assert!(waited < 2.0 && rest.is_empty(), "closed after the third response ({waited} s, {rest:?})");
}

#[test]
fn a_connection_lives_at_most_its_lifetime() {
    let (_dir, d) = start("http-life", "connection_lifetime: 1s\nheader_read_timeout: 500ms\nkeep_alive_idle: 10s");
    let mut s = connect(d.port);
    let t = Instant::now();
    // A busy, well-behaved client: a request every 100 ms.
    let mut served = 0;
    while t.elapsed() < Duration::from_secs(5) {
        write!(s, "GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n").unwrap_or(());
        let mut b = [0u8; 512];
        match s.read(&mut b) {
            Ok(0) | Err(_) => break,
            Ok(_) => served += 1,
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let lived = t.elapsed().as_secs_f64();
    assert!((0.8..2.5).contains(&lived) && served >= 5, "lived {lived} s, {served} responses");
}

#[test]
fn the_footprint_metrics_are_this_process() {
    let (_dir, d) = start("http-process", "memory_limit: 256MiB");
    let m = d.metrics();
    let status = std::fs::read_to_string(format!("/proc/{}/status", d.child.id())).unwrap();
    let vm = |k: &str| -> f64 {
        let l = status.lines().find(|l| l.starts_with(k)).unwrap();
        l.split_whitespace().nth(1).unwrap().parse::<f64>().unwrap() * 1024.0
    };
    let rss = m.get("process_resident_memory_bytes", &[]).unwrap();
    assert!((rss / vm("VmRSS:") - 1.0).abs() < 0.25, "rss {rss} vs /proc status {}", vm("VmRSS:"));
    let virt = m.get("process_virtual_memory_bytes", &[]).unwrap();
    assert!((virt / vm("VmSize:") - 1.0).abs() < 0.05, "virtual {virt} vs {}", vm("VmSize:"));
    let fds = std::fs::read_dir(format!("/proc/{}/fd", d.child.id())).unwrap().count() as f64;
    let open = m.get("process_open_fds", &[]).unwrap();
    assert!((open - fds).abs() <= 3.0, "open fds {open} vs {fds}");
    assert!(m.get("process_max_fds", &[]).unwrap() >= open);
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs_f64();
    let start = m.get("process_start_time_seconds", &[]).unwrap();
    assert!(now - start < 120.0 && now - start > -1.0, "started {start}, now {now}");
    // CPU time counts in clock ticks: a fresh daemon may still be at 0.
    let cpu = m.get("process_cpu_seconds_total", &[]).unwrap();
    assert!((0.0..=2.0 * (now - start + 1.0)).contains(&cpu), "cpu {cpu} s");
    assert_eq!(m.get("riskbound_memory_limit_bytes", &[]), Some(256.0 * 1024.0 * 1024.0));
    assert!(m.get("riskbound_http_connections_open", &[]).unwrap() >= 1.0);
}

/// Hostile clients on their own threads: `idle` sockets that send nothing (re-opened whenever
/// the server closes them, as an attacker would) and `slow` ones sending a long header a byte
/// every half second.
struct Flood {
    stop: Arc<AtomicBool>,
    threads: Vec<std::thread::JoinHandle<u64>>,
}

impl Flood {
    fn start(port: u16, idle: usize, slow: usize) -> Flood {
        let stop = Arc::new(AtomicBool::new(false));
        let mut threads = Vec::new();
        let s = stop.clone();
        threads.push(std::thread::spawn(move || {
            let mut held: Vec<TcpStream> =
                (0..idle).filter_map(|_| TcpStream::connect(("127.0.0.1", port)).ok()).collect();
            let mut reopened = 0;
            while !s.load(Ordering::Relaxed) {
                for c in held.iter_mut() {
                    if is_closed(c) {
                        if let Ok(n) = TcpStream::connect(("127.0.0.1", port)) {
                            *c = n;
                            reopened += 1;
                        }
                    }
                }
                std::thread::sleep(Duration::from_millis(200));
            }
            reopened
        }));
        let s = stop.clone();
        threads.push(std::thread::spawn(move || {
            let line = format!("GET /metrics HTTP/1.1\r\nX-Slow: {}", "z".repeat(12_000));
            let mut conns: Vec<(TcpStream, usize)> =
                (0..slow).filter_map(|_| TcpStream::connect(("127.0.0.1", port)).ok().map(|c| (c, 0))).collect();
            while !s.load(Ordering::Relaxed) {
                for (c, at) in conns.iter_mut() {
                    if c.write_all(&line.as_bytes()[*at % line.len()..][..1]).is_err() || is_closed(c) {
                        if let Ok(n) = TcpStream::connect(("127.0.0.1", port)) {
                            *c = n;
                            *at = 0;
                        }
                        continue;
                    }
                    *at += 1;
                }
                std::thread::sleep(Duration::from_millis(500));
            }
            0
        }));
        std::thread::sleep(Duration::from_millis(500)); // the flood is in place
        Flood { stop, threads }
    }

    /// Stops the flood; how many idle sockets it had to re-open.
    fn stop(self) -> u64 {
        self.stop.store(true, Ordering::Relaxed);
        self.threads.into_iter().map(|t| t.join().unwrap()).sum()
    }
}

/// 30 scrapes during the flood: each must succeed within 1 s. Returns the latencies (s).
fn scrape_through(scrape: impl Fn() -> Result<String, String>) -> Vec<f64> {
    let mut lat = Vec::new();
    for i in 0..30 {
        let t = Instant::now();
        let body = scrape().unwrap_or_else(|e| panic!("scrape {i} failed during the flood: {e}"));
        let s = t.elapsed().as_secs_f64();
        assert!(body.contains("riskbound_build_info"), "scrape {i}: {}", &body[..body.len().min(200)]);
        assert!(s < 1.0, "scrape {i} took {s} s");
        lat.push(s);
        std::thread::sleep(Duration::from_millis(100));
    }
    lat.sort_by(f64::total_cmp);
    lat
}

fn report(what: &str, d: &Daemon, lat: &[f64], reopened: u64) {
    let m = d.metrics();
    eprintln!(
        "{what}: 30/30 scrapes, p50 {:.1} ms, max {:.1} ms; peak RSS {} KiB; evicted {}, timed out {}, idle sockets re-opened {reopened}",
        lat[14] * 1e3,
        lat[29] * 1e3,
        d.peak_rss_kib(),
        m.get("riskbound_http_connections_evicted_total", &[]).unwrap_or(0.0),
        m.get("riskbound_http_connections_timed_out_total", &[]).unwrap_or(0.0),
    );
}

#[test]
fn a_flood_of_idle_and_slow_clients_never_blinds_the_scrape() {
    let (_dir, d) = start("http-flood", "");
    let flood = Flood::start(d.port, 500, 20);
    let lat = scrape_through(|| match common::http(d.port, "GET", "/metrics") {
        Ok((200, body)) => Ok(body),
        Ok((code, _)) => Err(format!("status {code}")),
        Err(e) => Err(e.to_string()),
    });
    let reopened = flood.stop();
    report("plain flood", &d, &lat, reopened);
    assert!(d.peak_rss_kib() < 128 * 1024, "peak RSS {} KiB", d.peak_rss_kib());
    // After the flood the daemon serves normally, and its counts say what happened.
    std::thread::sleep(Duration::from_millis(300));
    assert_eq!(d.get("/healthz").unwrap().0, 200);
    let m = d.metrics();
    assert!(m.get("riskbound_http_connections_evicted_total", &[]).unwrap() >= 400.0);
    assert_eq!(m.get("riskbound_http_connections_rejected_total", &[]), Some(0.0));
    assert!(m.get("riskbound_http_connections_open", &[]).unwrap() <= 64.0);
}

#[test]
fn a_flood_of_unfinished_tls_handshakes_never_blinds_the_scrape() {
    let dir = TempDir::new("http-flood-tls");
    let cert = common::tls::identity(&dir);
    std::fs::write(dir.path("web.yaml"), "tls_server_config: { cert_file: cert.pem, key_file: key.pem }\n").unwrap();
    let port = common::free_port();
    let cfg = common::simple_config(&dir, port, "", "web", "", "[ { name: all, last: 10 } ]");
    let web = dir.path("web.yaml");
    let d = Daemon::start_with(&cfg, port, &["--web-config", web.to_str().unwrap()]);
    // Plain TCP sockets that never start the handshake, and slow senders of garbage.
    let flood = Flood::start(port, 500, 20);
    let v13 = &tokio_rustls::rustls::version::TLS13;
    let lat = scrape_through(|| {
        let r = common::tls::get(port, &cert, v13, "/metrics", None)?;
        if r.starts_with("HTTP/1.1 200") {
            Ok(r)
        } else {
            Err(r.lines().next().unwrap_or("").to_string())
        }
    });
    let reopened = flood.stop();
    assert!(d.peak_rss_kib() < 128 * 1024, "peak RSS {} KiB", d.peak_rss_kib());
    eprintln!(
        "tls flood: p50 {:.1} ms, max {:.1} ms, peak RSS {} KiB, re-opened {reopened}",
        lat[14] * 1e3,
        lat[29] * 1e3,
        d.peak_rss_kib()
    );
    assert!(common::tls::get(port, &cert, v13, "/healthz", None).unwrap().starts_with("HTTP/1.1 200"));
}
