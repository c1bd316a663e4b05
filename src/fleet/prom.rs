//! A client of the Prometheus HTTP API's instant query (`GET /api/v1/query`), the one call the
//! fleet view makes. The same API is served by Prometheus-compatible horizontally scaled stores,
//! so the fleet view reads from whatever the metrics stack runs. Plain HTTP or TLS (rustls, the
//! platform's roots or a CA file), with optional basic auth. One connection per query: a few
//! queries every interval do not need pooling, and a fresh connection never holds a stale one.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use axum::http::{header, Request, StatusCode, Uri};
use http_body_util::{BodyExt, Empty, Limited};
use hyper::body::Bytes;
use rustls_pki_types::pem::PemObject;
use rustls_pki_types::{CertificateDer, ServerName};
use tokio_rustls::rustls;

/// The largest answer read: a fleet of thousands of replicas' per-window series is a few MiB.
const MAX_ANSWER_BYTES: usize = 64 << 20;

/// One sample of an instant vector: its labels (the metric name under `__name__`) and value.
#[derive(Clone, Debug, PartialEq)]
pub struct Sample {
    pub labels: BTreeMap<String, String>,
    pub value: f64,
}

impl Sample {
    /// A label's value, or "" when absent (as PromQL treats a missing label).
    pub fn label(&self, name: &str) -> &str {
        self.labels.get(name).map_or("", String::as_str)
    }
}

/// Why a query gave no answer. Every variant names what to fix.
#[derive(Debug, thiserror::Error)]
pub enum PromError {
    #[error("--prometheus {url:?}: {reason}")]
    Url { url: String, reason: String },
    #[error("reading {path}: {reason}")]
    File { path: PathBuf, reason: String },
    #[error("TLS setup: {0}")]
    TlsSetup(String),
    // The I/O error is in the message, not a cause: the chain would print it twice.
    #[error("connecting to Prometheus at {addr}: {error}")]
    Connect { addr: String, error: std::io::Error },
    #[error("TLS handshake with Prometheus at {addr}: {error}")]
    Tls { addr: String, error: std::io::Error },
    #[error("no answer from Prometheus at {addr} within {timeout:?}")]
    Timeout { addr: String, timeout: Duration },
    #[error("HTTP exchange with Prometheus at {addr}: {reason}")]
    Http { addr: String, reason: String },
    #[error("Prometheus answered {status} to the query {query:?}{hint}: {body}")]
    Status { status: StatusCode, query: String, hint: &'static str, body: String },
    #[error("Prometheus rejected the query {query:?}: {error_type}: {error}")]
    Api { query: String, error_type: String, error: String },
    #[error("malformed answer from Prometheus to the query {query:?}: {reason}")]
    Malformed { query: String, reason: String },
}

/// Basic-auth credentials toward Prometheus.
#[derive(Clone)]
pub struct BasicAuth {
    pub user: String,
    pub password: String,
}

impl std::fmt::Debug for BasicAuth {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("BasicAuth").field("user", &self.user).field("password", &"<hidden>").finish()
    }
}

impl BasicAuth {
    /// The user and the password read from a file (its first line; a password never goes on a
    /// command line, where every process of the host can read it).
    pub fn from_file(user: String, password_file: &Path) -> Result<BasicAuth, PromError> {
        let text = std::fs::read_to_string(password_file)
            .map_err(|e| PromError::File { path: password_file.to_path_buf(), reason: e.to_string() })?;
        let password = text.lines().next().unwrap_or("").to_string();
        if password.is_empty() {
            return Err(PromError::File {
                path: password_file.to_path_buf(),
                reason: "the first line is empty".into(),
            });
        }
        Ok(BasicAuth { user, password })
    }
}

/// Where and how to reach Prometheus.
#[derive(Clone)]
pub struct Client {
    https: bool,
    host: String,
    port: u16,
    /// The path prefix before /api/v1 (a Prometheus served under a route prefix), without a
    /// trailing slash.
    prefix: String,
    authorization: Option<String>,
    tls: Option<tokio_rustls::TlsConnector>,
    timeout: Duration,
}

/// Percent-encodes a query-string value (RFC 3986 unreserved characters pass).
fn encode(s: &str) -> String {
    let mut out = String::with_capacity(s.len() * 3);
    for b in s.bytes() {
        if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'.' | b'_' | b'~') {
            out.push(b as char);
        } else {
            out.push_str(&format!("%{b:02X}"));
        }
    }
    out
}

