//! The anytime sequences and alarms in the daemon: durable through kill -9 (the state after
//! every file is exactly what an uninterrupted replay gives), reset while running, restarted
//! when the settings change, and the harmful-shift threshold taken from a reference file.
//!
//! The daemon feeds its tracker a prediction once its label_wait is over, in prediction-time
//! order: after a file that moved the newest event time to W, every prediction older than
//! W − label_wait. Here prediction i (0-based over all batches) is at T + i seconds and its label
//! at T + i + 60, so after label file b that is the first b·ROWS + ROWS − 1 + 60 − wait of them.

mod common;

use common::{bin, free_port, simple_config, Daemon, Metrics, TempDir};
use riskbound::estimate::anytime::evidence::ChangeDetector;
use riskbound::estimate::anytime::sequence::HoeffdingBoundary;
use riskbound::estimate::anytime::{Sequence, Tracker, TrackerSpec, DEFAULT_GRID};

const T: i64 = 1_790_000_000;
const ROWS: usize = 200;

/// Batch `b`: predictions and labels of ROWS requests; wrong with probability `rate`.
fn batch(b: usize, rate: f64, state: &mut u64) -> (String, String, Vec<f64>) {
    let mut pred = String::from("id,t,p\n");
    let mut label = String::from("id,t,y\n");
    let mut losses = Vec::new();
    for i in 0..ROWS {
        *state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        let wrong = ((*state >> 11) as f64 / (1u64 << 53) as f64) < rate;
        let t = T + (b * ROWS + i) as i64;
        pred += &format!("b{b}r{i},{t},1\n");
        label += &format!("b{b}r{i},{},{}\n", t + 60, if wrong { 0 } else { 1 });
        losses.push(f64::from(u8::from(wrong)));
    }
    (pred, label, losses)
}

/// Drops batch `b` (predictions, then labels) and waits until the daemon has taken it.
fn feed(dir: &TempDir, daemon: &Daemon, b: usize, rate: f64, rng: &mut u64) -> Vec<f64> {
    let (pred, label, losses) = batch(b, rate, rng);
    dir.drop_file(&format!("pred-{b:03}.csv"), &pred);
    dir.drop_file(&format!("label-{b:03}.csv"), &label);
    daemon.wait_files("m", "label", (b + 1) as f64);
    losses
}

/// Predictions whose wait is over once label file `b` is taken, with label_wait `wait` seconds
/// (at least 200 s, a batch's span, so that no prediction's wait ends before its label file).
fn matured(b: usize, wait: usize) -> usize {
    (b * ROWS + ROWS - 1 + 60).saturating_sub(wait).min((b + 1) * ROWS)
}

fn replayed(spec: TrackerSpec, losses: &[f64]) -> Tracker {
    let mut t = Tracker::new(spec);
    for &l in losses {
        t.push(l);
    }
    t
}

fn since_reset(method: &str) -> [(&str, &str); 4] {
    [("model", "m"), ("window", "since-reset"), ("method", method), ("guarantee", "anytime")]
}

fn alarm(test: &str) -> [(&str, &str); 2] {
    [("model", "m"), ("test", test)]
}

fn spec(max_risk: f64) -> TrackerSpec {
    TrackerSpec {
        // What the daemon's confidence 0.95 means: δ = 1 − 0.95 in floating point.
        delta: 1.0 - 0.95,
        loss_max: 1.0,
        grid: DEFAULT_GRID,
        hoeffding_boundary: HoeffdingBoundary::Stitched,
        sla_max_risk: Some(max_risk),
        shift_max_risk: None,
        change: Some((max_risk, ChangeDetector::threshold_for(100_000, 1.0 - 0.95))),
    }
}

/// Every anytime number the daemon exports equals the replay's, to the last bit printed.
fn assert_matches(m: &Metrics, t: &Tracker) {
    let samples = m.get("riskbound_window_samples", &[("model", "m"), ("window", "since-reset")]);
    assert_eq!(samples, Some(t.labelled() as f64));
    let cohort = m.get("riskbound_window_cohort_predictions", &[("model", "m"), ("window", "since-reset")]);
    assert_eq!(cohort, Some(t.n() as f64));
    for s in Sequence::ALL {
        // No bounds are exported before the first prediction is taken.
        let b = (t.n() > 0).then(|| t.bounds(s));
        assert_eq!(m.get("riskbound_risk_lower_bound", &since_reset(s.name())), b.map(|b| b.lower), "{s} lower");
        assert_eq!(m.get("riskbound_risk_upper_bound", &since_reset(s.name())), b.map(|b| b.upper), "{s} upper");
    }
    let e = t.exceeded().unwrap();
    assert_eq!(m.get("riskbound_alarm_log_evidence", &alarm("exceeded")), Some(e.log_evidence()));
    assert_eq!(m.get("riskbound_alarm_firing", &alarm("exceeded")), Some(f64::from(u8::from(e.alarm_at().is_some()))));
    let c = t.change().unwrap();
    assert_eq!(m.get("riskbound_alarm_log_evidence", &alarm("change")), Some(c.log_evidence()));
    assert_eq!(m.get("riskbound_alarm_firing", &alarm("change")), Some(f64::from(u8::from(c.alarm_at().is_some()))));
}

