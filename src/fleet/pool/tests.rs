use super::*;
use crate::estimate::seeded::Seeded;
use crate::estimate::Confidence;

fn config(loss: &str, sla: &str) -> Config {
    let text = format!(
        "models:\n  - name: m\n    predictions: {{ dir: in, pattern: \"p-*.csv\", columns: {{ id: id, time: t, prediction: p }} }}\n    labels: {{ dir: in, pattern: \"l-*.csv\", columns: {{ id: id, time: t, label: y }} }}\n    {loss}\n    confidence: 0.95\n    windows: [{{ name: recent, last: 1000 }}, {{ name: hour, span: 1h }}]\n    {sla}\n"
    );
    crate::config::parse_elsewhere(&text, std::path::Path::new("/nowhere/riskbound.yaml")).unwrap()
}

fn sample(name: &str, instance: &str, labels: &[(&str, &str)], value: f64) -> Sample {
    let mut l: BTreeMap<String, String> = labels.iter().map(|(k, v)| (k.to_string(), v.to_string())).collect();
    l.insert("__name__".into(), name.into());
    l.insert("job".into(), "riskbound".into());
    l.insert("instance".into(), instance.into());
    Sample { labels: l, value }
}

/// One replica's losses per window (labelled) and its cohort's unlabelled count.
struct Replica {
    instance: &'static str,
    windows: Vec<(&'static str, Vec<f64>, u64)>,
    evidence: f64,
}

/// What a replica with these losses exports (the series the pooling reads), built from the
/// exact statistics as the daemon builds them.
fn exported(r: &Replica, model: &ModelConfig, out: &mut Observed) {
    let b = model.loss.max();
    let i = r.instance;
    let m = [("model", "m")];
    out.series.push(sample(names::BUILD_INFO, i, &[("version", "x")], 1.0));
    out.series.push(sample(names::LOSS_MAX, i, &[("model", "m"), ("loss", model.loss.name())], b));
    out.series.push(sample(names::CONFIDENCE, i, &[("model", "m"), ("guarantee", "anytime")], 0.95));
    if let Some(s) = &model.sla {
        out.series.push(sample(names::SLA_MAX, i, &m, s.max_risk));
        out.series.push(sample(names::ALARM_EVIDENCE, i, &[("model", "m"), ("test", "exceeded")], r.evidence));
    }
    let (mut joined, mut expired) = (0.0, 0.0);
    for (w, losses, unlabelled) in &r.windows {
        let mut st = LossStats::default();
        losses.iter().for_each(|&x| st.push(x, b));
        let mw = [("model", "m"), ("window", *w)];
        out.series.push(sample(names::SAMPLES, i, &mw, st.n() as f64));
        out.series.push(sample(names::TOTAL_LOSS, i, &mw, st.sum_scaled() * b));
        out.series.push(sample(names::TOTAL_SQUARED_LOSS, i, &mw, st.squares_scaled() * b * b));
        out.series.push(sample(names::COHORT, i, &mw, (st.n() + unlabelled) as f64));
        out.series.push(sample(names::COHORT_UNLABELLED, i, &mw, *unlabelled as f64));
        out.series.push(sample(names::COHORT_TOTAL_LOSS, i, &mw, st.sum_scaled() * b));
        out.series.push(sample(names::COHORT_TOTAL_SQUARED_LOSS, i, &mw, st.squares_scaled() * b * b));
        if *w == "recent" {
            joined += st.n() as f64;
            expired += *unlabelled as f64;
        }
    }
    out.series.push(sample(&format!("{}_total", names::LABELLED), i, &m, joined));
    out.series.push(sample(&format!("{}_total", names::EXPIRED), i, &m, expired));
    out.up.push(sample("up", i, &[], 1.0));
    out.scraped.push(sample("", i, &[], 1_790_000_000.0));
}

fn replicas(rng: &mut Seeded, binary: bool, rates: &[f64]) -> Vec<Replica> {
    let names = ["a:9417", "b:9417", "c:9417", "d:9417"];
    rates
        .iter()
        .enumerate()
        .map(|(k, &p)| {
            let draw = |rng: &mut Seeded, n: u64| -> Vec<f64> {
                (0..n)
                    .map(|_| if binary { f64::from(u8::from(rng.uniform() < p)) } else { 4.0 * p * rng.uniform() })
                    .collect()
            };
            let n1 = 200 + rng.below(500);
            let n2 = 50 + rng.below(900);
            Replica {
                instance: names[k],
                windows: vec![("recent", draw(rng, n1), rng.below(40)), ("hour", draw(rng, n2), rng.below(40))],
                evidence: 0.0,
            }
        })
        .collect()
}

fn observe(rs: &[Replica], model: &ModelConfig) -> Observed {
    let mut o = Observed { time: 1_790_000_010.0, ..Observed::default() };
    rs.iter().for_each(|r| exported(r, model, &mut o));
    o
}

/// The pooled bounds are the bounds of one window holding every replica's samples: exactly for
/// zero-one losses, to within the rounding allowance for others.
#[test]
fn pooled_bounds_are_the_bounds_of_the_union() {
    let mut rng = Seeded::new(41);
    for (loss, binary) in [("loss: zero-one", true), ("loss: absolute\n    loss_max: 4", false)] {
        let c = config(loss, "sla: { max_risk: 0.2 }");
        let model = &c.models[0];
        for round in 0..20 {
            let rs = replicas(&mut rng, binary, &[0.05, 0.1, 0.15][..1 + round % 3]);
            let report = pool(&c, &observe(&rs, model), 60.0, &BTreeSet::new());
            assert!(report.left_out.is_empty(), "{:?}", report.left_out);
            for (wi, w) in ["recent", "hour"].iter().enumerate() {
                let got = report.models.iter().find(|p| p.window == *w).unwrap();
                let mut union = LossSummary::new(model.loss.max());
                let mut cohort = Cohort::new(model.loss.max());
                for r in &rs {
                    r.windows[wi].1.iter().for_each(|&x| union.push(x));
                    cohort.push_group(r.windows[wi].1.iter().copied(), r.windows[wi].2);
                }
                assert_eq!((got.n, got.replicas), (union.n(), rs.len() as u64));
                let direct = crate::window::summary_bounds(&union, model, model.confidence);
                let robust = crate::window::cohort_bounds(&cohort, model, model.confidence);
                let check = |pooled: &BTreeMap<&'static str, Pair>, direct: &[(Method, Bounds)]| {
                    let direct: Vec<_> = direct.iter().filter(|(m, _)| *m != Method::Betting).collect();
                    assert_eq!(pooled.len(), direct.len(), "{loss} {w}: {pooled:?}");
                    for (m, b) in direct {
                        let p = pooled[m.name()];
                        let tol = if binary { 0.0 } else { 1e-9 };
                        assert!(
                            (p.lower - b.lower).abs() <= tol && (p.upper - b.upper).abs() <= tol,
                            "{loss} {w} {m}: pooled {p:?}, union {b:?}"
                        );
                        // Never narrower than the union's: the allowance only widens.
                        assert!(p.lower <= b.lower && p.upper >= b.upper, "{loss} {w} {m}: {p:?} {b:?}");
                    }
                };
                check(&got.bounds, &direct);
                check(&got.delay_robust.as_ref().unwrap().bounds, &robust);
                assert!(!got.bounds.contains_key("betting"));
            }
        }
    }
}