impl Client {
    /// A client of the Prometheus at `url` (`http://host:port` or `https://host:port`, with an
    /// optional path prefix). With https, the server's certificate is checked against `ca_file`
    /// when given, else against the platform's trusted roots.
    pub fn new(
        url: &str,
        auth: Option<BasicAuth>,
        ca_file: Option<&Path>,
        timeout: Duration,
    ) -> Result<Client, PromError> {
        let bad = |reason: &str| PromError::Url { url: url.to_string(), reason: reason.to_string() };
        let uri: Uri = url.parse().map_err(|e: axum::http::uri::InvalidUri| bad(&e.to_string()))?;
        let https = match uri.scheme_str() {
            Some("http") => false,
            Some("https") => true,
            Some(_) => return Err(bad("the scheme must be http or https")),
            None => return Err(bad("give the scheme: http://host:port or https://host:port")),
        };
        let host = uri.host().ok_or_else(|| bad("no host"))?.trim_matches(['[', ']']).to_string();
        if uri.query().is_some() {
            return Err(bad("no query string: the fleet view adds its own"));
        }
        let port = uri.port_u16().unwrap_or(if https { 443 } else { 80 });
        let prefix = uri.path().trim_end_matches('/').to_string();
        if ca_file.is_some() && !https {
            return Err(bad("a CA file is given but the URL is http"));
        }
        let tls = if https { Some(connector(ca_file)?) } else { None };
        let authorization = auth.map(|a| {
            use base64::Engine;
            let token = base64::engine::general_purpose::STANDARD.encode(format!("{}:{}", a.user, a.password));
            format!("Basic {token}")
        });
        Ok(Client { https, host, port, prefix, authorization, tls, timeout })
    }

    fn addr(&self) -> String {
        let host = if self.host.contains(':') { format!("[{}]", self.host) } else { self.host.clone() };
        format!("{}://{}:{}", if self.https { "https" } else { "http" }, host, self.port)
    }

    /// Evaluates `query` at unix time `time` (seconds) and returns its instant vector.
    pub async fn query(&self, query: &str, time: f64) -> Result<Vec<Sample>, PromError> {
        let addr = self.addr();
        let within = tokio::time::timeout(self.timeout, self.exchange(query, time));
        let (status, body) =
            within.await.map_err(|_| PromError::Timeout { addr: addr.clone(), timeout: self.timeout })??;
        parse_answer(query, status, &body)
    }

    async fn exchange(&self, query: &str, time: f64) -> Result<(StatusCode, Bytes), PromError> {
        let addr = self.addr();
        let tcp = tokio::net::TcpStream::connect((self.host.as_str(), self.port))
            .await
            .map_err(|error| PromError::Connect { addr: addr.clone(), error })?;
        let path = format!("{}/api/v1/query?query={}&time={:.3}", self.prefix, encode(query), time);
        match &self.tls {
            None => self.send(hyper_util::rt::TokioIo::new(tcp), &path, &addr).await,
            Some(tls) => {
                let name = ServerName::try_from(self.host.clone())
                    .map_err(|e| PromError::Url { url: addr.clone(), reason: format!("not a TLS server name: {e}") })?;
                let stream =
                    tls.connect(name, tcp).await.map_err(|error| PromError::Tls { addr: addr.clone(), error })?;
                self.send(hyper_util::rt::TokioIo::new(stream), &path, &addr).await
            }
        }
    }

    async fn send<IO>(&self, io: IO, path: &str, addr: &str) -> Result<(StatusCode, Bytes), PromError>
    where
        IO: hyper::rt::Read + hyper::rt::Write + Unpin + Send + 'static,
    {
        let http = |e: &dyn std::fmt::Display| PromError::Http { addr: addr.to_string(), reason: e.to_string() };
        let (mut sender, conn) = hyper::client::conn::http1::handshake(io).await.map_err(|e| http(&e))?;
        let driver = tokio::spawn(conn);
        let host = if self.host.contains(':') {
            format!("[{}]:{}", self.host, self.port)
        } else {
            format!("{}:{}", self.host, self.port)
        };
        let mut req = Request::get(path)
            .header(header::HOST, host)
            .header(header::ACCEPT, "application/json")
            .header(header::USER_AGENT, concat!("riskbound/", env!("CARGO_PKG_VERSION")));
        if let Some(a) = &self.authorization {
            req = req.header(header::AUTHORIZATION, a);
        }
        let req = req.body(Empty::<Bytes>::new()).map_err(|e| http(&e))?;
        let resp = sender.send_request(req).await.map_err(|e| http(&e))?;
        let status = resp.status();
        let body = Limited::new(resp.into_body(), MAX_ANSWER_BYTES)
            .collect()
            .await
            .map_err(|e| http(&format!("reading the answer: {e}")))?
            .to_bytes();
        driver.abort();
        Ok((status, body))
    }
}

