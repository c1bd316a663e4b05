//! Windows of any size in bounded memory: each window's statistics are kept as ranges that move
//! with every committed file (rows entering added, rows leaving read back and subtracted). They
//! must equal, to the bit, the statistics computed from every row of the window; the betting
//! subsample must be the same after a restart; and the exact bounds on them must match scipy.

mod common;

use common::join_model::model_config;
use common::TempDir;
use proptest::prelude::*;
use riskbound::config::{ModelConfig, WindowConfig, WindowKind};
use riskbound::estimate::{Confidence, LossSummary, Method};
use riskbound::ingest::records::Record;
use riskbound::loss::LossSpec;
use riskbound::window::store::{level_of, WindowView};
use riskbound::window::{self, Batch, Kind, Store};
use serde_json::Value;

fn file(store: &mut Store, cfg: &ModelConfig, kind: Kind, n: usize, records: &[Record]) {
    let hash = format!("file-{n}");
    let b = Batch { kind, name: "f", hash: &hash, records, rejects: &[], size: None, mtime_ns: None };
    store.ingest_file(cfg, &b, 0).unwrap();
}

fn rec(id: usize, t: i64, v: u8) -> Record {
    Record { line: 2, id: format!("k{id}"), time_ms: t, value: (v % 8).to_string(), features: vec![] }
}

/// What must agree between two views of one window: statistics, subsample, cohort.
fn same(a: &WindowView, b: &WindowView) -> bool {
    a.stats == b.stats && a.sample == b.sample && a.cohort == b.cohort
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// Random files (predictions, some arriving late, labels in any order, some too late to
    /// join), restarts at random points, windows of every kind (last, span, mature of both)
    /// with their cohorts. After every file, each window of the pruned store equals the
    /// full-data computation on a twin store that keeps every row (a `last` window reaching
    /// everything stops its pruning), and the subsample equals the twin's.
    #[test]
    fn ranges_equal_the_full_data_computation(data in prop::collection::vec(any::<u8>(), 1..160)) {
        let (dir, twin_dir) = (TempDir::new("ranges"), TempDir::new("ranges-twin"));
        let mut cfg = model_config();
        cfg.loss = LossSpec::Absolute { max: 7.0 };
        cfg.label_wait_ms = 5_000;
        cfg.windows = vec![
            WindowConfig { name: "last".into(), kind: WindowKind::Last(5), mature: false },
            WindowConfig { name: "span".into(), kind: WindowKind::SpanMs(4_000), mature: false },
            WindowConfig { name: "mature-span".into(), kind: WindowKind::SpanMs(6_000), mature: true },
            WindowConfig { name: "mature-last".into(), kind: WindowKind::Last(7), mature: true },
        ];
        let mut twin_cfg = cfg.clone();
        twin_cfg.windows.push(WindowConfig { name: "all".into(), kind: WindowKind::Last(u64::MAX / 4), mature: false });
        let mut store = Store::open(&dir.0).unwrap();
        let mut twin = Store::open(&twin_dir.0).unwrap();
        let (mut waiting, mut next, mut clock) = (Vec::<(usize, i64)>::new(), 0usize, 0i64);
        for (n, &b) in data.iter().enumerate() {
            let (kind, batch): (Kind, Vec<Record>) = if b % 3 != 2 {
                let batch = (0..1 + b as usize % 4).map(|i| {
                    next += 1;
                    clock += 700;
                    // Now and then one from several seconds back: into the middle of the ranges.
                    let t = if (b >> 4) & 3 == 0 && i == 0 { clock - 3_100 } else { clock };
                    waiting.push((next, t));
                    rec(next, t, b >> (i % 3))
                }).collect();
                (Kind::Prediction, batch)
            } else {
                let take = (1 + (b >> 2) as usize % 3).min(waiting.len());
                let from = if b & 0x20 == 0 { 0 } else { waiting.len() - take };
                let batch = waiting.drain(from..from + take).map(|(id, t)| rec(id, t + 300 + (b as i64 % 5) * 900, b >> 5)).collect();
                (Kind::Label, batch)
            };
            file(&mut store, &cfg, kind, n, &batch);
            file(&mut twin, &twin_cfg, kind, n, &batch);
            if b & 0x80 != 0 {
                drop(store);
                store = Store::open(&dir.0).unwrap();
            }
            for i in 0..cfg.windows.len() {
                let a = store.window_view(&cfg, i, 3).unwrap();
                let t = twin.window_view(&twin_cfg, i, 3).unwrap();
                let d = twin.direct_window(&twin_cfg, i).unwrap();
                let name = &cfg.windows[i].name;
                prop_assert_eq!(a.stats, d.stats, "window {} after file {}", name, n);
                let cohort = a.cohort.as_ref().map(|(r, c)| (*r, c.n(), c.known));
                prop_assert_eq!(cohort, d.cohort, "cohort of {} after file {}", name, n);
                prop_assert!(same(&a, &t), "window {} after file {}: {:?} vs the twin's {:?}", name, n, a, t);
                prop_assert!(a.sample.len() <= 3, "{}", a.sample.len());
            }
        }
    }
}