#[test]
fn replicas_down_stale_or_configured_differently_are_left_out_by_reason() {
    let c = config("loss: zero-one", "sla: { max_risk: 0.2 }");
    let model = &c.models[0];
    let mut rng = Seeded::new(7);
    let rs = replicas(&mut rng, true, &[0.1, 0.1, 0.1, 0.1]);
    let mut o = observe(&rs, model);
    let base = pool(&c, &o, 60.0, &BTreeSet::new());
    // b is down: its last scrape failed (Prometheus keeps no series of it, only up = 0).
    o.series.retain(|s| s.label("instance") != "b:9417");
    o.scraped.retain(|s| s.label("instance") != "b:9417");
    o.up.iter_mut().filter(|s| s.label("instance") == "b:9417").for_each(|s| s.value = 0.0);
    // c was last scraped 5 minutes ago (a federation or remote-write delay).
    o.scraped.iter_mut().filter(|s| s.label("instance") == "c:9417").for_each(|s| s.value -= 300.0);
    // d runs at another confidence.
    o.series
        .iter_mut()
        .filter(|s| s.label("instance") == "d:9417" && s.label("__name__") == names::CONFIDENCE)
        .for_each(|s| s.value = 0.99);
    // A target of another job that is down is not a replica.
    let mut other = sample("up", "db:5432", &[], 0.0);
    other.labels.insert("job".into(), "postgres".into());
    o.up.push(other);
    let r = pool(&c, &o, 60.0, &BTreeSet::new());
    let why: Vec<(&str, &str, LeftOut)> =
        r.left_out.iter().map(|l| (l.instance.as_str(), l.model.as_str(), l.reason)).collect();
    assert_eq!(
        why,
        vec![
            ("b:9417", "", LeftOut::Down),
            ("c:9417", "", LeftOut::Stale),
            ("d:9417", "m", LeftOut::ConfidenceMismatch)
        ]
    );
    assert_eq!(r.replicas_seen, 4);
    let recent = r.models.iter().find(|w| w.window == "recent").unwrap();
    assert_eq!((recent.replicas, recent.n), (1, rs[0].windows[0].1.len() as u64));
    assert!(base.models[0].n > recent.n);

    // Loss, max_risk and a missing window series, each on its own.
    for (what, reason) in
        [("loss", LeftOut::LossMismatch), ("max_risk", LeftOut::MaxRiskMismatch), ("window", LeftOut::SeriesMissing)]
    {
        let mut o = observe(&rs[..2], model);
        for s in o.series.iter_mut().filter(|s| s.label("instance") == "b:9417") {
            match (what, s.label("__name__")) {
                ("loss", n) if n == names::LOSS_MAX => {
                    s.labels.insert("loss".into(), "absolute".into());
                }
                ("max_risk", n) if n == names::SLA_MAX => s.value = 0.25,
                _ => {}
            }
        }
        if what == "window" {
            o.series.retain(|s| {
                !(s.label("instance") == "b:9417"
                    && s.label("window") == "hour"
                    && s.label("__name__") == names::TOTAL_SQUARED_LOSS)
            });
        }
        let r = pool(&c, &o, 60.0, &BTreeSet::new());
        assert_eq!(r.left_out.len(), 1, "{what}: {:?}", r.left_out);
        assert_eq!((r.left_out[0].instance.as_str(), r.left_out[0].reason), ("b:9417", reason), "{what}");
        let hour = r.models.iter().find(|w| w.window == "hour").unwrap();
        assert_eq!(hour.replicas, 1, "{what}");
        let recent = r.models.iter().find(|w| w.window == "recent").unwrap();
        assert_eq!(recent.replicas, if what == "window" { 2 } else { 1 }, "{what}");
    }
}

