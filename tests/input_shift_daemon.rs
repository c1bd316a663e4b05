//! The input-shift tests in the daemon: feature columns read from prediction files, a look at
//! the window after each file (every: 1s of event time), its numbers equal to what `riskbound
//! input-shift` prints for the same rows (that command is checked against numpy and scipy in
//! tests/input_shift.rs), the sequential alarm silent on inputs like the reference and latched
//! once they move, reset by `riskbound reset` without reusing reference points, durable across
//! a kill -9; bad cells rejected at their line; bad sections located in the config.

mod common;

use common::{bin, fails_with, free_port, Daemon, Metrics, TempDir};
use std::process::Command;

/// A seeded stream of standard normals (an LCG and Box–Muller): invented data, as a test
/// scenario of our own.
struct Normals(u64);

impl Normals {
    fn uniform(&mut self) -> f64 {
        self.0 = self.0.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }
    fn region(&mut self) -> &'static str {
        ["a", "b", "c"][((self.uniform() * 3.0) as usize).min(2)]
    }
}

fn config(dir: &TempDir, port: u16, extra: &str) -> std::path::PathBuf {
    let text = format!(
        "listen: \"127.0.0.1:{port}\"
state_dir: state
rescan_interval: 100ms
models:
  - name: m
    predictions: {{ dir: in, pattern: \"pred-*.csv\", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: in, pattern: \"label-*.csv\", columns: {{ id: id, time: t, label: y }} }}
    windows: [{{ name: all, last: 10000 }}]
    input_shift:
      reference: {{ file: reference.csv }}
      columns: [x1, x2]
      categorical: [region]
      window: {{ name: recent, last: 500 }}
      every: 1s
{extra}"
    );
    let p = dir.path("riskbound.yaml");
    std::fs::write(&p, text).unwrap();
    p
}

/// The reference: 3000 rows of (x1, x2) standard normal and a region.
fn reference(dir: &TempDir) {
    let mut g = Normals(11);
    let mut text = String::from("x1,x2,region\n");
    for _ in 0..3000 {
        text += &format!("{:.6},{:.6},{}\n", g.normal(), g.normal(), g.region());
    }
    std::fs::write(dir.path("reference.csv"), text).unwrap();
}

/// Prediction file `k`: 500 rows one second apart, x1 moved by `shift`; also the same rows as
/// a plain feature file for `riskbound input-shift`.
fn predictions(g: &mut Normals, k: usize, shift: f64) -> (String, String) {
    let mut pred = String::from("id,t,x1,x2,region,p\n");
    let mut features = String::from("x1,x2,region\n");
    for i in 0..500 {
        let (x1, x2, r) = (g.normal() + shift, g.normal(), g.region());
        pred += &format!("r{k}-{i},{},{x1:.6},{x2:.6},{r},1\n", 1_790_000_000 + k * 500 + i);
        features += &format!("{x1:.6},{x2:.6},{r}\n");
    }
    (pred, features)
}

fn command_report(dir: &TempDir, current: &str) -> serde_json::Value {
    std::fs::write(dir.path("current.csv"), current).unwrap();
    let out = Command::new(bin())
        .args(["input-shift", "--reference"])
        .arg(dir.path("reference.csv"))
        .arg("--current")
        .arg(dir.path("current.csv"))
        .args(["--columns", "x1,x2", "--categorical", "region", "--seed", "1", "--json"])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap()
}

const W: [(&str, &str); 2] = [("model", "m"), ("window", "recent")];

fn per_test(test: &str) -> [(&str, &str); 3] {
    [("model", "m"), ("window", "recent"), ("test", test)]
}

const ALARM: [(&str, &str); 2] = [("model", "m"), ("test", "input-shift")];

#[test]
fn a_replay_is_tested_like_the_command_and_the_alarm_latches_until_reset() {
    let dir = TempDir::new("input-shift-daemon");
    reference(&dir);
    let port = free_port();
    let cfg = config(&dir, port, "");
    let daemon = Daemon::start(&cfg, port);
    let mut g = Normals(99);

    // Three files like the reference.
    for k in 0..3 {
        let (pred, features) = predictions(&mut g, k, 0.0);
        dir.drop_file(&format!("pred-{k}.csv"), &pred);
        daemon.wait_files("m", "prediction", (k + 1) as f64);
        let m = daemon.metrics();
        assert_eq!(
            m.get("riskbound_input_shift_look_timestamp_seconds", &W),
            Some((1_790_000_000 + k * 500 + 499) as f64)
        );
        assert_eq!(m.get("riskbound_input_shift_inconclusive", &W), Some(0.0));
        assert_eq!(m.get("riskbound_input_shift_points", &[W[0], W[1], ("sample", "window")]), Some(500.0));
        // The window is the newest file, tested whole: the same rows through the command give
        // the same statistic, bandwidth and p-values (same seed, same order, same draws).
        let r = command_report(&dir, &features);
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-300);
        let mmd = m.get("riskbound_input_shift_mmd2", &[W[0], W[1], ("estimate", "unbiased")]).unwrap();
        assert!(close(mmd, r["mmd2_unbiased"].as_f64().unwrap()), "file {k}: {mmd} vs {}", r["mmd2_unbiased"]);
        let bw = m.get("riskbound_input_shift_bandwidth", &W).unwrap();
        assert!(close(bw, r["bandwidth"].as_f64().unwrap()), "file {k}: bandwidth {bw} vs {}", r["bandwidth"]);
        for test in ["permutation", "spectral"] {
            let p = m.get("riskbound_input_shift_p_value", &per_test(test)).unwrap();
            assert_eq!(p, r["tests"][test]["p_value"].as_f64().unwrap(), "file {k}: {test}");
        }
        let ks = m.get("riskbound_input_shift_ks_p_value", &[W[0], W[1], ("column", "x1")]).unwrap();
        assert_eq!(ks, r["univariate"][0]["ks_p_value"].as_f64().unwrap());
        // Inputs like the reference: no alarm (P(ever) <= 0.05; with these seeds, none).
        assert_eq!(m.get("riskbound_alarm_firing", &ALARM), Some(0.0), "file {k}");
        assert_eq!(m.get("riskbound_input_shift_alarm_pairs", &[("model", "m")]), Some((500 * (k + 1)) as f64));
    }
    let m = daemon.metrics();
    // ln(1/δ) with δ = 1 − 0.95 (as a double, 0.05 + 4e-17).
    let threshold = m.get("riskbound_alarm_log_threshold", &ALARM).unwrap();
    assert!((threshold - 20f64.ln()).abs() < 1e-12, "{threshold}");
    // 3000 rows: 500 to calibrate on, 2500 to pair.
    assert_eq!(m.get("riskbound_input_shift_alarm_pool_left", &[("model", "m")]), Some(1000.0));

    // x1 moves by one standard deviation: the look rejects and the alarm fires within the file.
    let (pred, _) = predictions(&mut g, 3, 1.0);
    dir.drop_file("pred-3.csv", &pred);
    daemon.wait_files("m", "prediction", 4.0);
    let m = daemon.metrics();
    assert_eq!(m.get("riskbound_input_shift_shifted", &per_test("permutation")), Some(1.0));
    assert_eq!(m.get("riskbound_input_shift_shifted", &per_test("spectral")), Some(1.0));
    assert_eq!(m.get("riskbound_alarm_firing", &ALARM), Some(1.0));
    let left = m.get("riskbound_input_shift_alarm_pool_left", &[("model", "m")]).unwrap();
    assert_eq!(left, 500.0);

    // A reset clears the evidence but not the place in the pool.
    let out = Command::new(bin()).args(["reset", "m", "--config"]).arg(&cfg).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    daemon.wait_until(std::time::Duration::from_secs(20), |d| {
        d.metrics().get("riskbound_alarm_firing", &ALARM) == Some(0.0)
    });
    let m = daemon.metrics();
    assert_eq!(m.get("riskbound_alarm_log_evidence", &ALARM), Some(0.0));
    assert_eq!(m.get("riskbound_input_shift_alarm_pool_left", &[("model", "m")]), Some(500.0));

    // A bad cell is rejected at its line; the rest of the file is taken. The state survives a
    // kill -9: the shifted file after the restart pairs the last 500 reference points and fires.
    let (mut pred, _) = predictions(&mut g, 4, 1.0);
    pred += "bad-1,1790002600,abc,0.5,a,1\n";
    daemon.kill9();
    let daemon = Daemon::start(&cfg, port);
    dir.drop_file("pred-4.csv", &pred);
    daemon.wait_files("m", "prediction", 5.0);
    let m = daemon.metrics();
    let reject = [("model", "m"), ("kind", "prediction"), ("reason", "bad_number")];
    assert_eq!(m.get("riskbound_rows_rejected_total", &reject), Some(1.0));
    assert_eq!(m.get("riskbound_input_shift_alarm_pool_left", &[("model", "m")]), Some(0.0));
    assert_eq!(m.get("riskbound_input_shift_alarm_pairs", &[("model", "m")]), Some(500.0));
    assert_eq!(m.get("riskbound_alarm_firing", &ALARM), Some(1.0));
    assert!(daemon.log_text().contains("abc"), "the first rejected row is logged");

    // Once the pool is used up, further sampled predictions are counted as unpaired.
    let (pred, _) = predictions(&mut g, 5, 1.0);
    dir.drop_file("pred-5.csv", &pred);
    daemon.wait_files("m", "prediction", 6.0);
    let m = daemon.metrics();
    assert_eq!(m.get("riskbound_input_shift_alarm_unpaired_total", &[("model", "m")]), Some(500.0));
    let text = daemon.scrape();
    assert!(text.contains("# TYPE riskbound_input_shift_p_value gauge"), "{text}");
    let _ = Metrics::parse(&text);
}

#[test]
fn a_window_short_of_min_points_is_inconclusive() {
    let dir = TempDir::new("input-shift-short");
    reference(&dir);
    let port = free_port();
    let cfg = config(&dir, port, "      min_points: 200\n");
    let daemon = Daemon::start(&cfg, port);
    let mut pred = String::from("id,t,x1,x2,region,p\n");
    let mut g = Normals(5);
    for i in 0..150 {
        pred += &format!("r{i},{},{:.6},{:.6},a,1\n", 1_790_000_000 + i, g.normal(), g.normal());
    }
    dir.drop_file("pred-0.csv", &pred);
    daemon.wait_files("m", "prediction", 1.0);
    let m = daemon.metrics();
    assert_eq!(m.get("riskbound_input_shift_inconclusive", &W), Some(1.0));
    assert_eq!(m.get("riskbound_input_shift_p_value", &per_test("spectral")), None, "no p-value without a test");
    assert!(daemon.log_text().contains("fewer than min_points 200"));
}

#[test]
fn bad_input_shift_sections_are_located() {
    let dir = TempDir::new("input-shift-bad");
    let port = free_port();
    let cfg = config(&dir, port, "");
    let c = cfg.to_str().unwrap();
    std::fs::create_dir_all(dir.path("in")).unwrap();
    let write = |body: &str| std::fs::write(dir.path("reference.csv"), body).unwrap();
    // A column the reference lacks; a constant column; no rows; a NaN.
    write("x1,region\n1,a\n2,b\n");
    fails_with(&["check-config", c], "models[0].input_shift.reference.file");
    fails_with(&["check-config", c], "x2");
    let mut constant = String::from("x1,x2,region\n");
    for i in 0..1000 {
        constant += &format!("{i},3,a\n");
    }
    write(&constant);
    fails_with(&["check-config", c], "column x2 is constant");
    write("x1,x2,region\n");
    fails_with(&["check-config", c], "no data rows");
    write("x1,x2,region\n1,2,a\nNaN,2,b\n");
    let out = fails_with(&["check-config", c], "reference.csv:3");
    assert!(String::from_utf8_lossy(&out.stderr).contains("x1"));
    // Too few rows for the alarm's calibration and pool.
    let mut few = String::from("x1,x2,region\n");
    for i in 0..50 {
        few += &format!("{i},{},a\n", i % 7);
    }
    write(&few);
    fails_with(&["check-config", c], "the alarm needs at least 120 reference rows");
    // Settings out of range, each at its own key.
    reference(&dir);
    let cfg = config(&dir, port, "      max_points: 5\n      alarm: { sample_rate: 2 }\n");
    let c = cfg.to_str().unwrap();
    fails_with(&["check-config", c], "models[0].input_shift.max_points: must lie in [10, 20000], got 5");
    fails_with(&["check-config", c], "models[0].input_shift.alarm.sample_rate: must lie in (0, 1], got 2");
}