fn fixture() -> Value {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/bounds_fixture.json"))
        .expect("fixture present");
    serde_json::from_str(&text).expect("fixture parses")
}

/// 10 000 predictions with 17 errors, 5 of them among the newest 100 and 1 among the newest 50,
/// labelled in shuffled files so samples enter and leave the `last` windows many times: the
/// Clopper–Pearson bounds on each window's kept counts equal scipy.stats.beta.ppf on the same
/// (k, n) (tests/reference/bounds_fixture.json, cases (17, 10000), (5, 100), (1, 50)).
#[test]
fn clopper_pearson_on_the_kept_counts_matches_scipy() {
    let dir = TempDir::new("ranges-cp");
    let mut cfg = model_config();
    cfg.label_wait_ms = 86_400_000;
    cfg.windows = vec![
        WindowConfig { name: "all".into(), kind: WindowKind::SpanMs(86_400_000), mature: false },
        WindowConfig { name: "100".into(), kind: WindowKind::Last(100), mature: false },
        WindowConfig { name: "50".into(), kind: WindowKind::Last(50), mature: false },
    ];
    let n = 10_000usize;
    let mut wrong = vec![false; n];
    for i in [3, 400, 777, 1200, 2500, 3000, 4444, 5000, 6001, 7000, 8080, 9800] {
        wrong[i] = true; // 12 before the newest 100
    }
    for i in [9910, 9920, 9930, 9940] {
        wrong[i] = true; // 4 more among the newest 100 but not the newest 50
    }
    wrong[9975] = true;
    let mut store = Store::open(&dir.0).unwrap();
    let preds: Vec<Record> = (0..n)
        .map(|i| Record { line: 2, id: format!("p{i}"), time_ms: i as i64 * 10, value: "a".into(), features: vec![] })
        .collect();
    file(&mut store, &cfg, Kind::Prediction, 0, &preds);
    // Labels in ten files, each a stride of the ids, so every file reaches into every window.
    for f in 0..10usize {
        let labels: Vec<Record> = (f..n)
            .step_by(10)
            .map(|i| Record {
                line: 2,
                id: format!("p{i}"),
                time_ms: i as i64 * 10 + 5,
                value: if wrong[i] { "b".into() } else { "a".into() },
                features: vec![],
            })
            .collect();
        file(&mut store, &cfg, Kind::Label, 1 + f, &labels);
    }
    let fx = fixture();
    let case = |k: u64, n: u64| {
        fx["clopper_pearson"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| {
                c["k"].as_u64() == Some(k) && c["n"].as_u64() == Some(n) && c["confidence"].as_f64() == Some(0.95)
            })
            .unwrap_or_else(|| panic!("fixture case ({k}, {n}) missing"))
            .clone()
    };
    let conf = Confidence::new(0.95).unwrap();
    for (i, (k, n)) in [(17u64, 10_000u64), (5, 100), (1, 50)].into_iter().enumerate() {
        let view = store.window_view(&cfg, i, 20_000).unwrap();
        assert_eq!((view.stats.n_at_max(), view.stats.n()), (k, n), "window {i}");
        let s = LossSummary::with_sample(1.0, view.stats, None);
        let bounds = window::summary_bounds(&s, &cfg, conf);
        let cp = bounds.iter().find(|(m, _)| *m == Method::ClopperPearson).unwrap().1;
        let c = case(k, n);
        let (lo, hi) = (c["lower"].as_f64().unwrap(), c["upper"].as_f64().unwrap());
        assert!((cp.lower - lo).abs() <= 1e-10 * lo.max(1e-300), "({k}, {n}) lower {} vs scipy {lo}", cp.lower);
        assert!((cp.upper - hi).abs() <= 1e-10 * hi, "({k}, {n}) upper {} vs scipy {hi}", cp.upper);
    }
    // The subsample of the large window: at most max_samples, and the same after a restart.
    let before = store.window_view(&cfg, 0, 1_000).unwrap();
    assert!(before.sample.len() <= 1_000 && before.sample.len() >= 500, "{}", before.sample.len());
    drop(store);
    let again = Store::open(&dir.0).unwrap().window_view(&cfg, 0, 1_000).unwrap();
    assert_eq!(before.sample, again.sample);
    assert_eq!(before.stats, again.stats);
}

/// The sampling level is a geometric law: P(level ≥ j) = 2^-j for a uniform hash. Over 2^20
/// ids the count at level ≥ j is Binomial(2^20, 2^-j); each must lie within 5 standard
/// deviations (a false failure has probability below 10^-6 per level).
#[test]
fn levels_follow_the_geometric_law() {
    let n = 1usize << 20;
    let mut at_least = [0u64; 12];
    for i in 0..n {
        let l = level_of(&format!("req-{i:08}")) as usize;
        for c in at_least.iter_mut().take(l.min(11) + 1) {
            *c += 1;
        }
    }
    for (j, &c) in at_least.iter().enumerate() {
        let p = 0.5f64.powi(j as i32);
        let (mean, sd) = (n as f64 * p, (n as f64 * p * (1.0 - p)).sqrt());
        assert!((c as f64 - mean).abs() <= 5.0 * sd.max(1.0), "level ≥ {j}: {c} vs {mean} ± {sd}");
    }
}