/// The fleet alarm is the mean of the e-values: it stays off while one replica's evidence alone
/// is past the threshold and the others have none, and fires once the mean crosses.
#[test]
fn the_fleet_alarm_fires_when_the_mean_e_value_crosses_and_not_before() {
    let c = config("loss: zero-one", "sla: { max_risk: 0.2 }");
    let model = &c.models[0];
    let threshold = (1.0f64 / 0.05).ln();
    let mut rng = Seeded::new(3);
    let mut rs = replicas(&mut rng, true, &[0.1, 0.1, 0.1]);
    let look =
        |rs: &[Replica], latched: &BTreeSet<String>| pool(&c, &observe(rs, model), 60.0, latched).alarms[0].clone();
    // One replica at e^4 = 54.6 > 20 on its own, two at 1: mean (54.6 + 2) / 3 = 18.9 < 20.
    rs[0].evidence = 4.0;
    let a = look(&rs, &BTreeSet::new());
    assert_eq!((a.replicas, a.firing), (3, false));
    assert!((a.log_evidence - ((4f64.exp() + 2.0) / 3.0).ln()).abs() < 1e-12);
    assert!((a.log_threshold - threshold).abs() < 1e-15);
    // The others gather some evidence: (54.6 + e^1.5 + e) / 3 = 20.6 ≥ 20.
    rs[1].evidence = 1.5;
    rs[2].evidence = 1.0;
    let a = look(&rs, &BTreeSet::new());
    assert!(a.firing && a.log_evidence >= threshold, "{a:?}");
    // Served, a fired alarm stays fired at later looks whatever the mean does.
    rs.iter_mut().for_each(|r| r.evidence = -3.0);
    assert!(!look(&rs, &BTreeSet::new()).firing);
    assert!(look(&rs, &BTreeSet::from(["m".to_string()])).firing);
    // Tiny and huge evidence stay finite (log-sum-exp).
    assert_eq!(log_mean_exp(&[-1e6, -1e6]), Some(-1e6));
    assert!((log_mean_exp(&[800.0, 0.0]).unwrap() - (800.0 - 2f64.ln())).abs() < 1e-9);
}

