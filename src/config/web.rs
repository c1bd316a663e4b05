//! The web configuration file of the HTTP surface, in the convention Prometheus's own exporters
//! use (`--web-config FILE`): optional TLS and basic auth with bcrypt-hashed passwords.
//!
//! ```yaml
//! tls_server_config:
//!   cert_file: server.crt     # PEM chain, leaf first; relative to this file's folder
//!   key_file: server.key      # PEM private key (PKCS#8, PKCS#1 or SEC1)
//!   min_version: TLS12        # TLS12 (default) or TLS13; nothing older is offered
//! basic_auth_users:
//!   prometheus: $2y$12$...    # bcrypt hash (riskbound hash-password prints one)
//! ```
//!
//! Parsed into raw types with locations, then validated into [`WebConfig`]: certificates and
//! keys are loaded and checked at start-up, so a bad file stops the daemon before it binds.

use std::collections::{BTreeMap, HashSet};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use base64::Engine;
use rustls_pki_types::pem::PemObject;
use rustls_pki_types::{CertificateDer, PrivateKeyDer};
use serde::Deserialize;
use serde_saphyr::Spanned;
use sha2::{Digest, Sha256};
use tokio_rustls::rustls;

use super::{parse_issue, ConfigError, ConfigIssue};

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawWeb {
    tls_server_config: Option<Spanned<RawTls>>,
    basic_auth_users: Option<Spanned<BTreeMap<String, Spanned<String>>>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTls {
    cert_file: Spanned<String>,
    key_file: Spanned<String>,
    min_version: Option<Spanned<String>>,
}

/// The validated web configuration.
#[derive(Clone)]
pub struct WebConfig {
    /// `None`: plain HTTP.
    pub tls: Option<Arc<rustls::ServerConfig>>,
    /// User name → bcrypt hash. Empty: no authentication.
    pub users: Arc<BTreeMap<String, String>>,
    /// (user, SHA-256 of the password) pairs already verified: bcrypt is slow on purpose, and a
    /// scraper sends the same credentials every few seconds.
    verified: Arc<Mutex<HashSet<Verified>>>,
}

/// A user name and the SHA-256 of a password that bcrypt accepted for it.
type Verified = (String, [u8; 32]);

impl std::fmt::Debug for WebConfig {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("WebConfig").field("tls", &self.tls.is_some()).field("users", &self.users.keys()).finish()
    }
}

impl WebConfig {
    /// Plain HTTP, no authentication.
    pub fn plain() -> WebConfig {
        WebConfig { tls: None, users: Arc::default(), verified: Arc::default() }
    }

    /// True when `authorization` (the header's value) names a configured user and password.
    pub fn check(&self, authorization: Option<&str>) -> bool {
        if self.users.is_empty() {
            return true;
        }
        let Some(encoded) = authorization.and_then(|a| a.strip_prefix("Basic ")) else { return false };
        let Ok(decoded) = base64::engine::general_purpose::STANDARD.decode(encoded.trim()) else { return false };
        let Ok(text) = String::from_utf8(decoded) else { return false };
        let Some((user, password)) = text.split_once(':') else { return false };
        let Some(hash) = self.users.get(user) else {
            return false;
        };
        let key = (user.to_string(), Sha256::digest(password.as_bytes()).into());
        if self.verified.lock().map(|v| v.contains(&key)).unwrap_or(false) {
            return true;
        }
        let ok = bcrypt::verify(password, hash).unwrap_or(false);
        if ok {
            if let Ok(mut v) = self.verified.lock() {
                v.insert(key);
            }
        }
        ok
    }
}

fn issue<T>(at: &Spanned<T>, key: &str, reason: impl std::fmt::Display) -> ConfigIssue {
    ConfigIssue {
        line: at.referenced.line(),
        column: at.referenced.column(),
        key: key.to_string(),
        reason: reason.to_string(),
    }
}