/// The TLS connector: the CA file's certificates, or the platform's roots.
fn connector(ca_file: Option<&Path>) -> Result<tokio_rustls::TlsConnector, PromError> {
    let mut roots = rustls::RootCertStore::empty();
    match ca_file {
        Some(path) => {
            let certs: Vec<CertificateDer<'static>> =
                CertificateDer::pem_file_iter(path).and_then(|it| it.collect()).map_err(|e| PromError::File {
                    path: path.to_path_buf(),
                    reason: format!("not PEM certificates: {e}"),
                })?;
            if certs.is_empty() {
                return Err(PromError::File { path: path.to_path_buf(), reason: "no certificate in it".into() });
            }
            for c in certs {
                roots.add(c).map_err(|e| PromError::File {
                    path: path.to_path_buf(),
                    reason: format!("a bad certificate: {e}"),
                })?;
            }
        }
        None => {
            let found = rustls_native_certs::load_native_certs();
            let (added, _) = roots.add_parsable_certificates(found.certs);
            if added == 0 {
                return Err(PromError::TlsSetup(
                    "no trusted root certificate found on this host: give --prometheus-ca-file".into(),
                ));
            }
        }
    }
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let config = rustls::ClientConfig::builder_with_provider(provider)
        .with_protocol_versions(&[&rustls::version::TLS13, &rustls::version::TLS12])
        .map_err(|e| PromError::TlsSetup(e.to_string()))?
        .with_root_certificates(roots)
        .with_no_client_auth();
    Ok(tokio_rustls::TlsConnector::from(Arc::new(config)))
}

