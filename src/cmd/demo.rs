//! `riskbound demo`: the daemon on a scenario of our own invention, replayed fast.
//!
//! A fictional parcel-delivery company runs a classifier that predicts whether a parcel will
//! arrive late. Predictions are written in hourly batches; the true outcome arrives in hourly
//! label batches, and when depends on the outcome, as it does in life: an on-time parcel is known
//! on delivery (half a day to a day and a half), a late one only after its promised time has
//! passed (three to four days). The model mostly misses late parcels, so the labels of its
//! mistakes come back last, and the newest labels look better than the model is. A few labels
//! never arrive. For the first twelve days the error rate is about 6% everywhere; then the
//! north-east region's error jumps, which lifts the overall error past the 10% SLA. The windows
//! built on labelled samples alone are fooled by the delays; the delay-robust bounds (and the
//! SLA state they decide) and the mature window are not. The inputs are tested too, without
//! labels, against a reference of the healthy period's inputs: the north-east change leaves the
//! inputs alone (a harmful change the input-shift tests cannot see), and from day 16 a new bulky
//! goods customer makes parcels heavier without making the model worse (a harmless shift the
//! input-shift alarm pages on: a shift of the inputs is not a rise of the risk). The demo writes the
//! batches into a folder as a serving stack would (write under a temporary name, then rename),
//! runs the real daemon on it, and prints the windows, their bounds and SLA states as they move.

use std::fmt::Write as _;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::Context;

use crate::app;
use crate::estimate::anytime::Sequence;
use crate::estimate::Method;
use crate::window::Snapshot;

/// Options of `riskbound demo`.
#[derive(clap::Args, Debug)]
pub struct DemoArgs {
    /// Stop after the replay instead of serving /metrics until Ctrl-C
    #[arg(long)]
    pub exit_when_done: bool,
    /// Address for /metrics
    #[arg(long, default_value = "127.0.0.1:9417")]
    pub listen: String,
    /// Folder for the scenario's batch files, config, state and report (kept); default: a new
    /// folder under the system's temporary folder
    #[arg(long, value_name = "DIR")]
    pub dir: Option<PathBuf>,
    /// Simulated days to replay
    #[arg(long, default_value_t = 21)]
    pub days: u32,
    /// Real milliseconds per simulated hour
    #[arg(long, default_value_t = 15)]
    pub ms_per_hour: u64,
}

const REGIONS: [&str; 4] = ["north", "south", "west", "north-east"];
const CARRIERS: [&str; 3] = ["carrier-amber", "carrier-birch", "carrier-cobalt"];
/// 2026-11-02T00:00:00Z, the scenario's first hour.
const T0: i64 = 1_793_577_600;
const HOUR: i64 = 3600;

struct Pending {
    arrives: i64,
    id: String,
    outcome: &'static str,
}