/// Reads and validates the web configuration file.
pub fn load(path: &Path) -> Result<WebConfig, ConfigError> {
    let file = path.display().to_string();
    let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
        file: file.clone(),
        issues: vec![ConfigIssue { line: 1, column: 1, key: "(file)".into(), reason: format!("cannot read: {e}") }],
    })?;
    let raw: RawWeb =
        serde_saphyr::from_str(&text).map_err(|e| ConfigError { file: file.clone(), issues: vec![parse_issue(&e)] })?;
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let resolve = |s: &str| -> PathBuf {
        let p = Path::new(s);
        if p.is_absolute() || base.as_os_str().is_empty() {
            p.to_path_buf()
        } else {
            base.join(p)
        }
    };
    let mut issues = Vec::new();
    let mut users = BTreeMap::new();
    if let Some(u) = &raw.basic_auth_users {
        for (name, hash) in &u.value {
            if name.is_empty() || name.contains(':') {
                issues.push(issue(
                    hash,
                    "basic_auth_users",
                    format!("user name {name:?} must be non-empty and hold no ':'"),
                ));
            } else if hash.value.parse::<bcrypt::HashParts>().is_err() {
                issues.push(issue(
                    hash,
                    &format!("basic_auth_users.{name}"),
                    "not a bcrypt hash (riskbound hash-password prints one)",
                ));
            } else {
                users.insert(name.clone(), hash.value.clone());
            }
        }
    }
    let mut tls = None;
    if let Some(t) = &raw.tls_server_config {
        let t = &t.value;
        let versions: &[&rustls::SupportedProtocolVersion] = match t.min_version.as_ref().map(|v| v.value.as_str()) {
            None | Some("TLS12") => &[&rustls::version::TLS13, &rustls::version::TLS12],
            Some("TLS13") => &[&rustls::version::TLS13],
            Some(other) => {
                let at = t.min_version.as_ref().expect("matched Some");
                issues.push(issue(
                    at,
                    "tls_server_config.min_version",
                    format!("{other:?}: only TLS12 and TLS13 are offered"),
                ));
                &[&rustls::version::TLS13]
            }
        };
        let certs: Result<Vec<CertificateDer<'static>>, _> =
            CertificateDer::pem_file_iter(resolve(&t.cert_file.value)).and_then(|it| it.collect());
        let certs = match certs {
            Ok(c) if !c.is_empty() => Some(c),
            Ok(_) => {
                issues.push(issue(&t.cert_file, "tls_server_config.cert_file", "no PEM certificate in the file"));
                None
            }
            Err(e) => {
                issues.push(issue(
                    &t.cert_file,
                    "tls_server_config.cert_file",
                    format!("cannot read a PEM certificate: {e}"),
                ));
                None
            }
        };
        let key = match PrivateKeyDer::from_pem_file(resolve(&t.key_file.value)) {
            Ok(k) => Some(k),
            Err(e) => {
                issues.push(issue(
                    &t.key_file,
                    "tls_server_config.key_file",
                    format!("cannot read a PEM private key: {e}"),
                ));
                None
            }
        };
        if let (Some(certs), Some(key)) = (certs, key) {
            let provider = Arc::new(rustls::crypto::ring::default_provider());
            let built = rustls::ServerConfig::builder_with_provider(provider)
                .with_protocol_versions(versions)
                .map_err(|e| e.to_string())
                .and_then(|b| b.with_no_client_auth().with_single_cert(certs, key).map_err(|e| e.to_string()));
            match built {
                Ok(mut c) => {
                    c.alpn_protocols = vec![b"http/1.1".to_vec()];
                    tls = Some(Arc::new(c));
                }
                Err(e) => issues.push(issue(
                    &t.key_file,
                    "tls_server_config",
                    format!("certificate and key do not form a TLS identity: {e}"),
                )),
            }
        }
    }
    if !issues.is_empty() {
        issues.sort_by_key(|p| (p.line, p.column));
        return Err(ConfigError { file, issues });
    }
    Ok(WebConfig { tls, users: Arc::new(users), verified: Arc::default() })
}