#[test]
fn the_pooled_sla_state_follows_the_window_rules_on_pooled_counts() {
    let c = config("loss: zero-one", "sla: { max_risk: 0.2, min_samples: 500, min_label_coverage: 0.9 }");
    let model = &c.models[0];
    let sla = model.sla.as_ref().unwrap();
    let errs = |n: usize, k: usize| -> Vec<f64> { (0..n).map(|i| f64::from(u8::from(i < k))).collect() };
    let one = |instance, n, k, unlabelled| Replica {
        instance,
        windows: vec![("recent", errs(n, k), unlabelled), ("hour", errs(n, k), unlabelled)],
        evidence: 0.0,
    };
    // 300 samples each: too few alone (min_samples 500), enough pooled; 5% errors, well within.
    let rs = [one("a:1", 300, 15, 0), one("b:1", 300, 15, 0)];
    let r = pool(&c, &observe(&rs[..1], model), 60.0, &BTreeSet::new());
    assert_eq!(r.models[0].sla_state, Some("inconclusive"));
    assert_eq!(r.models[0].sla_reason, Some(SlaReason::TooFewSamples.describe()));
    let r = pool(&c, &observe(&rs, model), 60.0, &BTreeSet::new());
    assert_eq!((r.models[0].sla_state, r.models[0].decided_by), (Some("ok"), Some("clopper-pearson")));
    // The delay-robust cohort decides by default: CP on (k + u, n + u), computed here directly.
    let cp = crate::estimate::binomial::clopper_pearson(30, 600, Confidence::new(0.95).unwrap().delta());
    assert_eq!(r.models[0].delay_robust.as_ref().unwrap().bounds["clopper-pearson"].upper, cp.upper);
    assert_eq!(sla.decide_on, DecideOn::DelayRobust);
    // Coverage pooled over replicas: 600 labelled, 100 expired → 0.857 < 0.9.
    let rs = [one("a:1", 300, 15, 0), one("b:1", 300, 15, 100)];
    let r = pool(&c, &observe(&rs, model), 60.0, &BTreeSet::new());
    assert_eq!(r.label_coverage["m"], Some(600.0 / 700.0));
    assert_eq!(r.models[0].sla_reason, Some(SlaReason::LowLabelCoverage.describe()));
    // 30% errors on 600: violated.
    let rs = [one("a:1", 300, 90, 0), one("b:1", 300, 90, 0)];
    let r = pool(&c, &observe(&rs, model), 60.0, &BTreeSet::new());
    assert_eq!(r.models[0].sla_state, Some("violated"));
}

/// The fleet view reads a replica's config where neither its directories nor its shift
/// reference exist; the replica itself still refuses both.
#[test]
fn a_replica_config_is_read_without_its_files() {
    let sla = "sla: { max_risk: 0.2, reference: { file: validation.csv, columns: { prediction: p, label: y }, tolerance: 0.05 } }";
    let c = config("loss: zero-one", sla);
    assert!(c.models[0].sla.as_ref().unwrap().reference.is_none());
    let e = crate::config::parse(
        "models:\n  - name: m\n    predictions: { dir: in, pattern: \"p*\", columns: { id: id, time: t, prediction: p } }\n    labels: { dir: in, pattern: \"l*\", columns: { id: id, time: t, label: y } }\n    windows: [{ name: w, last: 10 }]\n",
        std::path::Path::new("/nowhere/riskbound.yaml"),
    )
    .unwrap_err()
    .to_string();
    assert!(e.contains("cannot read directory /nowhere/in"), "{e}");
}

#[test]
fn betting_stands_aside_for_empirical_bernstein_and_queries_name_every_series() {
    assert_eq!(deciding_method(Method::Betting), Method::EmpiricalBernstein);
    assert_eq!(deciding_method(Method::ClopperPearson), Method::ClopperPearson);
    let [series, scraped, up] = queries(Some("rb\"x"));
    assert!(
        series.starts_with("{__name__=~\"riskbound_build_info|") && series.ends_with(",job=\"rb\\\"x\"}"),
        "{series}"
    );
    for n in series_names() {
        assert!(series.contains(&n), "{n}");
    }
    assert!(series.contains("riskbound_samples_labelled_total|riskbound_predictions_expired_total"));
    assert_eq!(scraped, "timestamp(riskbound_build_info{job=\"rb\\\"x\"})");
    assert_eq!(up, "up{job=\"rb\\\"x\"}");
    assert_eq!(queries(None)[1..], ["timestamp(riskbound_build_info)".to_string(), "up".to_string()]);
}
