//! Simulation benchmark (not a test): what repeated looks do to false alarms, and what the
//! anytime alarms cost in detection delay.
//!
//! Part A: streams at the boundary of the null (Bernoulli(θ) losses, θ = 0.10), a look every 50
//! labels; the fraction of streams with any alarm within 2,000 and within 20,000 labels.
//! Part B: a step 0.10 → 0.20 after 3,000 labels with θ = 0.15 (a step of the size
//! a per-window rule is usually tuned for); false alarms before the step, median delay after it, and the
//! fraction of streams not alarmed within 5,000 labels of it.
//!
//! Part C: the harmful-shift test (`exceeded` at θ = reference upper bound + tolerance) after a
//! healthy period, with the bet the daemon uses (plug-in Kelly on an exponentially weighted
//! recent mean and variance) beside the bet borrowed from the confidence sequence that it
//! replaced, and the same at the boundary null.
//! Part D: what feeding predictions in prediction-time order once label_wait is over costs in
//! detection time against feeding labels as they arrive, when a mistake's label comes back 30 h
//! after the prediction and a correct one's after 2 h (label_wait 32 h).
//!
//! Run: cargo run --release --example alarm_sim [-- --streams R]

use std::collections::VecDeque;

use rand::rngs::Xoshiro256PlusPlus;
use rand::{RngExt, SeedableRng};
use riskbound::estimate::anytime::evidence::{ChangeDetector, SlaTest};
use riskbound::estimate::anytime::sequence::HoeffdingBoundary;
use riskbound::estimate::anytime::{PlugIn, Sequence, Tracker, TrackerSpec, TRUNCATION};
use riskbound::estimate::binomial::clopper_pearson;

const DELTA: f64 = 0.05;
const LOOK: usize = 50;
const WINDOW: usize = 500;

/// The alarm rules compared. Each sees the same stream.
struct Rules {
    total: (u64, u64),
    window: VecDeque<bool>,
    window_errors: u64,
    looks: u64,
    tracker: Tracker,
    change_short: ChangeDetector,
}

const NAMES: [&str; 8] = [
    "CP on all data so far, δ at every look",
    "CP on a sliding window of 500, δ at every look",
    "CP on all data, δ_k = δ/(k(k+1))",
    "CP on a sliding window of 500, δ_k spent",
    "exceeded since reset (betting e-process, every label)",
    "empirical-bernstein-cs lower bound > θ (every label)",
    "change: e-detector, horizon 10^4 (A = 2·10^5)",
    "change: e-detector, horizon 10^5 (A = 2·10^6, the default)",
];

impl Rules {
    fn new(theta: f64) -> Rules {
        let spec = TrackerSpec {
            delta: DELTA,
            loss_max: 1.0,
            grid: 2,
            hoeffding_boundary: HoeffdingBoundary::Stitched,
            sla_max_risk: Some(theta),
            shift_max_risk: None,
            change: Some((theta, ChangeDetector::threshold_for(100_000, DELTA))),
        };
        Rules {
            total: (0, 0),
            window: VecDeque::new(),
            window_errors: 0,
            looks: 0,
            tracker: Tracker::new(spec),
            change_short: ChangeDetector::new(theta, ChangeDetector::threshold_for(10_000, DELTA)),
        }
    }

    /// Takes one loss; returns which rules are alarming now.
    fn push(&mut self, wrong: bool, theta: f64) -> [bool; 8] {
        let x = f64::from(u8::from(wrong));
        self.tracker.push(x);
        self.change_short.push(self.tracker.n(), x);
        self.total.0 += 1;
        self.total.1 += u64::from(wrong);
        self.window.push_back(wrong);
        self.window_errors += u64::from(wrong);
        if self.window.len() > WINDOW {
            self.window_errors -= u64::from(self.window.pop_front().unwrap());
        }
        let mut out = [false; 8];
        if (self.total.0 as usize).is_multiple_of(LOOK) {
            self.looks += 1;
            let k = self.looks as f64;
            let spent = DELTA / (k * (k + 1.0));
            let (n, e) = self.total;
            let w = self.window.len() as u64;
            out[0] = clopper_pearson(e, n, DELTA).lower > theta;
            out[1] = clopper_pearson(self.window_errors, w, DELTA).lower > theta;
            out[2] = clopper_pearson(e, n, spent).lower > theta;
            out[3] = clopper_pearson(self.window_errors, w, spent).lower > theta;
        }
        out[4] = self.tracker.exceeded().unwrap().alarm_at().is_some();
        out[5] = self.tracker.bounds(Sequence::EmpiricalBernsteinCs).lower > theta;
        out[6] = self.change_short.alarm_at().is_some();
        out[7] = self.tracker.change().unwrap().alarm_at().is_some();
        out
    }
}

/// The bet the SLA tests used before: the confidence sequence's plug-in bet, positive whatever
/// the sign of the recent mean minus θ (kept here only to compare).
struct BorrowedBet {
    theta: f64,
    plug: PlugIn,
    log_capital: f64,
    fired: bool,
}

