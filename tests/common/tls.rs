//! TLS helpers: a self-signed identity for the daemon and a client pinned to one protocol version.

use std::io::{Read, Write};
use std::net::TcpStream;
use std::sync::Arc;

use tokio_rustls::rustls;

use super::TempDir;

/// Writes `cert.pem` and `key.pem` (self-signed for 127.0.0.1) into `dir`.
pub fn identity(dir: &TempDir) -> rcgen::CertifiedKey<rcgen::KeyPair> {
    let ck = rcgen::generate_simple_self_signed(vec!["127.0.0.1".to_string()]).unwrap();
    std::fs::write(dir.path("cert.pem"), ck.cert.pem()).unwrap();
    std::fs::write(dir.path("key.pem"), ck.signing_key.serialize_pem()).unwrap();
    ck
}

/// A GET over TLS with only `version` offered; Err when the handshake fails.
pub fn get(
    port: u16,
    cert: &rcgen::CertifiedKey<rcgen::KeyPair>,
    version: &'static rustls::SupportedProtocolVersion,
    path: &str,
    auth: Option<&str>,
) -> Result<String, String> {
    let mut roots = rustls::RootCertStore::empty();
    roots.add(cert.cert.der().clone()).unwrap();
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let config = rustls::ClientConfig::builder_with_provider(provider)
        .with_protocol_versions(&[version])
        .unwrap()
        .with_root_certificates(roots)
        .with_no_client_auth();
    let name = rustls::pki_types::ServerName::try_from("127.0.0.1").unwrap();
    let mut conn = rustls::ClientConnection::new(Arc::new(config), name).unwrap();
    let mut sock = TcpStream::connect(("127.0.0.1", port)).unwrap();
    let mut tls = rustls::Stream::new(&mut conn, &mut sock);
    let header = auth.map(|a| format!("Authorization: Basic {a}\r\n")).unwrap_or_default();
    write!(tls, "GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n{header}Connection: close\r\n\r\n")
        .map_err(|e| e.to_string())?;
    let mut out = String::new();
    match tls.read_to_string(&mut out) {
        Ok(_) => Ok(out),
        // The server closes without close_notify after the response; what was read counts.
        Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof && !out.is_empty() => Ok(out),
        Err(e) => Err(e.to_string()),
    }
}