/// The demo's config: two windows and a 10% SLA.
fn config_text(listen: &str) -> String {
    format!(
        "# riskbound demo: a fictional parcel-delivery model (see `riskbound demo --help`)
listen: \"{listen}\"
state_dir: state
rescan_interval: 2s
# one point per simulated hour for the status page and the report
history: {{ every: 1h, keep: 90d }}
models:
  - name: parcel-late
    predictions:
      {{ dir: batches, pattern: \"pred-*.csv\", columns: {{ id: request_id, time: ts, prediction: predicted }} }}
    labels:
      {{ dir: batches, pattern: \"label-*.csv\", columns: {{ id: request_id, time: observed, label: outcome }} }}
    loss: zero-one
    confidence: 0.95
    label_wait: 5d
    windows:
      # the day whose label_wait is over: every label that will come has come
      - {{ name: settled, span: 24h, mature: true }}
      - {{ name: day, span: 24h }}
      - {{ name: recent, last: 500 }}
    sla: {{ max_risk: 0.10 }}
    # which regions and carriers are over the SLA, certified over the whole searched class
    slices: {{ categorical: [region, carrier], top: 3 }}
    # label-free: have the inputs moved away from those of a healthy period?
    input_shift:
      reference: {{ file: reference-inputs.csv }}
      columns: [weight_kg]
      categorical: [region, carrier]
      window: {{ name: recent-inputs, last: 500 }}
      every: 6h
      alarm: {{ sample_rate: 0.25 }}
"
    )
}

/// The input-shift reference: 6000 parcels of the healthy period, drawn as the replay draws
/// them (from a generator of its own, so the replay's stream is the same with or without it).
fn reference_inputs() -> String {
    let mut rng = crate::estimate::seeded::Seeded::new(20_261_130);
    let mut body = String::from("region,carrier,weight_kg\n");
    for _ in 0..6000 {
        let region = REGIONS[rng.below(4) as usize];
        let carrier = CARRIERS[rng.below(3) as usize];
        let _ = writeln!(body, "{region},{carrier},{:.1}", 0.2 + 30.0 * rng.uniform());
    }
    body
}

/// From this day on, 40% of parcels come from a bulky-goods customer (20 to 60 kg): the inputs
/// change, the model's error does not.
const BULKY_FROM_DAY: i64 = 16;

fn publish(dir: &Path, name: &str, body: &str) -> anyhow::Result<()> {
    let tmp = dir.join(format!(".{name}.tmp"));
    std::fs::write(&tmp, body)?;
    std::fs::rename(&tmp, dir.join(name))?;
    Ok(())
}

fn stamp(t: i64) -> String {
    let dt = time::OffsetDateTime::from_unix_timestamp(t).expect("scenario times are valid");
    format!("{:04}{:02}{:02}{:02}", dt.year(), dt.month() as u8, dt.day(), dt.hour())
}

fn rfc3339(t: i64) -> String {
    time::OffsetDateTime::from_unix_timestamp(t)
        .expect("scenario times are valid")
        .format(&time::format_description::well_known::Rfc3339)
        .expect("RFC 3339 formatting of a valid time")
}

/// The table of windows the demo prints.
pub fn table(snap: &Snapshot) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{:<12} {:<8} {:>6} {:>9} {:>21}  {:>6} {:>7} {:>21}  sla state (delay-robust)",
        "model", "window", "n", "observed", "cp labelled-only", "cohort", "no label", "cp delay-robust"
    );
    let pair =
        |b: Option<crate::estimate::Bounds>| b.map_or("-".to_string(), |b| format!("[{:.4}, {:.4}]", b.lower, b.upper));
    for m in &snap.models {
        for w in &m.windows {
            let cp = w.bounds.iter().find(|(k, _)| *k == Method::ClopperPearson).map(|(_, b)| *b);
            let dr = w.cohort.as_ref().and_then(|c| c.bounds.iter().find(|(k, _)| *k == Method::ClopperPearson));
            let (cn, cu) = w.cohort.as_ref().map_or((0, 0), |c| (c.predictions, c.unlabelled));
            let state = w.state.map_or("-".to_string(), |(st, why)| format!("{} ({})", st.as_str(), why.describe()));
            let _ = writeln!(
                s,
                "{:<12} {:<8} {:>6} {:>9.4} {:>21}  {:>6} {:>7} {:>21}  {}",
                m.name,
                w.name,
                w.n,
                w.mean,
                pair(cp),
                cn,
                cu,
                pair(dr.map(|d| d.1)),
                state
            );
            if let Some(sl) = &w.slices {
                for l in sl.top.iter().filter(|l| l.violates) {
                    let _ = writeln!(
                        s,
                        "{:<12} {:<8} slice {} is over the SLA: mean {:.4}, certified lower bound {:.4} > {:.2} ({} certificate, n {})",
                        "",
                        "",
                        l.description,
                        l.mean,
                        l.lower,
                        m.sla.as_ref().map_or(f64::NAN, |x| x.max_risk),
                        l.certified_by,
                        l.n
                    );
                }
            }
        }
        let a = &m.anytime;
        if let Some((_, b)) = a.bounds.iter().find(|(q, _)| *q == Sequence::BettingCs) {
            let alarms: Vec<String> = a
                .alarms
                .iter()
                .map(|x| match x.fired_at {
                    Some(n) => format!("{} FIRED at prediction {n}", x.test.as_str()),
                    None => format!(
                        "{} quiet (log evidence {:.1} of {:.1})",
                        x.test.as_str(),
                        x.log_evidence,
                        x.log_threshold
                    ),
                })
                .collect();
            let _ = writeln!(
                s,
                "{:<12} since reset: {} predictions past label_wait, mean {:.4}, betting-cs [{:.4}, {:.4}] (anytime); alarms: {}",
                "",
                a.n,
                a.mean,
                b.lower,
                b.upper,
                if alarms.is_empty() { "none (no sla)".to_string() } else { alarms.join(", ") }
            );
            if super::track::left_sequence(*b, a.mean) {
                // The running intersection pinned the sequence while the mean moved on.
                let _ = writeln!(
                    s,
                    "{:<12} the mean left the sequence: the risk has not been constant since the reset, so read the windows",
                    ""
                );
            }
        }
        let _ = writeln!(
            s,
            "{:<12} awaiting label: {}, labelled: {}, expired unlabelled: {}, label coverage: {}",
            "",
            m.awaiting,
            m.counters.joined,
            m.counters.expired,
            m.label_coverage.map_or("-".into(), |c| format!("{:.3}", c))
        );
        if let Some(sh) = &m.input_shift {
            let _ = writeln!(s, "{:<12} {}", "", input_shift_line(sh));
        }
        let d = &m.delay_dependence;
        if let (Some(p), [bad, good]) = (d.p_value, &d.groups) {
            let med = |g: &crate::estimate::delay_dependence::DelayGroup| {
                g.median_s.map_or("-".to_string(), |v| format!("{:.1}h", v / 3600.0))
            };
            let _ = writeln!(
                s,
                "{:<12} label delay by outcome: median {} ({}, n {}) vs {} ({}, n {}); KS p = {:.2e}{}",
                "",
                med(bad),
                bad.outcome,
                bad.n,
                med(good),
                good.outcome,
                good.n,
                p,
                if d.dependent {
                    ": DELAYS DEPEND ON OUTCOMES, the labelled-only bounds are not to be trusted"
                } else {
                    ""
                }
            );
        }
    }
    s
}

/// The input-shift look and alarm in one line.
fn input_shift_line(sh: &crate::window::shift::ShiftSnapshot) -> String {
    let look = match &sh.look {
        None => "no look yet".to_string(),
        Some(l) => match &l.outcome {
            Err(why) => format!("look inconclusive ({why})"),
            Ok(t) => format!(
                "look at {} of the newest {}: permutation p = {}, spectral p = {:.4}{}",
                l.n_current,
                l.in_window,
                t.permutation_p.map_or("-".into(), |p| format!("{p:.4}")),
                t.spectral.p_value,
                if t.permutation_p.unwrap_or(t.spectral.p_value) <= 1.0 - sh.confidence { " SHIFTED" } else { "" }
            ),
        },
    };
    let alarm = match &sh.alarm {
        None => "no alarm".to_string(),
        Some(a) => match a.fired_at {
            Some(n) => format!("alarm FIRED at pair {n} ({} reference points left)", a.pool_left),
            None => format!(
                "alarm quiet (log evidence {:.1} of {:.1}, {} pairs, {} reference points left)",
                a.log_evidence, a.log_threshold, a.pairs, a.pool_left
            ),
        },
    };
    format!("inputs vs reference ({}): {look}; {alarm}. A shift of the inputs is not a rise of the risk", sh.window)
}

/// Runs the demo.
/// `riskbound demo`: logs for people, then the scenario.
pub fn main(a: &DemoArgs) -> anyhow::Result<()> {
    super::run::init_logs(super::cli::LogFormat::Human);
    run(a)
}

pub fn run(a: &DemoArgs) -> anyhow::Result<()> {
    // Kept after the demo, so that the report it writes can be read.
    let root = match &a.dir {
        Some(d) => d.clone(),
        None => std::env::temp_dir().join(format!("riskbound-demo-{}", std::process::id())),
    };
    let batches = root.join("batches");
    std::fs::create_dir_all(&batches).with_context(|| format!("creating {}", batches.display()))?;
    let config_path = root.join("riskbound.yaml");
    std::fs::write(&config_path, config_text(&a.listen))?;
    std::fs::write(root.join("reference-inputs.csv"), reference_inputs())?;
    let config = crate::config::load(&config_path).map_err(|e| anyhow::anyhow!("{e}"))?;
    let running = app::start(config)?;
    let url = format!("http://{}/metrics", running.addr);
    println!("riskbound demo: a fictional parcel-delivery model, replayed at {} ms per simulated hour", a.ms_per_hour);
    println!("batch files and config: {}", root.display());
    println!("status page: http://{}/  (bounds over time, states, alarms, slices)", running.addr);
    println!("scrape: {url}");
    println!(
        "bounds assume i.i.d. predictions within a window and a bounded loss; the delay-robust bounds, which decide"
    );
    println!("the SLA state, count a missing label at its worst and so hold whatever the delays depend on; the labelled-only");
    println!(
        "bounds also assume labels are not delayed by outcome, which this scenario breaks on purpose. The anytime"
    );
    println!("sequences and alarms take predictions in prediction-time order once label_wait (5d) is over.\n");

    // The project's one seeded generator: the scenario is the same on every run.
    let mut rng = crate::estimate::seeded::Seeded::new(20_261_201);
    // The bulky parcels draw from their own generator, so the rest of the scenario is the same.
    let mut bulky = crate::estimate::seeded::Seeded::new(20_261_216);
    let mut pending: Vec<Pending> = Vec::new();
    let hours = i64::from(a.days) * 24;
    let mut next_id = 0u64;
    let mut shift_told = false;
    for h in 0..hours {
        let t = T0 + h * HOUR;
        let day = h / 24;
        // Predictions of this hour.
        let mut body = String::from("request_id,ts,region,carrier,weight_kg,predicted\n");
        for _ in 0..(30 + rng.below(20)) {
            let id = format!("p{next_id:07}");
            next_id += 1;
            let region = REGIONS[rng.below(4) as usize];
            let outcome = if rng.uniform() < 0.3 { "late" } else { "on-time" };
            // The model mostly misses late parcels: about 6% wrong overall, 25% in the
            // north-east from day 12 on.
            let shifted = region == "north-east" && day >= 12;
            let err = match (outcome, shifted) {
                ("late", false) => 0.15,
                ("late", true) => 0.6,
                (_, false) => 0.022,
                (_, true) => 0.1,
            };
            let wrong = rng.uniform() < err;
            let predicted = if wrong {
                if outcome == "late" {
                    "on-time"
                } else {
                    "late"
                }
            } else {
                outcome
            };
            let ts = t + rng.below(HOUR as u64) as i64;
            let carrier = CARRIERS[rng.below(3) as usize];
            let mut weight = 0.2 + 30.0 * rng.uniform();
            if day >= BULKY_FROM_DAY && bulky.uniform() < 0.4 {
                weight = 20.0 + 40.0 * bulky.uniform();
            }
            let _ = writeln!(body, "{id},{},{region},{carrier},{weight:.1},{predicted}", rfc3339(ts));
            if rng.uniform() < 0.98 {
                // A late parcel is known late only once its promised time has passed.
                let delay = if outcome == "late" {
                    3 * 86_400 + rng.below(86_400) as i64
                } else {
                    43_200 + rng.below(86_400) as i64
                };
                pending.push(Pending { arrives: ts + delay, id, outcome });
            }
        }
        publish(&batches, &format!("pred-{}.csv", stamp(t)), &body)?;
        // Labels that became known during this hour.
        let (due, rest): (Vec<Pending>, Vec<Pending>) = pending.drain(..).partition(|p| p.arrives < t + HOUR);
        pending = rest;
        if !due.is_empty() {
            let mut body = String::from("request_id,observed,outcome\n");
            for p in &due {
                let _ = writeln!(body, "{},{},{}", p.id, p.arrives, p.outcome);
            }
            publish(&batches, &format!("label-{}.csv", stamp(t)), &body)?;
        }
        std::thread::sleep(Duration::from_millis(a.ms_per_hour));
        if h % 24 == 23 {
            running.wait_rounds(1, Duration::from_secs(30));
            let snap = running.snapshot.read().expect("snapshot lock").clone();
            println!(
                "simulated day {:>2} of {} ({}){}",
                day + 1,
                a.days,
                &rfc3339(t)[..10],
                match day {
                    d if d >= BULKY_FROM_DAY => "  north-east error now about 25%; heavier parcels from a new customer",
                    d if d >= 12 => "  north-east error now about 25%",
                    _ => "",
                }
            );
            print!("{}", table(&snap));
            let fired = snap.models.iter().any(|m| {
                m.input_shift.as_ref().and_then(|sh| sh.alarm.as_ref()).is_some_and(|al| al.fired_at.is_some())
            });
            if fired && !shift_told {
                shift_told = true;
                println!(
                    "  -> the inputs changed and the label-free alarm says so now, days before the labels of these parcels \
                     (0.5 to 4 days late) can say whether the model got worse; in this scenario the heavier parcels do it no harm"
                );
            }
            println!();
            std::io::stdout().flush()?;
        }
    }
    running.wait_rounds(2, Duration::from_secs(30));
    let report = root.join("report.html");
    super::report::main(&super::report::ReportArgs {
        config: config_path.clone(),
        model: None,
        from: None,
        to: None,
        state: None,
        out: report.clone(),
    })?;
    println!("replay done. Status page http://{}/ ; scrape {url}", running.addr);
    println!("the validator's report of the 21 days: {} (the folder is kept; remove it when done)", report.display());
    let result = if a.exit_when_done {
        running.shutdown()
    } else {
        println!("serving until Ctrl-C");
        running.run_until_signal()
    };
    result
}
