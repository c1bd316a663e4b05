//! Simulation benchmark (not a test): what repeated looks do to false alarms, and what the
//! anytime alarms cost in detection delay.
//!
//! Part A: streams at the boundary of the null (Bernoulli(θ) losses, θ = 0.10), a look every 50
//! labels; the fraction of streams with any alarm within 2,000 and within 20,000 labels.
//! Part B: a step 0.10 → 0.20 after 3,000 labels with θ = 0.15 (the scenario of
//! shared/METHODS.md §2.8); false alarms before the step, median delay after it, and the
//! fraction of streams not alarmed within 5,000 labels of it.
//!
//! Run: cargo run --release --example alarm_sim [-- --streams R]

use std::collections::VecDeque;

use rand::rngs::Xoshiro256PlusPlus;
use rand::{RngExt, SeedableRng};
use riskbound::estimate::anytime::evidence::ChangeDetector;
use riskbound::estimate::anytime::sequence::HoeffdingBoundary;
use riskbound::estimate::anytime::{Sequence, Tracker, TrackerSpec};
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
    eprintln!("({:.1} s)", started.elapsed().as_secs_f64());
}
