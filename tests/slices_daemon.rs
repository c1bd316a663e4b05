//! The slice search in the daemon: features read from prediction files, the worst slices per
//! window exported with a bounded `rank` label, certified violations counted, registered slices
//! bounded at δ/M, and the window's state decided by a bad slice when the config asks.

mod common;

use common::{free_port, Daemon, Metrics, TempDir};
use riskbound::estimate::binomial::clopper_pearson;

fn config(dir: &TempDir, port: u16) -> std::path::PathBuf {
    let text = format!(
        "listen: \"127.0.0.1:{port}\"
state_dir: state
rescan_interval: 100ms
models:
  - name: m
    predictions: {{ dir: in, pattern: \"pred-*.csv\", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: in, pattern: \"label-*.csv\", columns: {{ id: id, time: t, label: y }} }}
    label_wait: 1d
    windows: [{{ name: all, last: 100000 }}]
    sla: {{ max_risk: 0.15 }}
    slices:
      categorical: [region]
      numeric: [weight]
      top: 3
      sign_draws: 10
      registered: [\"region=ne\", \"weight<=10\"]
      decide_state: true
"
    );
    let p = dir.path("riskbound.yaml");
    std::fs::write(&p, text).unwrap();
    p
}

#[test]
fn worst_slices_are_exported_and_decide_the_window() {
    let dir = TempDir::new("slices-daemon");
    let port = free_port();
    let cfg = config(&dir, port);
    let daemon = Daemon::start(&cfg, port);
    // Region ne is wrong half the time, the others 2%: overall about 0.14, under max_risk.
    let mut s = 21u64;
    let mut u = || {
        s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    };
    let mut pred = String::from("id,t,region,weight,p\n");
    let mut label = String::from("id,t,y\n");
    let (mut ne, mut ne_wrong, mut light, mut light_wrong) = (0u64, 0u64, 0u64, 0u64);
    for i in 0..4000 {
        let region = ["ne", "nw", "se", "sw"][(u() * 4.0) as usize];
        let weight = (u() * 300.0).round() / 10.0;
        let wrong = u() < if region == "ne" { 0.5 } else { 0.02 };
        pred += &format!("r{i},{},{region},{weight},1\n", 1_790_000_000 + i);
        label += &format!("r{i},{},{}\n", 1_790_000_060 + i, if wrong { 0 } else { 1 });
        if region == "ne" {
            ne += 1;
            ne_wrong += u64::from(wrong);
        }
        if weight <= 10.0 {
            light += 1;
            light_wrong += u64::from(wrong);
        }
    }
    pred += "bad,1790009999,ne,heavy,1\n";
    dir.drop_file("pred-1.csv", &pred);
    daemon.wait_files("m", "prediction", 1.0);
    dir.drop_file("label-1.csv", &label);
    daemon.wait_files("m", "label", 1.0);
    let text = daemon.scrape();
    let m = Metrics::parse(&text);
    let info = text
        .lines()
        .find(|l| l.starts_with("riskbound_slice_info{") && l.contains("rank=\"1\""))
        .expect("a rank-1 slice");
    assert!(info.contains("slice=\"region=ne\"") && info.contains("kind=\"category\""), "{info}");
    let w = [("model", "m"), ("window", "all")];
    assert!(m.get("riskbound_slice_violations", &w).unwrap() >= 1.0);
    let rank1 = [("model", "m"), ("window", "all"), ("rank", "1")];
    assert!(m.get("riskbound_slice_risk_lower_bound", &rank1).unwrap() > 0.15);
    assert!(text.lines().filter(|l| l.starts_with("riskbound_slice_info{")).count() <= 3, "top 3 at most");
    // The overall window is not certainly over max_risk, but a slice is: violated.
    assert_eq!(m.get("riskbound_sla_state", &[("model", "m"), ("window", "all"), ("state", "violated")]), Some(1.0));
    // Registered slices: Clopper-Pearson at δ/M = 0.05/2 on the whole window, from the counts
    // written above.
    let reg = |slice: &str, k: u64, n: u64| {
        let want = clopper_pearson(k, n, (1.0 - 0.95) / 2.0);
        let l = [("model", "m"), ("window", "all"), ("slice", slice)];
        let lo = m.get("riskbound_registered_slice_risk_lower_bound", &l).unwrap();
        let up = m.get("riskbound_registered_slice_risk_upper_bound", &l).unwrap();
        assert!((lo - want.lower).abs() < 1e-12 && (up - want.upper).abs() < 1e-12, "{slice}: {lo} {up} vs {want:?}");
    };
    reg("region=ne", ne_wrong, ne);
    reg("weight <= 10", light_wrong, light);
    // The non-numeric weight is rejected at its own line, not dropped later.
    assert_eq!(
        m.get("riskbound_rows_rejected_total", &[("model", "m"), ("kind", "prediction"), ("reason", "bad_number")]),
        Some(1.0)
    );
    // The same state after kill -9: the search is seeded.
    let before: Vec<String> = text.lines().filter(|l| l.starts_with("riskbound_slice")).map(str::to_string).collect();
    daemon.kill9();
    let daemon = Daemon::start(&cfg, port);
    let after: Vec<String> =
        daemon.scrape().lines().filter(|l| l.starts_with("riskbound_slice")).map(str::to_string).collect();
    assert_eq!(before, after);
}
