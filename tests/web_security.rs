//! TLS and basic auth on the HTTP surface, with the real binary: certificates made here with
//! rcgen, clients from rustls with their protocol versions pinned, so that what is refused is
//! refused by the server. (A real Prometheus scraping over TLS with basic auth is in
//! tests/prometheus_e2e.py --secure.)

mod common;

use std::io::Write;
use std::process::Command;

use common::tls::{get, identity};
use common::{bin, free_port, simple_config, Daemon, TempDir};
use tokio_rustls::rustls;

fn hash(password: &str) -> String {
    let mut child = Command::new(bin())
        .args(["hash-password", "--cost", "4"])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    writeln!(child.stdin.take().unwrap(), "{password}").unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success());
    String::from_utf8(out.stdout).unwrap().trim().to_string()
}

fn basic(user: &str, password: &str) -> String {
    use base64::Engine;
    base64::engine::general_purpose::STANDARD.encode(format!("{user}:{password}"))
}

fn start(dir: &TempDir, port: u16, web: &str) -> Daemon {
    std::fs::write(dir.path("web.yaml"), web).unwrap();
    let cfg = simple_config(dir, port, "", "m", "", "[{ name: all, last: 100 }]");
    Daemon::start_with(&cfg, port, &["--web-config", dir.path("web.yaml").to_str().unwrap()])
}

#[test]
fn tls_with_basic_auth() {
    let dir = TempDir::new("web-auth");
    let cert = identity(&dir);
    let port = free_port();
    let web = format!(
        "tls_server_config: {{ cert_file: cert.pem, key_file: key.pem }}\nbasic_auth_users:\n  scraper: \"{}\"\n",
        hash("right horse")
    );
    let _d = start(&dir, port, &web);
    let v12 = &rustls::version::TLS12;
    let ok = get(port, &cert, v12, "/metrics", Some(&basic("scraper", "right horse"))).unwrap();
    assert!(ok.starts_with("HTTP/1.1 200") && ok.contains("riskbound_build_info"), "{ok}");
    let ok13 = get(port, &cert, &rustls::version::TLS13, "/metrics", Some(&basic("scraper", "right horse"))).unwrap();
    assert!(ok13.starts_with("HTTP/1.1 200"));
    for auth in [Some(basic("scraper", "wrong horse")), Some(basic("other", "right horse")), Some("%%%".into()), None] {
        let r = get(port, &cert, v12, "/metrics", auth.as_deref()).unwrap();
        assert!(r.starts_with("HTTP/1.1 401"), "{auth:?}: {r}");
        assert!(r.to_ascii_lowercase().contains("www-authenticate: basic realm=\"riskbound\""), "{r}");
    }
    // The status page is behind the same credentials and TLS.
    let page = get(port, &cert, v12, "/", Some(&basic("scraper", "right horse"))).unwrap();
    assert!(page.starts_with("HTTP/1.1 200") && page.contains("riskbound status"), "{page}");
    assert!(page.to_ascii_lowercase().contains("content-security-policy: default-src 'none'"), "{page}");
    assert!(get(port, &cert, v12, "/", None).unwrap().starts_with("HTTP/1.1 401"));
    // Probes need no secret.
    assert!(get(port, &cert, v12, "/healthz", None).unwrap().starts_with("HTTP/1.1 200"));
    assert!(get(port, &cert, v12, "/readyz", None).unwrap().starts_with("HTTP/1.1 200"));
    // Plain HTTP to the TLS port gets no response.
    assert!(common::http(port, "GET", "/metrics").map(|(s, _)| s != 200).unwrap_or(true));
}

#[test]
fn min_version_tls13_refuses_a_tls12_client() {
    let dir = TempDir::new("web-tls13");
    let cert = identity(&dir);
    let port = free_port();
    let _d = start(&dir, port, "tls_server_config: { cert_file: cert.pem, key_file: key.pem, min_version: TLS13 }\n");
    let e = get(port, &cert, &rustls::version::TLS12, "/metrics", None).unwrap_err();
    assert!(e.to_lowercase().contains("alert") || e.to_lowercase().contains("protocol"), "{e}");
    assert!(get(port, &cert, &rustls::version::TLS13, "/metrics", None).unwrap().starts_with("HTTP/1.1 200"));
}

#[test]
fn bad_web_configs_stop_the_daemon_with_a_located_error() {
    let dir = TempDir::new("web-bad");
    identity(&dir);
    let cfg = simple_config(&dir, free_port(), "", "m", "", "[{ name: all, last: 100 }]");
    for (web, line, key) in [
        (
            "tls_server_config: { cert_file: cert.pem, key_file: key.pem, min_version: TLS11 }\n",
            1,
            "tls_server_config.min_version",
        ),
        ("tls_server_config: { cert_file: nope.pem, key_file: key.pem }\n", 1, "tls_server_config.cert_file"),
        ("tls_server_config: { cert_file: cert.pem, key_file: cert.pem }\n", 1, "tls_server_config.key_file"),
        ("basic_auth_users:\n  alice: plaintext\n", 2, "basic_auth_users.alice"),
        ("basic_auth_user:\n  alice: x\n", 1, "basic_auth_user"),
    ] {
        std::fs::write(dir.path("web.yaml"), web).unwrap();
        let out = Command::new("timeout")
            .args([
                "5",
                bin(),
                "run",
                "--config",
                cfg.to_str().unwrap(),
                "--web-config",
                dir.path("web.yaml").to_str().unwrap(),
            ])
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{web}: {err}");
        let want = format!("{}:{line}:", dir.path("web.yaml").display());
        assert!(err.contains(&want) && err.contains(&format!(": {key}: ")), "{web}: {err}");
        // check-config validates the web config with the config, and says the same.
        let checked = Command::new(bin())
            .args(["check-config", cfg.to_str().unwrap(), "--web-config", dir.path("web.yaml").to_str().unwrap()])
            .output()
            .unwrap();
        assert_eq!(checked.status.code(), Some(2), "{web}");
        assert_eq!(String::from_utf8_lossy(&checked.stderr), err, "{web}");
    }
    std::fs::write(dir.path("web.yaml"), "tls_server_config: { cert_file: cert.pem, key_file: key.pem }\n").unwrap();
    let ok = Command::new(bin())
        .args(["check-config", cfg.to_str().unwrap(), "--web-config", dir.path("web.yaml").to_str().unwrap()])
        .output()
        .unwrap();
    assert!(ok.status.success(), "{}", String::from_utf8_lossy(&ok.stderr));
    assert!(String::from_utf8_lossy(&ok.stdout).contains("web: TLS, basic auth off"));
}
