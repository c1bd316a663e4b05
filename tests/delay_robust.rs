//! Labels whose delay depends on the outcome: the daemon must not certify "ok".
//!
//! An invented parcel model (our own scenario, not data from anywhere): 100 predictions an hour
//! for 72 hours, each wrong with probability 0.148; the label of a wrong prediction (a late
//! parcel) comes back 30 h later, the label of a right one 2 h later. Hourly prediction and
//! label files are fed in time order. SLA 0.10, label_wait 32 h.

mod common;

use common::{free_port, simple_config, Daemon, TempDir};

const HOURS: i64 = 72;
const PER_HOUR: i64 = 100;
const RATE: f64 = 0.148;

#[test]
fn outcome_dependent_delays_never_certify_ok() {
    let dir = TempDir::new("delay-robust");
    let port = free_port();
    let model = "    label_wait: 32h\n    sla: { max_risk: 0.10 }";
    let windows =
        "[{ name: recent, last: 500 }, { name: day, span: 24h }, { name: day_mature, span: 24h, mature: true }]";
    let cfg = simple_config(&dir, port, "rescan_interval: 100ms", "m", model, windows);
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs() as i64;
    let t0 = now - (HOURS + 2) * 3600;
    let mut state = 2024u64;
    // (label time, id, label) of every prediction, and the predictions per hour.
    let mut labels: Vec<(i64, String, u8)> = Vec::new();
    let mut preds: Vec<String> = Vec::new();
    let mut errors = 0u64;
    for h in 0..HOURS {
        let mut body = String::from("id,t,p\n");
        for i in 0..PER_HOUR {
            state = state.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            let wrong = ((state >> 11) as f64 / (1u64 << 53) as f64) < RATE;
            errors += u64::from(wrong);
            let t = t0 + h * 3600 + i * 36;
            let id = format!("h{h}i{i}");
            body += &format!("{id},{t},1\n");
            labels.push((t + if wrong { 30 * 3600 } else { 2 * 3600 }, id, if wrong { 0 } else { 1 }));
        }
        preds.push(body);
    }
    let daemon = Daemon::start(&cfg, port);
    let mut label_files = 0;
    for (h, body) in preds.iter().enumerate() {
        let end = t0 + (h as i64 + 1) * 3600;
        let mut lab = String::from("id,t,y\n");
        for (t, id, y) in labels.iter().filter(|(t, _, _)| *t >= end - 3600 && *t < end) {
            lab += &format!("{id},{t},{y}\n");
        }
        dir.drop_file(&format!("pred-{h:03}.csv"), body);
        daemon.wait_files("m", "prediction", (h + 1) as f64);
        if lab.lines().count() > 1 {
            dir.drop_file(&format!("label-{h:03}.csv"), &lab);
            label_files += 1;
            daemon.wait_files("m", "label", label_files as f64);
        }
    }
    let m = daemon.metrics();
    let truth = errors as f64 / (HOURS * PER_HOUR) as f64;
    assert!((truth - RATE).abs() < 0.02, "the simulated error rate {truth}");
    let bound = |side: &str, w: &str, g: &str| {
        let name = format!("riskbound_risk_{side}_bound");
        m.get(&name, &[("model", "m"), ("window", w), ("method", "clopper-pearson"), ("guarantee", g)])
    };
    // The labelled-only view is fooled: its newest labels are exactly the good outcomes.
    let observed = m.get("riskbound_risk_observed", &[("model", "m"), ("window", "recent")]).unwrap();
    assert!(observed < 0.01, "labelled-only observed error {observed}");
    assert!(bound("upper", "recent", "per-window").unwrap() < 0.10);
    for w in ["recent", "day", "day_mature"] {
        let ok = m.get("riskbound_sla_state", &[("model", "m"), ("window", w), ("state", "ok")]);
        assert_eq!(ok, Some(0.0), "window {w} must not be ok");
        let upper = bound("upper", w, "delay-robust").unwrap();
        assert!(upper >= truth, "window {w}: delay-robust upper {upper} below the true error {truth}");
    }
    // The mature window has every label that will come: its bounds see the true rate.
    let (lo, hi) =
        (bound("lower", "day_mature", "delay-robust").unwrap(), bound("upper", "day_mature", "delay-robust").unwrap());
    assert!(lo > 0.10 && lo < truth && truth < hi, "mature bounds [{lo}, {hi}] around {truth}");
    let violated = m.get("riskbound_sla_state", &[("model", "m"), ("window", "day_mature"), ("state", "violated")]);
    assert_eq!(violated, Some(1.0));
    let unlabelled = m.get("riskbound_window_cohort_unlabelled", &[("model", "m"), ("window", "day")]).unwrap();
    assert!(unlabelled > 300.0, "the day's mistakes are all still pending: {unlabelled}");
    // And the dependence of delays on outcomes is flagged.
    assert_eq!(m.get("riskbound_label_delay_outcome_dependent", &[("model", "m")]), Some(1.0));
    let p = m.get("riskbound_label_delay_outcome_p_value", &[("model", "m")]).unwrap();
    assert!(p < 1e-6, "p = {p}");
    let q =
        |o: &str| m.get("riskbound_label_delay_median_by_outcome_seconds", &[("model", "m"), ("outcome", o)]).unwrap();
    assert_eq!((q("error"), q("correct")), (30.0 * 3600.0, 2.0 * 3600.0));
    // The anytime alarm, fed in prediction-time order once label_wait is over, sees the truth.
    let n = m.get("riskbound_window_cohort_predictions", &[("model", "m"), ("window", "since-reset")]).unwrap();
    assert!(n > 3000.0, "matured predictions {n}");
    assert_eq!(m.get("riskbound_alarm_firing", &[("model", "m"), ("test", "exceeded")]), Some(1.0));
}
