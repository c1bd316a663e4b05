//! Helpers for tests that drive the real `riskbound` binary: a temporary folder with a config,
//! the daemon as a child process on a free loopback port, scrapes and metric lookups.
#![allow(dead_code)] // each test binary uses its own subset

pub mod join_model;
pub mod tls;

use std::collections::BTreeMap;
use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

/// A temporary folder, removed on drop.
pub struct TempDir(pub PathBuf);

impl TempDir {
    pub fn new(tag: &str) -> TempDir {
        let p = std::env::temp_dir().join(format!("riskbound-test-{tag}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(p.join("in")).unwrap();
        TempDir(p)
    }
    pub fn path(&self, rel: &str) -> PathBuf {
        self.0.join(rel)
    }
    /// Writes a batch file the way a producer should: a temporary name, then a rename.
    pub fn drop_file(&self, name: &str, body: &str) {
        let tmp = self.0.join("in").join(format!(".{name}.tmp"));
        std::fs::write(&tmp, body).unwrap();
        std::fs::rename(&tmp, self.0.join("in").join(name)).unwrap();
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// Writes `riskbound.yaml` in `dir` for one zero-one model `name` reading `in/pred-*.csv` and
/// `in/label-*.csv` with columns id, t, p / id, t, y. `top` holds extra top-level keys,
/// `model` extra model keys (each line indented by four spaces), `windows` the windows list.
pub fn simple_config(dir: &TempDir, port: u16, top: &str, name: &str, model: &str, windows: &str) -> PathBuf {
    let text = format!(
        "listen: \"127.0.0.1:{port}\"
state_dir: state
{top}
models:
  - name: {name}
    predictions: {{ dir: in, pattern: \"pred-*.csv\", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: in, pattern: \"label-*.csv\", columns: {{ id: id, time: t, label: y }} }}
{model}
    windows: {windows}
"
    );
    let p = dir.path("riskbound.yaml");
    std::fs::write(&p, text).unwrap();
    p
}

/// scipy's one-sided Clopper-Pearson (lower, upper) for k errors in n at confidence `conf`,
/// from tests/reference/bounds_fixture.json (scipy.stats.beta.ppf; see its script).
pub fn fixture_cp(n: u64, k: u64, conf: f64) -> (f64, f64) {
    let text =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/bounds_fixture.json")).unwrap();
    let fx: serde_json::Value = serde_json::from_str(&text).unwrap();
    let c = fx["clopper_pearson"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["n"] == n && c["k"] == k && c["confidence"] == conf)
        .expect("fixture case");
    (c["lower"].as_f64().unwrap(), c["upper"].as_f64().unwrap())
}

/// Runs the binary with `args`, expecting exit status 2 (the user's input) and `needle` in
/// its standard error; returns the output for further checks.
pub fn fails_with(args: &[&str], needle: &str) -> std::process::Output {
    let out = Command::new(bin()).args(args).output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
    assert!(err.contains(needle), "{args:?}: expected {needle:?} in: {err}");
    out
}

/// A free loopback port (bound and released; the daemon binds it right after).
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

pub fn bin() -> &'static str {
    env!("CARGO_BIN_EXE_riskbound")
}

/// A daemon child process.
pub struct Daemon {
    pub child: Child,
    pub port: u16,
    /// The daemon's standard error (its log).
    pub log: PathBuf,
}

impl Daemon {
    /// Starts `riskbound run --config CONFIG` and waits until /readyz answers 200.
    pub fn start(config: &Path, port: u16) -> Daemon {
        Self::start_with(config, port, &[])
    }

    /// Like [`Daemon::start`] with extra arguments; with a web config the readiness wait is on
    /// the log line instead (the probe would need TLS).
    pub fn start_with(config: &Path, port: u16, extra: &[&str]) -> Daemon {
        let d = Self::spawn_with(config, port, extra);
        if extra.is_empty() {
            d.wait_until(Duration::from_secs(20), |d| d.get("/readyz").map(|(s, _)| s == 200).unwrap_or(false));
        } else {
            d.wait_until(Duration::from_secs(20), |d| d.log_text().contains("state resumed; ready"));
        }
        d
    }

    /// Starts `riskbound run --config CONFIG` and waits only until /healthz answers (the
    /// daemon may be serving but not ready).
    pub fn spawn(config: &Path, port: u16) -> Daemon {
        let d = Self::spawn_with(config, port, &[]);
        d.wait_until(Duration::from_secs(20), |d| d.get("/healthz").map(|(s, _)| s == 200).unwrap_or(false));
        d
    }

    fn spawn_with(config: &Path, port: u16, extra: &[&str]) -> Daemon {
        static STARTS: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
        let n = STARTS.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
        let log_path = config.with_extension(format!("log.{n}"));
        let log = std::fs::File::create(&log_path).unwrap();
        let child = Command::new(bin())
            .args(["run", "--config", config.to_str().unwrap()])
            .args(extra)
            .env("RUST_LOG", "info")
            .env("NO_COLOR", "1")
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .unwrap();
        Daemon { child, port, log: log_path }
    }

    /// GET a path: (status, body).
    pub fn get(&self, path: &str) -> std::io::Result<(u16, String)> {
        http(self.port, "GET", path)
    }

    pub fn scrape(&self) -> String {
        let (status, body) = self.get("/metrics").expect("scrape");
        assert_eq!(status, 200);
        body
    }

    pub fn metrics(&self) -> Metrics {
        Metrics::parse(&self.scrape())
    }

    /// Polls until `f` holds, panicking after `timeout`.
    pub fn wait_until(&self, timeout: Duration, f: impl Fn(&Daemon) -> bool) {
        let deadline = Instant::now() + timeout;
        while !f(self) {
            assert!(Instant::now() < deadline, "condition not reached in {timeout:?}");
            std::thread::sleep(Duration::from_millis(25));
        }
    }

    /// Waits until the files counter of (model, kind) reaches `n`.
    pub fn wait_files(&self, model: &str, kind: &str, n: f64) {
        self.wait_until(Duration::from_secs(20), |d| {
            d.metrics().get("riskbound_files_ingested_total", &[("model", model), ("kind", kind)]) >= Some(n)
        });
    }

    /// The log so far.
    pub fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// Peak resident memory of the daemon, in KiB (VmHWM).
    pub fn peak_rss_kib(&self) -> u64 {
        let status = std::fs::read_to_string(format!("/proc/{}/status", self.child.id())).unwrap();
        status
            .lines()
            .find(|l| l.starts_with("VmHWM"))
            .and_then(|l| l.split_whitespace().nth(1))
            .unwrap()
            .parse()
            .unwrap()
    }

    pub fn kill9(mut self) {
        self.child.kill().unwrap();
        self.child.wait().unwrap();
    }

    /// SIGTERM, then waits for a clean exit.
    pub fn terminate(mut self) -> std::process::ExitStatus {
        let pid = self.child.id().to_string();
        Command::new("kill").args(["-TERM", &pid]).status().unwrap();
        self.child.wait().unwrap()
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A minimal HTTP/1.1 request over a fresh connection.
pub fn http(port: u16, method: &str, path: &str) -> std::io::Result<(u16, String)> {
    let mut s = TcpStream::connect(("127.0.0.1", port))?;
    s.set_read_timeout(Some(Duration::from_secs(10)))?;
    write!(s, "{method} {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n")?;
    let mut buf = Vec::new();
    s.read_to_end(&mut buf)?;
    let text = String::from_utf8_lossy(&buf).into_owned();
    let status: u16 = text.split_whitespace().nth(1).and_then(|c| c.parse().ok()).unwrap_or(0);
    let body = text.split_once("\r\n\r\n").map(|(_, b)| b.to_string()).unwrap_or_default();
    // Undo chunked transfer encoding if the server used it.
    let body = if text.to_ascii_lowercase().contains("transfer-encoding: chunked") { dechunk(&body) } else { body };
    Ok((status, body))
}

fn dechunk(mut s: &str) -> String {
    let mut out = String::new();
    while let Some((size, rest)) = s.split_once("\r\n") {
        let n = usize::from_str_radix(size.trim(), 16).unwrap_or(0);
        if n == 0 {
            break;
        }
        out.push_str(&rest[..n]);
        s = &rest[n + 2..];
    }
    out
}

/// Parsed exposition: series (name plus sorted labels) → value.
pub struct Metrics(pub BTreeMap<(String, BTreeMap<String, String>), f64>);

impl Metrics {
    pub fn parse(text: &str) -> Metrics {
        let mut m = BTreeMap::new();
        for line in text.lines().filter(|l| !l.starts_with('#') && !l.is_empty()) {
            let (series, value) = line.rsplit_once(' ').unwrap();
            let (name, labels) = match series.split_once('{') {
                Some((n, rest)) => (n.to_string(), rest.trim_end_matches('}')),
                None => (series.to_string(), ""),
            };
            let mut ls = BTreeMap::new();
            for part in labels.split("\",").filter(|p| !p.is_empty()) {
                let (k, v) = part.split_once("=\"").unwrap();
                ls.insert(k.to_string(), v.trim_end_matches('"').to_string());
            }
            let v = match value {
                "+Inf" => f64::INFINITY,
                "-Inf" => f64::NEG_INFINITY,
                v => v.parse().unwrap(),
            };
            m.insert((name, ls), v);
        }
        Metrics(m)
    }

    /// The value of the one series with exactly these labels.
    pub fn get(&self, name: &str, labels: &[(&str, &str)]) -> Option<f64> {
        let want: BTreeMap<String, String> = labels.iter().map(|(k, v)| (k.to_string(), v.to_string())).collect();
        self.0.get(&(name.to_string(), want)).copied()
    }
}

/// The `numbers` section of a `riskbound report` page: what a replay must write again.
pub fn report_numbers(html: &str) -> &str {
    let start = html.find("<section id=\"numbers\">").expect("a numbers section");
    let end = html[start..].find("</section>").expect("the section ends") + start;
    &html[start..end]
}
