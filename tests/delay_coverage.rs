//! The delay-robust bounds against outside references and in seeded coverage simulations under
//! three label-delay mechanisms (outcome-dependent, feature-dependent, independent).

use riskbound::estimate::delay_dependence;
use riskbound::estimate::delay_robust::{self, Cohort};
use riskbound::estimate::{binomial, Confidence, Method};

fn fixture() -> serde_json::Value {
    let text =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/delay_robust_fixture.json"))
            .unwrap();
    serde_json::from_str(&text).unwrap()
}

#[test]
fn worst_case_completion_matches_scipy_beta_quantiles() {
    // Source: scipy.stats.beta.ppf on the completed counts k/N and (k + u)/N
    // (tests/reference/make_delay_robust_fixture.py, scipy 1.17.1).
    for c in fixture()["clopper_pearson_worst_case"].as_array().unwrap() {
        let (k, u, n) = (c["k"].as_u64().unwrap(), c["u"].as_u64().unwrap(), c["n"].as_u64().unwrap());
        let conf = Confidence::new(c["confidence"].as_f64().unwrap()).unwrap();
        let mut cohort = Cohort::new(1.0);
        let known: Vec<f64> = (0..n - u).map(|i| if i < k { 1.0 } else { 0.0 }).collect();
        cohort.push_group(known, u);
        let b = delay_robust::bounds(Method::ClopperPearson, &cohort, 1.0, conf).unwrap();
        let (lo, hi) = (c["lower"].as_f64().unwrap(), c["upper"].as_f64().unwrap());
        assert!((b.lower - lo).abs() <= 1e-10 * lo.max(1e-300) + 1e-13, "{c}: lower {}", b.lower);
        assert!((b.upper - hi).abs() <= 1e-10 * hi + 1e-13, "{c}: upper {}", b.upper);
    }
}

#[test]
fn kolmogorov_test_matches_scipy() {
    // Source: scipy.special.kolmogorov and scipy.stats.ks_2samp(...).statistic (fixture script).
    let fx = fixture();
    for c in fx["kolmogorov_sf"].as_array().unwrap() {
        let (x, want) = (c["x"].as_f64().unwrap(), c["sf"].as_f64().unwrap());
        assert!((delay_dependence::kolmogorov_sf(x) - want).abs() < 1e-12, "Q({x})");
    }
    for c in fx["ks_2samp"].as_array().unwrap() {
        let v = |k: &str| c[k].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect::<Vec<f64>>();
        let d = delay_dependence::ks_statistic(&mut v("a"), &mut v("b"));
        assert!((d - c["statistic"].as_f64().unwrap()).abs() < 1e-12);
    }
}

