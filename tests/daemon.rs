//! The daemon end to end: the real binary on a temporary folder and port, batch files dropped
//! as a producer would, /metrics scraped and every number checked against values from outside
//! the daemon (scipy's Clopper-Pearson values in the reference fixture, the bounds library on
//! losses this test computes itself from the files it wrote).

mod common;

use common::{fixture_cp, Daemon, Metrics, TempDir};
use riskbound::estimate::{self, Confidence, LossSummary, Method};

const T: i64 = 1_790_000_000;

fn config(dir: &TempDir, port: u16) -> std::path::PathBuf {
    let text = format!(
        "listen: \"127.0.0.1:{port}\"
state_dir: state
rescan_interval: 200ms
models:
  - name: courier
    predictions: {{ dir: in, pattern: \"pred-*.csv\", columns: {{ id: request_id, time: ts, prediction: predicted }} }}
    labels: {{ dir: in, pattern: \"label-*.csv\", columns: {{ id: request_id, time: observed, label: outcome }} }}
    confidence: 0.95
    label_wait: 1d
    windows:
      - {{ name: all, last: 1000 }}
      - {{ name: recent, last: 50 }}
      - {{ name: tail, span: 5m }}
    sla: {{ max_risk: 0.10, min_samples: 30 }}
"
    );
    let p = dir.path("riskbound.yaml");
    std::fs::write(&p, text).unwrap();
    p
}

/// 100 predictions, 10 s apart; the ones listed in `wrong` get a different label.
fn batches(wrong: &[usize]) -> (String, String) {
    let mut pred = String::from("request_id,ts,region,predicted\n");
    let mut label = String::from("request_id,observed,outcome\n");
    for i in 0..100 {
        let p = if i % 3 == 0 { "late" } else { "on-time" };
        let y = if wrong.contains(&i) {
            if p == "late" {
                "on-time"
            } else {
                "late"
            }
        } else {
            p
        };
        pred += &format!("r{i:03},{},north,{p}\n", T + 10 * i as i64);
        label += &format!("r{i:03},{},{y}\n", T + 86_000 / 2 + i as i64);
    }
    (pred, label)
}

/// 12 errors in 100 rows (the fixture has scipy's bounds for k = 12, n = 100).
const WRONG: [usize; 12] = [3, 8, 15, 22, 41, 47, 56, 60, 71, 77, 85, 98];

fn library(losses: &[f64], m: Method) -> estimate::Bounds {
    let mut s = LossSummary::keeping_losses(1.0);
    for &l in losses {
        s.push(l);
    }
    estimate::bounds(m, &s, Confidence::new(0.95).unwrap()).unwrap()
}

fn window(w: &str) -> [(&str, &str); 2] {
    [("model", "courier"), ("window", w)]
}

fn with_method<'a>(w: &'a str, m: &'a str) -> [(&'a str, &'a str); 4] {
    [("model", "courier"), ("window", w), ("method", m), ("guarantee", "per-window")]
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * b.abs().max(1e-12)
}

fn check_reference_numbers(m: &Metrics) {
    let losses: Vec<f64> = (0..100).map(|i| f64::from(u8::from(WRONG.contains(&i)))).collect();
    assert_eq!(m.get("riskbound_window_samples", &window("all")), Some(100.0));
    assert_eq!(m.get("riskbound_risk_observed", &window("all")), Some(0.12));
    // Source: scipy.stats.beta.ppf via tests/reference/bounds_fixture.json, (n, k) = (100, 12).
    let (lo, up) = fixture_cp(100, 12, 0.95);
    assert!(close(m.get("riskbound_risk_lower_bound", &with_method("all", "clopper-pearson")).unwrap(), lo));
    assert!(close(m.get("riskbound_risk_upper_bound", &with_method("all", "clopper-pearson")).unwrap(), up));
    // CP lower 0.069 < 0.10 < upper 0.19: inconclusive.
    assert_eq!(
        m.get("riskbound_sla_state", &[("model", "courier"), ("window", "all"), ("state", "inconclusive")]),
        Some(1.0)
    );
    assert_eq!(m.get("riskbound_sla_state", &[("model", "courier"), ("window", "all"), ("state", "ok")]), Some(0.0));
    // The newest 50 by prediction time are r050..r099, in arrival order.
    let recent = &losses[50..];
    assert_eq!(m.get("riskbound_window_samples", &window("recent")), Some(50.0));
    for method in Method::ALL {
        let b = library(recent, method);
        assert!(
            close(m.get("riskbound_risk_upper_bound", &with_method("recent", method.name())).unwrap(), b.upper),
            "{method}"
        );
        assert!(
            close(m.get("riskbound_risk_lower_bound", &with_method("recent", method.name())).unwrap(), b.lower),
            "{method}"
        );
    }
    // span 5m behind the newest prediction (T + 990 s): T + 690 s and later, r069..r099.
    assert_eq!(m.get("riskbound_window_samples", &window("tail")), Some(31.0));
    let b = library(&losses[69..], Method::Betting);
    assert!(close(m.get("riskbound_risk_upper_bound", &with_method("tail", "betting")).unwrap(), b.upper));
    assert_eq!(m.get("riskbound_samples_labelled_total", &[("model", "courier")]), Some(100.0));
    assert_eq!(m.get("riskbound_predictions_awaiting_label", &[("model", "courier")]), Some(0.0));
    assert_eq!(m.get("riskbound_rows_ingested_total", &[("model", "courier"), ("kind", "label")]), Some(100.0));
}

/// The exposition without the lines that legitimately differ between two processes.
/// The scrape's lines, sorted, without the process's own footprint and connection counts,
/// which differ between any two processes.
fn stable(text: &str) -> Vec<String> {
    let own = |l: &str| {
        let name = l.trim_start_matches("# HELP ").trim_start_matches("# TYPE ");
        name.starts_with("process_") || name.starts_with("riskbound_http_connections_")
    };
    let mut v: Vec<String> = text.lines().filter(|l| !own(l)).map(str::to_string).collect();
    v.sort();
    v
}

#[test]
fn bounds_match_the_references_and_survive_kill_9_and_sigterm() {
    let dir = TempDir::new("e2e");
    let port = common::free_port();
    let cfg = config(&dir, port);
    let d = Daemon::start(&cfg, port);
    let (pred, label) = batches(&WRONG);
    dir.drop_file("pred-0001.csv", &pred);
    d.wait_files("courier", "prediction", 1.0);
    assert_eq!(d.metrics().get("riskbound_predictions_awaiting_label", &[("model", "courier")]), Some(100.0));
    dir.drop_file("label-0001.csv", &label);
    d.wait_files("courier", "label", 1.0);
    let before = d.scrape();
    check_reference_numbers(&Metrics::parse(&before));

    // kill -9, restart: the same numbers, from the database.
    d.kill9();
    let d = Daemon::start(&cfg, port);
    let after_kill = d.scrape();
    assert_eq!(stable(&before), stable(&after_kill));
    check_reference_numbers(&Metrics::parse(&after_kill));

    // SIGTERM: a clean exit, and again the same numbers.
    assert!(d.terminate().success());
    let d = Daemon::start(&cfg, port);
    assert_eq!(stable(&before), stable(&d.scrape()));
}

#[test]
fn the_same_content_under_a_new_name_counts_once() {
    let dir = TempDir::new("copy");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    let (pred, label) = batches(&WRONG);
    dir.drop_file("pred-a.csv", &pred);
    dir.drop_file("label-a.csv", &label);
    d.wait_files("courier", "label", 1.0);
    dir.drop_file("pred-b.csv", &pred);
    dir.drop_file("label-b.csv", &label);
    dir.drop_file("pred-c.csv", "request_id,ts,predicted\nz1,1790000000,late\n");
    d.wait_files("courier", "prediction", 2.0); // pred-c proves the copies were looked at
    let m = d.metrics();
    assert_eq!(m.get("riskbound_files_ingested_total", &[("model", "courier"), ("kind", "prediction")]), Some(2.0));
    assert_eq!(m.get("riskbound_files_ingested_total", &[("model", "courier"), ("kind", "label")]), Some(1.0));
    assert_eq!(m.get("riskbound_rows_ingested_total", &[("model", "courier"), ("kind", "prediction")]), Some(101.0));
    assert_eq!(m.get("riskbound_window_samples", &window("all")), Some(100.0));
    let dup = m.get(
        "riskbound_rows_rejected_total",
        &[("model", "courier"), ("kind", "prediction"), ("reason", "duplicate_prediction")],
    );
    assert_eq!(dup, Some(0.0), "an identical file is skipped whole, not re-read row by row");
}

#[test]
fn labels_may_come_before_their_predictions() {
    let dir = TempDir::new("early");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    let (pred, label) = batches(&WRONG);
    dir.drop_file("label-0001.csv", &label);
    d.wait_files("courier", "label", 1.0);
    let m = d.metrics();
    assert_eq!(m.get("riskbound_window_samples", &window("all")), Some(0.0));
    assert_eq!(m.get("riskbound_samples_labelled_total", &[("model", "courier")]), Some(0.0));
    dir.drop_file("pred-0001.csv", &pred);
    d.wait_files("courier", "prediction", 1.0);
    check_reference_numbers(&d.metrics());
}

#[test]
fn duplicate_ids_and_conflicting_labels_are_rejected_not_double_counted() {
    let dir = TempDir::new("dups");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    let (pred, label) = batches(&WRONG);
    // r000 again inside the file, and again in a second file.
    dir.drop_file("pred-0001.csv", &format!("{pred}r000,{T},north,late\n"));
    d.wait_files("courier", "prediction", 1.0);
    dir.drop_file("pred-0002.csv", &format!("request_id,ts,region,predicted\nr001,{T},north,late\n"));
    dir.drop_file("label-0001.csv", &label);
    d.wait_files("courier", "label", 1.0);
    // r000 labelled again: the same label (duplicate), then a different one (conflict).
    dir.drop_file(
        "label-0002.csv",
        &format!("request_id,observed,outcome\nr000,{},late\nr002,{},late\n", T + 50_000, T + 50_000),
    );
    d.wait_files("courier", "label", 2.0);
    let m = d.metrics();
    let rej = |kind: &str, reason: &str| {
        m.get("riskbound_rows_rejected_total", &[("model", "courier"), ("kind", kind), ("reason", reason)])
    };
    assert_eq!(rej("prediction", "duplicate_prediction"), Some(2.0));
    assert_eq!(rej("label", "duplicate_label"), Some(1.0)); // r000 is "late" (0 % 3 == 0, not in WRONG)
    assert_eq!(rej("label", "conflicting_label"), Some(1.0)); // r002 was "on-time"
    check_reference_numbers(&m);
}

#[test]
fn bad_rows_are_counted_by_reason_and_the_rest_of_the_file_is_kept() {
    let dir = TempDir::new("badrows");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    let body = format!(
        "request_id,ts,region,predicted\nq1,{T},north,late\nq2,not-a-time,north,late\nq3,{T},north\n,{T},north,late\nq4,{T},south,on-time\n"
    );
    dir.drop_file("pred-0001.csv", &body);
    d.wait_files("courier", "prediction", 1.0);
    let m = d.metrics();
    let rej = |reason: &str| {
        m.get("riskbound_rows_rejected_total", &[("model", "courier"), ("kind", "prediction"), ("reason", reason)])
    };
    assert_eq!(rej("bad_timestamp"), Some(1.0));
    assert_eq!(rej("malformed_row"), Some(1.0));
    assert_eq!(rej("missing_value"), Some(1.0));
    assert_eq!(m.get("riskbound_rows_ingested_total", &[("model", "courier"), ("kind", "prediction")]), Some(2.0));
    assert_eq!(m.get("riskbound_predictions_awaiting_label", &[("model", "courier")]), Some(2.0));
}

#[test]
fn unlabelled_predictions_expire_after_label_wait_by_event_time() {
    let dir = TempDir::new("expire");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    dir.drop_file("pred-0001.csv", &format!("request_id,ts,predicted\nold,{T},late\n"));
    d.wait_files("courier", "prediction", 1.0);
    // A prediction two days later moves event time past old's one-day wait.
    dir.drop_file("pred-0002.csv", &format!("request_id,ts,predicted\nnew,{},late\n", T + 2 * 86_400));
    dir.drop_file("label-0001.csv", &format!("request_id,observed,outcome\nold,{},late\n", T + 2 * 86_400 + 5));
    d.wait_files("courier", "label", 1.0);
    let m = d.metrics();
    assert_eq!(m.get("riskbound_predictions_expired_total", &[("model", "courier")]), Some(1.0));
    assert_eq!(
        m.get("riskbound_rows_rejected_total", &[("model", "courier"), ("kind", "label"), ("reason", "late_label")]),
        Some(1.0)
    );
    assert_eq!(m.get("riskbound_predictions_awaiting_label", &[("model", "courier")]), Some(1.0));
    assert_eq!(m.get("riskbound_label_coverage_ratio", &[("model", "courier")]), Some(0.0));
}

#[test]
fn http_surface_is_three_get_endpoints() {
    let dir = TempDir::new("http");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    assert_eq!(d.get("/healthz").unwrap().0, 200);
    assert_eq!(d.get("/readyz").unwrap().0, 200);
    assert_eq!(d.get("/nope").unwrap().0, 404);
    assert_eq!(common::http(port, "POST", "/metrics").unwrap().0, 405);
    let text = d.scrape();
    assert!(text.contains("riskbound_build_info{version=\"0.1.0\"} 1"), "{text}");
}

#[test]
fn check_config_prints_settings_or_located_errors() {
    let dir = TempDir::new("checkcfg");
    let cfg = config(&dir, 9);
    let out = std::process::Command::new(common::bin()).args(["check-config", cfg.to_str().unwrap()]).output().unwrap();
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.contains("window tail: prediction time within 300s of the newest"), "{text}");
    assert!(text.contains("decided by clopper-pearson"), "{text}");

    let bad = dir.path("bad.yaml");
    std::fs::write(
        &bad,
        std::fs::read_to_string(&cfg)
            .unwrap()
            .replace("confidence: 0.95", "confidence: 2")
            .replace("last: 50", "last: 0"),
    )
    .unwrap();
    for args in [vec!["check-config", bad.to_str().unwrap()], vec!["run", "--config", bad.to_str().unwrap()]] {
        let out = std::process::Command::new(common::bin()).args(&args).output().unwrap();
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        let err = String::from_utf8(out.stderr).unwrap();
        let lines: Vec<_> = err.lines().collect();
        assert_eq!(lines.len(), 2, "{err}");
        assert!(lines[0].starts_with(&format!("{}:8:17: models[0].confidence: ", bad.display())), "{err}");
        assert!(lines[1].starts_with(&format!("{}:12:31: models[0].windows[1].last: ", bad.display())), "{err}");
    }
}

#[test]
fn a_port_in_use_is_an_error_before_anything_is_ingested() {
    let dir = TempDir::new("port");
    let taken = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let port = taken.local_addr().unwrap().port();
    let cfg = config(&dir, port);
    let out =
        std::process::Command::new(common::bin()).args(["run", "--config", cfg.to_str().unwrap()]).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains(&format!("binding 127.0.0.1:{port}")));
    assert!(!dir.path("state/riskbound.sqlite").exists(), "no state touched");
}

/// Two models may read the same folder (say, one stream judged by two losses): each takes every
/// file for itself, and a restart re-reads neither's files.
#[test]
fn two_models_on_one_folder_each_take_every_file_once() {
    let dir = TempDir::new("shared");
    let port = common::free_port();
    let model = |name: &str| {
        format!(
            "  - name: {name}
    predictions: {{ dir: in, pattern: \"pred-*.csv\", columns: {{ id: request_id, time: ts, prediction: predicted }} }}
    labels: {{ dir: in, pattern: \"label-*.csv\", columns: {{ id: request_id, time: observed, label: outcome }} }}
    label_wait: 1d
    windows: [ {{ name: all, last: 1000 }} ]
"
        )
    };
    let cfg = dir.path("riskbound.yaml");
    let text = format!(
        "listen: \"127.0.0.1:{port}\"\nstate_dir: state\nrescan_interval: 200ms\nmodels:\n{}{}",
        model("east"),
        model("west")
    );
    std::fs::write(&cfg, text).unwrap();
    let (pred, label) = batches(&WRONG);
    dir.drop_file("pred-a.csv", &pred);
    dir.drop_file("label-a.csv", &label);
    let check = |d: &Daemon, pred_files: f64| {
        for name in ["east", "west"] {
            d.wait_files(name, "label", 1.0);
            let m = d.metrics();
            let w = [("model", name), ("window", "all")];
            assert_eq!(m.get("riskbound_window_samples", &w), Some(100.0), "{name}");
            assert_eq!(m.get("riskbound_window_total_loss", &w), Some(WRONG.len() as f64), "{name}");
            // What the fleet view pools: for 0-1 losses the squares are the errors again, and
            // every prediction of the cohort has its label.
            let k = Some(WRONG.len() as f64);
            assert_eq!(m.get("riskbound_window_total_squared_loss", &w), k, "{name}");
            assert_eq!(m.get("riskbound_window_cohort_total_loss", &w), k, "{name}");
            assert_eq!(m.get("riskbound_window_cohort_total_squared_loss", &w), k, "{name}");
            assert_eq!(m.get("riskbound_loss_max", &[("model", name), ("loss", "zero-one")]), Some(1.0));
            assert_eq!(
                m.get("riskbound_files_ingested_total", &[("model", name), ("kind", "prediction")]),
                Some(pred_files)
            );
        }
    };
    let d = Daemon::start(&cfg, port);
    check(&d, 1.0);
    d.kill9();
    let d = Daemon::start(&cfg, port);
    dir.drop_file("pred-b.csv", "request_id,ts,predicted\nz1,1790000000,late\n");
    d.wait_files("west", "prediction", 2.0); // the restart's first round is over
    check(&d, 2.0);
    let log = d.log_text();
    assert!(!log.contains("pred-a.csv"), "a taken file was looked at again after the restart:\n{log}");
    assert_eq!(log.matches("batch file taken").count(), 2, "pred-b, once per model:\n{log}");
}

/// SIGTERM waits for the file being read at most `shutdown_grace_period`, then the daemon
/// exits anyway and says so; the file's transaction rolls back, and the next start takes the
/// whole file once.
#[test]
fn shutdown_is_bounded_by_the_grace_period_and_loses_nothing() {
    let dir = TempDir::new("grace");
    let port = common::free_port();
    let cfg = common::simple_config(&dir, port, "shutdown_grace_period: 200ms", "m", "", "[ { name: all, last: 10 } ]");
    let d = Daemon::start(&cfg, port);
    // Large enough that reading it takes seconds on this machine.
    let rows = 3_000_000u64;
    let mut body = String::with_capacity(40 * rows as usize);
    body.push_str("id,t,p\n");
    for i in 0..rows {
        body += &format!("r{i},{},1\n", T + (i / 1000) as i64);
    }
    dir.drop_file("pred-big.csv", &body);
    std::thread::sleep(std::time::Duration::from_millis(400));
    let t = std::time::Instant::now();
    let log = d.log.clone();
    let status = d.terminate();
    let took = t.elapsed().as_secs_f64();
    let text = std::fs::read_to_string(&log).unwrap();
    assert!(status.success(), "{text}");
    if text.contains("stopped gracefully") {
        panic!("the file was read within 400 ms; the test needs a larger file:\n{text}");
    }
    assert!(text.contains("stopped forcibly"), "{text}");
    assert!(took < 3.0, "SIGTERM took {took} s with a 200 ms grace period");
    // The next start takes the file, once.
    let d = Daemon::start(&cfg, port);
    d.wait_until(std::time::Duration::from_secs(120), |d| {
        d.metrics().get("riskbound_files_ingested_total", &[("model", "m"), ("kind", "prediction")]) == Some(1.0)
    });
    assert_eq!(
        d.metrics().get("riskbound_rows_ingested_total", &[("model", "m"), ("kind", "prediction")]),
        Some(rows as f64)
    );
}