/// The instant vector of an answer, or the error it states. Pure, for the tests.
pub fn parse_answer(query: &str, status: StatusCode, body: &[u8]) -> Result<Vec<Sample>, PromError> {
    let malformed = |reason: String| PromError::Malformed { query: query.to_string(), reason };
    let json: Result<serde_json::Value, _> = serde_json::from_slice(body);
    if !status.is_success() {
        // Prometheus states its errors in JSON; proxies in front of it often do not.
        let said = json.as_ref().ok().and_then(|j| j.get("error")).and_then(|e| e.as_str()).map(str::to_string);
        let body = said.unwrap_or_else(|| {
            let text = String::from_utf8_lossy(body);
            let text = text.trim();
            if text.chars().count() > 200 {
                format!("{}…", text.chars().take(200).collect::<String>())
            } else {
                text.to_string()
            }
        });
        let hint = match status {
            StatusCode::UNAUTHORIZED | StatusCode::FORBIDDEN => " (check the basic-auth user and password file)",
            StatusCode::NOT_FOUND => " (is the URL Prometheus's, with its route prefix?)",
            _ => "",
        };
        return Err(PromError::Status { status, query: query.to_string(), hint, body });
    }
    let json = json.map_err(|e| malformed(format!("not JSON: {e}")))?;
    match json.get("status").and_then(|s| s.as_str()) {
        Some("success") => {}
        Some("error") => {
            let s = |k: &str| json.get(k).and_then(|v| v.as_str()).unwrap_or("").to_string();
            return Err(PromError::Api { query: query.to_string(), error_type: s("errorType"), error: s("error") });
        }
        _ => return Err(malformed("no \"status\": \"success\"".into())),
    }
    let data = json.get("data").ok_or_else(|| malformed("no \"data\"".into()))?;
    match data.get("resultType").and_then(|t| t.as_str()) {
        Some("vector") => {}
        Some(t) => return Err(malformed(format!("resultType {t:?}, not an instant vector"))),
        None => return Err(malformed("no \"data.resultType\"".into())),
    }
    let result =
        data.get("result").and_then(|r| r.as_array()).ok_or_else(|| malformed("no \"data.result\" list".into()))?;
    let mut out = Vec::with_capacity(result.len());
    for (i, r) in result.iter().enumerate() {
        let metric = r
            .get("metric")
            .and_then(|m| m.as_object())
            .ok_or_else(|| malformed(format!("result {i}: no \"metric\" object")))?;
        let mut labels = BTreeMap::new();
        for (k, v) in metric {
            let v = v.as_str().ok_or_else(|| malformed(format!("result {i}: label {k:?} is not a string")))?;
            labels.insert(k.clone(), v.to_string());
        }
        let value = r
            .get("value")
            .and_then(|v| v.as_array())
            .filter(|v| v.len() == 2)
            .and_then(|v| v[1].as_str())
            .ok_or_else(|| malformed(format!("result {i}: \"value\" is not [time, \"number\"]")))?;
        // Prometheus writes NaN, +Inf and -Inf in these words; Rust parses them too.
        let value: f64 =
            value.parse().map_err(|_| malformed(format!("result {i}: value {value:?} is not a number")))?;
        out.push(Sample { labels, value });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn answers_parse_and_errors_say_what_went_wrong() {
        let ok = br#"{"status":"success","data":{"resultType":"vector","result":[
            {"metric":{"__name__":"up","job":"riskbound","instance":"a:1"},"value":[1790000000.5,"1"]},
            {"metric":{"job":"x"},"value":[1790000000.5,"NaN"]}]}}"#;
        let v = parse_answer("up", StatusCode::OK, ok).unwrap();
        assert_eq!(v.len(), 2);
        assert_eq!((v[0].label("instance"), v[0].value), ("a:1", 1.0));
        assert!(v[1].value.is_nan() && v[1].label("instance").is_empty());

        let e = |status, body: &[u8]| parse_answer("q", status, body).unwrap_err().to_string();
        let bad_query = br#"{"status":"error","errorType":"bad_data","error":"parse error at char 3"}"#;
        assert_eq!(
            e(StatusCode::BAD_REQUEST, bad_query),
            "Prometheus answered 400 Bad Request to the query \"q\": parse error at char 3"
        );
        assert!(e(StatusCode::UNAUTHORIZED, b"Unauthorized\n")
            .contains("401 Unauthorized to the query \"q\" (check the basic-auth"));
        assert!(e(StatusCode::BAD_GATEWAY, b"<html>upstream down</html>").ends_with(": <html>upstream down</html>"));
        assert!(e(StatusCode::OK, b"<html>").contains("malformed answer from Prometheus to the query \"q\": not JSON"));
        assert!(e(StatusCode::OK, br#"{"status":"success","data":{"resultType":"matrix","result":[]}}"#)
            .ends_with("resultType \"matrix\", not an instant vector"));
        assert!(e(
            StatusCode::OK,
            br#"{"status":"success","data":{"resultType":"vector","result":[{"metric":{},"value":[1,"x"]}]}}"#
        )
        .ends_with("result 0: value \"x\" is not a number"));
        assert!(e(
            StatusCode::OK,
            br#"{"status":"success","data":{"resultType":"vector","result":[{"metric":{},"value":1}]}}"#
        )
        .ends_with("result 0: \"value\" is not [time, \"number\"]"));
        assert_eq!(
            e(StatusCode::OK, bad_query),
            "Prometheus rejected the query \"q\": bad_data: parse error at char 3"
        );
    }

    #[test]
    fn urls_are_checked_and_queries_encoded() {
        let c = |u: &str| Client::new(u, None, None, Duration::from_secs(1));
        assert!(c("http://127.0.0.1:9090").is_ok());
        let p = c("http://prom.example:9090/prom/").unwrap();
        assert_eq!((p.host.as_str(), p.port, p.prefix.as_str()), ("prom.example", 9090, "/prom"));
        for (u, why) in
            [("127.0.0.1:9090", "scheme"), ("ftp://h:1", "http or https"), ("http://h:1/?x=1", "no query string")]
        {
            let e = c(u).err().unwrap().to_string();
            assert!(e.contains(why), "{u}: {e}");
        }
        assert_eq!(encode("up{job=\"a b\"}"), "up%7Bjob%3D%22a%20b%22%7D");
    }
}