struct Lcg(u64);
impl Lcg {
    fn u(&mut self) -> f64 {
        self.0 = self.0.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        ((self.0 >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn exp(&mut self, mean: f64) -> f64 {
        -mean * self.u().ln()
    }
}

#[derive(Clone, Copy, Debug)]
enum Mechanism {
    /// Errors' labels take ten times longer (a late parcel is known late only after its time).
    OutcomeDependent,
    /// A feature raises both the error rate and the delay.
    FeatureDependent,
    /// Delays independent of everything.
    Independent,
}

/// One window: N predictions one second apart, looked at N seconds after the first; returns the
/// cohort (each second its own group) and the labelled losses.
fn window(mech: Mechanism, rng: &mut Lcg, n: usize, p: f64) -> (Cohort, Vec<f64>) {
    let mut cohort = Cohort::new(1.0);
    let mut labelled = Vec::new();
    for t in 0..n {
        let (wrong, delay) = match mech {
            Mechanism::OutcomeDependent => {
                let wrong = rng.u() < p;
                (wrong, rng.exp(if wrong { 600.0 } else { 60.0 }))
            }
            Mechanism::FeatureDependent => {
                let x = rng.u() < 0.5;
                let wrong = rng.u() < if x { 2.0 * p - 0.05 } else { 0.05 };
                (wrong, rng.exp(if x { 600.0 } else { 60.0 }))
            }
            Mechanism::Independent => (rng.u() < p, rng.exp(200.0)),
        };
        let loss = f64::from(u8::from(wrong));
        if t as f64 + delay <= n as f64 {
            cohort.push_group([loss], 0);
            labelled.push(loss);
        } else {
            cohort.push_group([], 1);
        }
    }
    (cohort, labelled)
}

#[test]
fn delay_robust_bounds_cover_under_every_delay_mechanism() {
    const RUNS: usize = 300;
    const N: usize = 1000;
    const P: f64 = 0.15;
    let conf = Confidence::new(0.95).unwrap();
    let delta = conf.delta();
    // δ + 3σ of a binomial proportion over RUNS runs.
    let limit = delta + 3.0 * (delta * (1.0 - delta) / RUNS as f64).sqrt();
    for (seed, mech) in
        [Mechanism::OutcomeDependent, Mechanism::FeatureDependent, Mechanism::Independent].into_iter().enumerate()
    {
        let mut rng = Lcg(1000 + seed as u64);
        let mut miss = [[0usize; 2]; 3]; // [method][side]: cp, betting, labelled-only cp
        let mut unknown = 0u64;
        for _ in 0..RUNS {
            let (cohort, labelled) = window(mech, &mut rng, N, P);
            unknown += cohort.unknown();
            for (i, m) in [Method::ClopperPearson, Method::Betting].into_iter().enumerate() {
                let b = delay_robust::bounds(m, &cohort, 1.0, conf).unwrap();
                miss[i][0] += usize::from(b.lower > P);
                miss[i][1] += usize::from(b.upper < P);
            }
            let k = labelled.iter().filter(|&&l| l == 1.0).count() as u64;
            let b = binomial::clopper_pearson(k, labelled.len() as u64, delta);
            miss[2][0] += usize::from(b.lower > P);
            miss[2][1] += usize::from(b.upper < P);
        }
        let rate = |m: usize| m as f64 / RUNS as f64;
        println!(
            "{mech:?}: mean unlabelled {:.1} of {N}; misses (lower, upper) of {RUNS}: delay-robust clopper-pearson {:?}, \
             delay-robust betting {:?}, labelled-only clopper-pearson {:?}",
            unknown as f64 / RUNS as f64,
            miss[0],
            miss[1],
            miss[2]
        );
        for (i, name) in ["clopper-pearson", "betting"].iter().enumerate() {
            for (side, &m) in miss[i].iter().enumerate() {
                assert!(rate(m) <= limit, "{mech:?} {name} side {side}: {} > {limit}", rate(m));
            }
        }
        if let Mechanism::OutcomeDependent | Mechanism::FeatureDependent = mech {
            // Labels of errors come late, so the labelled-only upper bound misses far more often
            // than δ: this is what the delay-robust bounds are for.
            assert!(rate(miss[2][1]) > 0.5, "{mech:?}: labelled-only upper misses {}", rate(miss[2][1]));
        }
    }
}

#[test]
fn the_delay_test_keeps_its_level_when_delays_do_not_depend_on_outcomes() {
    // H0: delays independent of outcomes; the labelled samples are those whose label came by the
    // look, so the delays are censored alike in both groups.
    const RUNS: usize = 400;
    let alpha = 0.05;
    let mut rng = Lcg(77);
    let mut rejected = 0usize;
    for _ in 0..RUNS {
        let mut rows = Vec::new();
        for t in 0..800 {
            let wrong = rng.u() < 0.2;
            let delay = rng.exp(300.0);
            if t as f64 + delay <= 800.0 {
                rows.push((f64::from(u8::from(wrong)), (delay * 1000.0) as i64));
            }
        }
        rejected += usize::from(delay_dependence::test(&rows, 1.0, true, alpha).dependent);
    }
    let limit = alpha + 3.0 * (alpha * (1.0 - alpha) / RUNS as f64).sqrt();
    println!("delay test under H0: {rejected} of {RUNS} rejected at α = {alpha}");
    assert!((rejected as f64 / RUNS as f64) <= limit);
}