impl BorrowedBet {
    fn new(theta: f64) -> Self {
        BorrowedBet { theta, plug: PlugIn::default(), log_capital: 0.0, fired: false }
    }
    fn push(&mut self, x: f64) -> bool {
        let lambda = self.plug.bet((1.0 / DELTA).ln()).min(TRUNCATION / self.theta);
        self.log_capital += (lambda * (x - self.theta)).ln_1p();
        self.plug.push(x);
        self.fired |= self.log_capital >= (1.0 / DELTA).ln();
        self.fired
    }
}

fn median(mut d: Vec<usize>) -> String {
    d.sort_unstable();
    if d.is_empty() {
        "—".to_string()
    } else {
        d[d.len() / 2].to_string()
    }
}

fn part_c(streams: usize, rng: &mut Xoshiro256PlusPlus) {
    // A 2000-row reference at 5% error, tolerance 0.02, reference confidence 0.99.
    let runs = streams / 2;
    let (healthy, harmful, n_ref) = (1500usize, 1500usize, 2000u64);
    let (mut caught, mut early, mut delays) = ([0usize; 2], [0usize; 2], [Vec::new(), Vec::new()]);
    let mut null_alarms = [0usize; 2];
    let mut thetas = 0.0;
    for _ in 0..runs {
        let k = (0..n_ref).filter(|_| rng.random::<f64>() < 0.05).count() as u64;
        let theta = clopper_pearson(k, n_ref, 0.01).upper + 0.02;
        thetas += theta;
        let (mut new, mut old) = (SlaTest::new(theta), BorrowedBet::new(theta));
        let mut first = [None; 2];
        for t in 1..=healthy + harmful {
            let x = f64::from(u8::from(rng.random::<f64>() < if t <= healthy { 0.05 } else { 0.22 }));
            new.push(t as u64, x, (1.0 / DELTA).ln());
            let fired = [new.alarm_at().is_some(), old.push(x)];
            for i in 0..2 {
                if fired[i] && first[i].is_none() {
                    first[i] = Some(t);
                }
            }
        }
        for i in 0..2 {
            match first[i] {
                Some(t) if t <= healthy => early[i] += 1,
                Some(t) => {
                    caught[i] += 1;
                    delays[i].push(t - healthy)
                }
                None => {}
            }
        }
        // The boundary null: the risk at θ for 5000 labels.
        let (mut new, mut old) = (SlaTest::new(theta), BorrowedBet::new(theta));
        let mut fired = [false; 2];
        for t in 1..=5000u64 {
            let x = f64::from(u8::from(rng.random::<f64>() < theta));
            new.push(t, x, (1.0 / DELTA).ln());
            fired[0] |= new.alarm_at().is_some();
            fired[1] |= old.push(x);
        }
        for i in 0..2 {
            null_alarms[i] += usize::from(fired[i]);
        }
    }
    println!(
        "\nPart C: {runs} streams; a 2000-row reference at 5% error, tolerance 0.02, reference confidence 0.99 \
         (mean θ_shift {:.4}); 1500 labels at 0.05, then 1500 at 0.22; δ = {DELTA}\n",
        thetas / runs as f64
    );
    println!("| bet of the shift test | false alarm before the rise | caught within 1500 | median delay (labels) | P(false alarm within 5000) at risk = θ |");
    println!("|---|---|---|---|---|");
    for (i, name) in
        ["plug-in Kelly, recent mean and variance (the daemon's)", "borrowed from the confidence sequence (before)"]
            .iter()
            .enumerate()
    {
        println!(
            "| {name} | {:.3} | {:.3} | {} | {:.3} |",
            early[i] as f64 / runs as f64,
            caught[i] as f64 / runs as f64,
            median(delays[i].clone()),
            null_alarms[i] as f64 / runs as f64
        );
    }
}