#[test]
fn anytime_state_resumes_exactly_after_kill_9() {
    let dir = TempDir::new("anytime-kill");
    let port = free_port();
    let model = "    label_wait: 1000s\n    sla: { max_risk: 0.2 }";
    let cfg = simple_config(&dir, port, "rescan_interval: 100ms", "m", model, "[{ name: all, last: 100000 }]");
    let mut replay = Tracker::new(spec(0.2));
    let mut rng = 99u64;
    let (mut all, mut fed) = (Vec::new(), 0usize);
    let mut daemon = Daemon::start(&cfg, port);
    let mut kills = 0;
    for b in 0..16 {
        // The risk steps from 0.1 to 0.5 at batch 8: the change alarm must fire, kills or not.
        let (pred, label, losses) = batch(b, if b < 8 { 0.1 } else { 0.5 }, &mut rng);
        dir.drop_file(&format!("pred-{b:03}.csv"), &pred);
        daemon.wait_files("m", "prediction", (b + 1) as f64);
        dir.drop_file(&format!("label-{b:03}.csv"), &label);
        if b % 3 == 1 {
            // Killed at once: before, during or just after the label file's transaction.
            std::thread::sleep(std::time::Duration::from_millis(5 * (b as u64 % 4)));
            daemon.kill9();
            kills += 1;
            daemon = Daemon::start(&cfg, port);
        }
        daemon.wait_files("m", "label", (b + 1) as f64);
        all.extend(losses);
        for &l in &all[fed..matured(b, 1000)] {
            replay.push(l);
        }
        fed = matured(b, 1000);
        assert_matches(&daemon.metrics(), &replay);
    }
    assert!(kills >= 5);
    assert_eq!(replay.n(), 2259, "every prediction older than the newest event time minus label_wait");
    // The change detector fires after the step at prediction 1600.
    assert!(replay.change().unwrap().alarm_at().is_some_and(|t| t > 1600), "{:?}", replay.change());
    // A clean stop and start changes nothing either.
    assert!(daemon.terminate().success());
    let daemon = Daemon::start(&cfg, port);
    assert_matches(&daemon.metrics(), &replay);
}

#[test]
fn reset_restarts_the_sequences_while_the_daemon_runs() {
    let dir = TempDir::new("anytime-reset");
    let port = free_port();
    let model = "    label_wait: 250s\n    sla: { max_risk: 0.2 }";
    let cfg = simple_config(&dir, port, "rescan_interval: 100ms", "m", model, "[{ name: all, last: 100000 }]");
    let daemon = Daemon::start(&cfg, port);
    let mut rng = 5u64;
    let mut all = feed(&dir, &daemon, 0, 0.5, &mut rng);
    all.extend(feed(&dir, &daemon, 1, 0.5, &mut rng));
    let m = daemon.metrics();
    assert_eq!(
        m.get("riskbound_alarm_firing", &alarm("exceeded")),
        Some(1.0),
        "a risk of 0.5 against 0.2 fires: {:?} {:?}",
        m.get("riskbound_window_cohort_predictions", &[("model", "m"), ("window", "since-reset")]),
        m.get("riskbound_alarm_log_evidence", &alarm("exceeded"))
    );

    let out =
        std::process::Command::new(bin()).args(["reset", "m", "--config", cfg.to_str().unwrap()]).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    daemon.wait_until(std::time::Duration::from_secs(10), |d| {
        d.metrics().get("riskbound_anytime_resets_total", &[("model", "m")]) == Some(1.0)
    });
    let m = daemon.metrics();
    assert_eq!(m.get("riskbound_window_samples", &[("model", "m"), ("window", "since-reset")]), Some(0.0));
    assert_eq!(m.get("riskbound_alarm_firing", &alarm("exceeded")), Some(0.0));
    assert_eq!(m.get("riskbound_window_samples", &[("model", "m"), ("window", "all")]), Some(2.0 * ROWS as f64));

    all.extend(feed(&dir, &daemon, 2, 0.05, &mut rng));
    assert_matches(&daemon.metrics(), &replayed(spec(0.2), &all[matured(1, 250)..matured(2, 250)]));

    let out =
        std::process::Command::new(bin()).args(["reset", "nope", "--config", cfg.to_str().unwrap()]).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("no model \"nope\""));
}

#[test]
fn changed_settings_restart_the_sequences_and_say_so() {
    let dir = TempDir::new("anytime-respec");
    let port = free_port();
    let windows = "[{ name: all, last: 100000 }]";
    let cfg = simple_config(
        &dir,
        port,
        "rescan_interval: 100ms",
        "m",
        "    label_wait: 250s\n    sla: { max_risk: 0.2 }",
        windows,
    );
    let mut rng = 7u64;
    let daemon = Daemon::start(&cfg, port);
    let mut all = feed(&dir, &daemon, 0, 0.1, &mut rng);
    assert!(daemon.terminate().success());

    let cfg = simple_config(
        &dir,
        port,
        "rescan_interval: 100ms",
        "m",
        "    label_wait: 250s\n    sla: { max_risk: 0.3 }",
        windows,
    );
    let daemon = Daemon::start(&cfg, port);
    all.extend(feed(&dir, &daemon, 1, 0.1, &mut rng));
    assert_matches(&daemon.metrics(), &replayed(spec(0.3), &all[matured(0, 250)..matured(1, 250)]));
    assert!(daemon.log_text().contains("anytime sequences and alarms restarted"), "{}", daemon.log_text());
}

#[test]
fn shift_threshold_is_the_reference_upper_bound_plus_tolerance() {
    let dir = TempDir::new("anytime-shift");
    let port = free_port();
    // 100 validation rows, 12 wrong: scipy's Clopper-Pearson bounds for (n, k) = (100, 12) are
    // in the bounds fixture.
    let mut reference = String::from("p,y\n");
    for i in 0..100 {
        reference += if [3, 8, 15, 22, 41, 47, 56, 60, 71, 77, 85, 98].contains(&i) { "1,0\n" } else { "1,1\n" };
    }
    std::fs::write(dir.path("validation.csv"), reference).unwrap();
    let model = "    label_wait: 1d\n    sla:\n      max_risk: 0.2\n      reference: { file: validation.csv, columns: { prediction: p, label: y }, tolerance: 0.03, confidence: 0.95 }";
    let cfg = simple_config(&dir, port, "rescan_interval: 100ms", "m", model, "[{ name: all, last: 1000 }]");
    // Source: scipy.stats.beta.ppf via the fixture.
    let (_, upper) = common::fixture_cp(100, 12, 0.95);

    let out = std::process::Command::new(bin()).args(["check-config", cfg.to_str().unwrap()]).output().unwrap();
    let printed = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert!(printed.contains(&format!("upper {upper:.6}")), "{printed}");
    assert!(printed.contains("false alarm probability <= 1.000e-1"), "δ_S + δ_T = 0.05 + 0.05:\n{printed}");

    let daemon = Daemon::start(&cfg, port);
    let mut rng = 3u64;
    feed(&dir, &daemon, 0, 0.1, &mut rng);
    let got = daemon.metrics().get("riskbound_alarm_max_risk", &alarm("shift")).unwrap();
    assert!((got - (upper + 0.03)).abs() <= 1e-12, "{got} vs {}", upper + 0.03);

    // A bad reference row is a located config error, before anything binds.
    std::fs::write(dir.path("validation.csv"), "p,y\n1,1\n1\n").unwrap();
    let out = std::process::Command::new(bin()).args(["check-config", cfg.to_str().unwrap()]).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("sla.reference.file") && err.contains("validation.csv:3"), "{err}");
}

/// The evaluation number k behind an exported spent confidence C = 1 − δ/(k(k+1)).
fn evaluation_of(confidence: f64) -> u64 {
    let delta_k = 1.0 - confidence;
    (1..10_000u64)
        .find(|&k| (0.05 / (k * (k + 1)) as f64 - delta_k).abs() <= 1e-12)
        .unwrap_or_else(|| panic!("{confidence} is not 1 - 0.05/(k(k+1)) for any k"))
}

#[test]
fn spent_window_bounds_use_delta_k_and_k_survives_restarts() {
    let dir = TempDir::new("anytime-spent");
    let port = free_port();
    let model = "    label_wait: 1d\n    window_guarantee: spent\n    sla: { max_risk: 0.2 }";
    let cfg = simple_config(&dir, port, "rescan_interval: 100ms", "m", model, "[{ name: all, last: 100000 }]");
    let mut rng = 17u64;
    let daemon = Daemon::start(&cfg, port);
    let losses = feed(&dir, &daemon, 0, 0.15, &mut rng);
    let m = daemon.metrics();
    let spent = [("model", "m"), ("guarantee", "spent")];
    let c = m.get("riskbound_bound_confidence_ratio", &spent).unwrap();
    let k = evaluation_of(c);
    assert!(k >= 2, "the resume and the file are two evaluations at least, got {k}");
    assert_eq!(m.get("riskbound_bound_confidence_ratio", &[("model", "m"), ("guarantee", "anytime")]), Some(0.95));
    // Clopper-Pearson at δ_k = δ/(k(k+1)) (the union bound Σ δ_k = δ).
    let errors = losses.iter().sum::<f64>() as u64;
    let want = riskbound::estimate::binomial::clopper_pearson(errors, ROWS as u64, 1.0 - c);
    let cp = [("model", "m"), ("window", "all"), ("method", "clopper-pearson"), ("guarantee", "spent")];
    assert_eq!(m.get("riskbound_risk_upper_bound", &cp), Some(want.upper));
    assert_eq!(m.get("riskbound_risk_lower_bound", &cp), Some(want.lower));
    // A restart continues the count, so no δ_k is ever spent twice.
    daemon.kill9();
    let daemon = Daemon::start(&cfg, port);
    let k2 = evaluation_of(daemon.metrics().get("riskbound_bound_confidence_ratio", &spent).unwrap());
    assert!(k2 > k, "k went from {k} to {k2}");
}