fn part_d(streams: usize, rng: &mut Xoshiro256PlusPlus) {
    // 100 predictions an hour; the risk steps from 0.10 to 0.20 at hour 48; θ = 0.15.
    let runs = streams / 4;
    let (per_hour, step_h, hours, theta, wait_h) = (100usize, 48.0, 144usize, 0.15, 32.0);
    let mut results: [Vec<usize>; 2] = [Vec::new(), Vec::new()];
    let (mut early, mut never) = ([0usize; 2], [0usize; 2]);
    for _ in 0..runs {
        // (prediction time h, label time h, loss)
        let mut items: Vec<(f64, f64, f64)> = Vec::with_capacity(per_hour * hours);
        for i in 0..per_hour * hours {
            let t = i as f64 / per_hour as f64;
            let wrong = rng.random::<f64>() < if t < step_h { 0.10 } else { 0.20 };
            items.push((t, t + if wrong { 30.0 } else { 2.0 }, f64::from(u8::from(wrong))));
        }
        let end = hours as f64;
        // Mature: in prediction-time order, each at t + label_wait.
        let mut mature = SlaTest::new(theta);
        let mut at_mature = None;
        for (k, &(t, _, x)) in items.iter().enumerate() {
            if t + wait_h > end {
                break;
            }
            mature.push(k as u64 + 1, x, (1.0 / DELTA).ln());
            if mature.alarm_at().is_some() {
                at_mature = Some(t + wait_h);
                break;
            }
        }
        // Join order: as the labels arrive.
        let mut joined = items.clone();
        joined.sort_by(|a, b| a.1.total_cmp(&b.1));
        let mut join = SlaTest::new(theta);
        let mut at_join = None;
        for (k, &(_, tl, x)) in joined.iter().enumerate() {
            if tl > end {
                break;
            }
            join.push(k as u64 + 1, x, (1.0 / DELTA).ln());
            if join.alarm_at().is_some() {
                at_join = Some(tl);
                break;
            }
        }
        for (i, at) in [at_mature, at_join].into_iter().enumerate() {
            match at {
                Some(t) if t < step_h => early[i] += 1,
                Some(t) => results[i].push((t - step_h).round() as usize),
                None => never[i] += 1,
            }
        }
    }
    println!(
        "\nPart D: {runs} streams, 100 predictions an hour, risk 0.10 then 0.20 from hour 48, θ = 0.15; a mistake's \
         label comes 30 h after the prediction, a correct one's after 2 h; label_wait 32 h; {hours} h observed\n"
    );
    println!("| feed of the exceeded test | false alarm before the step | median hours from the step to the alarm | not alarmed |");
    println!("|---|---|---|---|");
    for (i, name) in [
        "predictions in prediction-time order once label_wait is over (the daemon's)",
        "labels as they arrive (join order, before)",
    ]
    .iter()
    .enumerate()
    {
        println!(
            "| {name} | {:.3} | {} | {:.3} |",
            early[i] as f64 / runs as f64,
            median(results[i].clone()),
            never[i] as f64 / runs as f64
        );
    }
}

fn main() {
    let mut streams = 1000usize;
    let args: Vec<String> = std::env::args().collect();
    if let Some(i) = args.iter().position(|a| a == "--streams") {
        streams = args[i + 1].parse().expect("--streams N");
    }
    let started = std::time::Instant::now();

    // Part A: the boundary null.
    let theta = 0.10;
    let (short, long) = (2_000usize, 20_000usize);
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(20_261_202);
    let mut fa_short = [0usize; 8];
    let mut fa_long = [0usize; 8];
    for _ in 0..streams {
        let mut rules = Rules::new(theta);
        let mut fired = [false; 8];
        for t in 1..=long {
            let a = rules.push(rng.random::<f64>() < theta, theta);
            for (f, a) in fired.iter_mut().zip(a) {
                *f |= a;
            }
            if t == short {
                for (c, f) in fa_short.iter_mut().zip(fired) {
                    *c += usize::from(f);
                }
            }
        }
        for (c, f) in fa_long.iter_mut().zip(fired) {
            *c += usize::from(f);
        }
    }
    let se = (DELTA * (1.0 - DELTA) / streams as f64).sqrt();
    println!("Part A: {streams} streams of Bernoulli(0.10) losses, θ = 0.10 (the boundary of the null), δ = {DELTA}, a look every {LOOK} labels");
    println!("(Monte Carlo standard error at 0.05: {se:.3})\n");
    println!("| rule | P(any false alarm) within 2,000 labels | within 20,000 labels |");
    println!("|---|---|---|");
    for i in 0..8 {
        println!(
            "| {} | {:.3} | {:.3} |",
            NAMES[i],
            fa_short[i] as f64 / streams as f64,
            fa_long[i] as f64 / streams as f64
        );
    }

    // Part B: a step change.
    let (theta, tau, after) = (0.15, 3_000usize, 5_000usize);
    let runs = streams / 2;
    let mut early = [0usize; 8];
    let mut never = [0usize; 8];
    let mut delays: Vec<Vec<usize>> = vec![Vec::new(); 8];
    for _ in 0..runs {
        let mut rules = Rules::new(theta);
        let mut first: [Option<usize>; 8] = [None; 8];
        for t in 1..=tau + after {
            let p = if t <= tau { 0.10 } else { 0.20 };
            let a = rules.push(rng.random::<f64>() < p, theta);
            for (f, a) in first.iter_mut().zip(a) {
                if a && f.is_none() {
                    *f = Some(t);
                }
            }
        }
        for i in 0..8 {
            match first[i] {
                Some(t) if t <= tau => early[i] += 1,
                Some(t) => delays[i].push(t - tau),
                None => never[i] += 1,
            }
        }
    }
    println!("\nPart B: {runs} streams, risk 0.10 for {tau} labels then 0.20; θ = 0.15, δ = {DELTA}\n");
    println!("| rule | false alarm before the step | median delay after it (labels) | not alarmed within {after} |");
    println!("|---|---|---|---|");
    for i in 0..8 {
        let mut d = delays[i].clone();
        d.sort_unstable();
        let median = if d.is_empty() { "—".to_string() } else { d[d.len() / 2].to_string() };
        println!(
            "| {} | {:.3} | {} | {:.3} |",
            NAMES[i],
            early[i] as f64 / runs as f64,
            median,
            never[i] as f64 / runs as f64
        );
    }
    part_c(streams, &mut rng);
    part_d(streams, &mut rng);
    eprintln!("({:.1} s)", started.elapsed().as_secs_f64());
}
