//! The validator's report: one self-contained HTML file of a period, built from the durable
//! history and the file table. Everything in the `numbers` section is a function of the files
//! taken and their order, so the replay it names writes the same section again (tested).

use std::fmt::Write as _;

use super::html::{self, chart, chart_points, day_str, esc, num, num_cell, state_badge, time_str, BandChoice};
use crate::config::ModelConfig;
use crate::window::history::{deciding, state_rank, HistoryPoint};
use crate::window::TakenFile;

/// One model's part of the report.
pub struct ModelReport<'a> {
    pub config: &'a ModelConfig,
    /// Its history points inside the period, oldest first.
    pub history: Vec<HistoryPoint>,
}

/// What the report is made of.
pub struct ReportInput<'a> {
    pub config_path: String,
    pub config_text: String,
    pub config_sha256: String,
    pub state_dir: String,
    pub from_ms: Option<i64>,
    pub to_ms: Option<i64>,
    pub generated_ms: i64,
    pub models: Vec<ModelReport<'a>>,
    /// The files taken in the period (their accepted rows' event times meet it).
    pub files: Vec<TakenFile>,
    /// How many files the replay reads (the period's and every earlier one the state still
    /// remembered), where its list is, and the commands.
    pub replay_files: usize,
    pub manifest: String,
    pub replay_commands: Vec<String>,
}

/// The methods and their published sources.
const METHODS: &[(&str, &str)] = &[
    ("clopper-pearson", "exact binomial interval: Clopper, C. J., Pearson, E. S. (1934), Biometrika 26(4), 404-413"),
    ("hoeffding", "Hoeffding, W. (1963), Probability inequalities for sums of bounded random variables, JASA 58, 13-30"),
    ("empirical-bernstein", "Maurer, A., Pontil, M. (2009), Empirical Bernstein bounds and sample variance penalization, COLT"),
    ("kl", "the Chernoff bound in binary relative-entropy form, inverted exactly (Hoeffding 1963, Thm 1)"),
    ("betting", "Waudby-Smith, I., Ramdas, A. (2024), Estimating means of bounded random variables by betting, JRSS-B 86(1)"),
    ("delay-robust bounds", "every prediction of the window's cohort, each missing label at its worst loss; the same methods on the completed cohort"),
    ("anytime sequences", "Howard, Ramdas, McAuliffe, Sekhon (2021), Annals of Statistics 49(2); Waudby-Smith and Ramdas (2024)"),
    ("SLA and shift alarms", "betting e-processes and Ville's inequality (Ville 1939); change e-detector: Shin, Ramdas, Rinaldo (2022), arXiv 2203.03532"),
    ("slice certificates", "uniform deviation by Rademacher complexity: Bartlett, Mendelson (2002), JMLR 3; localized: Bartlett, Bousquet, Mendelson (2005), Annals of Statistics 33(4); McDiarmid (1989)"),
    ("input shift", "kernel MMD: Gretton et al. (2012), JMLR 13; spectral null: Gretton et al. (2009), NIPS 22; sequential test by betting: Shekhar, Ramdas (2024), IEEE Trans. IT 70(2)"),
];

/// The cautions every report states.
const CAUTIONS: &[&str] = &[
    "Every bound assumes that the samples of a window are independent draws from one distribution, and that the loss lies in [0, loss_max]. A window that mixes two regimes is bounded as their mixture.",
    "Labelled-only bounds also assume that which labels have arrived does not depend on the outcome. Label delays usually do depend on it; the delay-robust bounds (each missing label at its worst) hold without that assumption, and by default they decide the SLA state.",
    "Label coverage below the SLA's min_label_coverage, or fewer than min_samples in a window, makes the state INCONCLUSIVE, never OK.",
    "A window bound is valid for one look. The history shows many looks; only the anytime sequences and alarms keep their error rate over all of them.",
    "The history keeps one point per history.every of event time (the first file that reached it), for history.keep; the charts merge neighbouring points, keeping the lowest lower and highest upper bound.",
    "An input shift is not a rise of the risk, and a rise of the risk need not show in the inputs.",
    "Windows under window_guarantee: spent depend on how many evaluations were made, which a replay does not repeat: their bounds are reproduced only up to δ_k.",
];

pub fn render(r: &ReportInput<'_>) -> String {
    let period = match (r.from_ms, r.to_ms) {
        (None, None) => "everything the state holds".to_string(),
        (f, t) => format!("{} to {}", f.map_or("the beginning".into(), time_str), t.map_or("the end".into(), time_str)),
    };
    let mut s = html::page_head(
        "riskbound report",
        &format!("Period: {period} (event time). Generated {}.", time_str(r.generated_ms)),
    );
    let _ = write!(
        s,
        "<h2>Provenance</h2><table><tbody><tr><th>riskbound version</th><td>{}</td></tr><tr><th>config</th><td><code>{}</code></td></tr>\
         <tr><th>config SHA-256</th><td><code>{}</code></td></tr><tr><th>state</th><td><code>{}</code></td></tr>\
         <tr><th>period (event time)</th><td>{}</td></tr></tbody></table>",
        env!("CARGO_PKG_VERSION"),
        esc(&r.config_path),
        esc(&r.config_sha256),
        esc(&r.state_dir),
        esc(&period)
    );
    s.push_str("<h2>Assumptions, limits and cautions</h2><div class=\"caution\"><ul>");
    for c in CAUTIONS {
        let _ = write!(s, "<li>{}</li>", esc(c));
    }
    for m in &r.models {
        if m.config.sla.as_ref().is_some_and(|x| x.decide_on == crate::config::DecideOn::LabelledOnly) {
            let _ = write!(s, "<li><b>{}: {}</b></li>", esc(&m.config.name), esc(crate::config::LABELLED_ONLY_CAUTION));
        }
    }
    s.push_str("</ul></div><h2>Methods and their sources</h2><table><tbody>");
    for (m, src) in METHODS {
        let _ = write!(s, "<tr><th>{}</th><td>{}</td></tr>", esc(m), esc(src));
    }
    s.push_str("</tbody></table>");
    s.push_str("<section id=\"numbers\">");
    let points: usize = r.models.iter().map(|m| m.history.len()).sum();
    if points == 0 {
        let _ = write!(
            s,
            "<h2>Evaluations</h2><p><b>{EMPTY_PERIOD}</b> Nothing here says anything about the model's risk in it.</p>"
        );
    }
    for m in r.models.iter().filter(|m| !m.history.is_empty()) {
        model_numbers(&mut s, m);
    }
    s.push_str("</section>");
    files_section(&mut s, r);
    let _ = write!(s, "<h2>The config</h2><pre>{}</pre>", esc(&r.config_text));
    s.push_str(html::PAGE_END);
    s
}

fn model_numbers(s: &mut String, m: &ModelReport<'_>) {
    let c = m.config;
    let band = BandChoice::of(c.sla.as_ref(), c.loss.is_binary());
    let max_risk = c.sla.as_ref().map(|x| x.max_risk);
    let _ = write!(
        s,
        "<h2>Model {}</h2><p class=\"note\">Loss {} in [0, {}], confidence {}; SLA {}; the charts and tables use the {}. {} history points.</p>",
        esc(&c.name),
        esc(c.loss.name()),
        num(c.loss.max()),
        c.confidence.level(),
        max_risk.map_or("none".into(), |x| format!("max_risk {}", num(x))),
        esc(&band.describe()),
        m.history.len()
    );
    for w in &c.windows {
        let _ = write!(s, "<h3>{} / window {}</h3>", esc(&c.name), esc(&w.name));
        let pts = chart_points(&m.history, &w.name, &band);
        s.push_str(&chart(
            &format!("r-{}-{}", c.name, w.name),
            &format!("{} / {}: {}", c.name, w.name, band.describe()),
            &pts,
            max_risk,
        ));
        daily_table(s, &m.history, &w.name, &band);
        state_runs(s, &m.history, &w.name);
    }
    alarms_fired(s, &m.history);
    certified_slices(s, &m.history);
}

/// One row per UTC day: the last point's numbers, the day's widest deciding band, the worst state.
fn daily_table(s: &mut String, history: &[HistoryPoint], window: &str, band: &BandChoice) {
    s.push_str("<table><caption class=\"note\">Daily summary (UTC days)</caption><thead><tr><th>day</th><th>points</th><th>n (last)</th>\
        <th>mean (last)</th><th>lowest lower</th><th>highest upper</th><th>worst state</th><th>state at end of day</th><th>label coverage (last)</th></tr></thead><tbody>");
    let mut i = 0;
    while i < history.len() {
        let day = day_str(history[i].t_ms);
        let j = i + history[i..].iter().take_while(|p| day_str(p.t_ms) == day).count();
        let rows: Vec<_> =
            history[i..j].iter().filter_map(|p| p.windows.iter().find(|w| w.name == window).map(|w| (p, w))).collect();
        i = j;
        let Some(&(last_p, last)) = rows.last() else { continue };
        let bounds: Vec<_> = rows.iter().filter_map(|(_, w)| deciding(w, band.decide_on, &band.method)).collect();
        let lo = bounds.iter().map(|b| b.lower).fold(f64::INFINITY, f64::min);
        let hi = bounds.iter().map(|b| b.upper).fold(f64::NEG_INFINITY, f64::max);
        let worst = rows.iter().map(|(_, w)| w.state.as_deref()).max_by_key(|st| state_rank(*st)).flatten();
        let _ = write!(
            s,
            "<tr><td>{day}</td><td class=\"n\">{}</td><td class=\"n\">{}</td>{}{}{}<td>{}</td><td>{}</td>{}</tr>",
            rows.len(),
            last.n,
            num_cell(last.mean),
            if bounds.is_empty() { "<td>-</td>".into() } else { num_cell(lo) },
            if bounds.is_empty() { "<td>-</td>".into() } else { num_cell(hi) },
            state_badge(worst),
            state_badge(last.state.as_deref()),
            last_p.label_coverage.map_or("<td>-</td>".into(), num_cell)
        );
    }
    s.push_str("</tbody></table>");
}

/// How long each SLA state lasted: runs of equal states between history points.
fn state_runs(s: &mut String, history: &[HistoryPoint], window: &str) {
    let states: Vec<(i64, Option<&str>)> = history
        .iter()
        .filter_map(|p| p.windows.iter().find(|w| w.name == window).map(|w| (p.t_ms, w.state.as_deref())))
        .collect();
    if states.iter().all(|(_, st)| st.is_none()) {
        return;
    }
    s.push_str("<table><caption class=\"note\">SLA states and how long each lasted (event time, from one history point to the point where the state changed)</caption>\
        <thead><tr><th>state</th><th>from</th><th>until</th><th>hours</th></tr></thead><tbody>");
    let mut k = 0;
    while k < states.len() {
        let st = states[k].1;
        let run = states[k..].iter().take_while(|x| x.1 == st).count();
        let from = states[k].0;
        let (until, open) = match states.get(k + run) {
            Some(next) => (next.0, false),
            None => (states[k + run - 1].0, true),
        };
        let _ = write!(
            s,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td class=\"n\">{:.1}</td></tr>",
            state_badge(st),
            time_str(from),
            if open { format!("{} (still, at the period's last point)", time_str(until)) } else { time_str(until) },
            (until - from) as f64 / 3.6e6
        );
        k += run;
    }
    s.push_str("</tbody></table>");
}

/// Each alarm's firings: the first point at which it is seen fired (again after a reset).
fn alarms_fired(s: &mut String, history: &[HistoryPoint]) {
    let mut rows = String::new();
    let mut fired: Vec<&str> = Vec::new();
    for p in history {
        for a in &p.alarms {
            let was = fired.contains(&a.test.as_str());
            if a.fired && !was {
                fired.push(&a.test);
                let _ = write!(
                    rows,
                    "<tr><td>{}</td><td>{}</td>{}{}</tr>",
                    esc(&a.test),
                    time_str(p.t_ms),
                    num_cell(a.log_evidence),
                    num_cell(a.log_threshold)
                );
            } else if !a.fired && was {
                fired.retain(|t| *t != a.test);
            }
        }
    }
    if rows.is_empty() {
        s.push_str("<p>No alarm fired in this period.</p>");
    } else {
        let _ = write!(
            s,
            "<table><caption class=\"note\">Alarms fired (the first history point that shows each firing)</caption><thead><tr><th>alarm</th>\
             <th>seen fired at</th><th>log evidence</th><th>log threshold</th></tr></thead><tbody>{rows}</tbody></table>"
        );
    }
}

/// One certified slice across the period.
struct Certified {
    window: String,
    description: String,
    first: i64,
    last: i64,
    points: u64,
    highest_lower: f64,
    by: Vec<String>,
}

/// Slices certified over max_risk at some point of the period.
fn certified_slices(s: &mut String, history: &[HistoryPoint]) {
    let mut seen: Vec<Certified> = Vec::new();
    for p in history {
        for w in &p.windows {
            for l in w.slices.iter().filter(|l| l.violates) {
                match seen.iter_mut().find(|c| c.window == w.name && c.description == l.description) {
                    Some(c) => {
                        c.last = p.t_ms;
                        c.points += 1;
                        c.highest_lower = c.highest_lower.max(l.lower);
                        if !c.by.contains(&l.certified_by) {
                            c.by.push(l.certified_by.clone());
                        }
                    }
                    None => seen.push(Certified {
                        window: w.name.clone(),
                        description: l.description.clone(),
                        first: p.t_ms,
                        last: p.t_ms,
                        points: 1,
                        highest_lower: l.lower,
                        by: vec![l.certified_by.clone()],
                    }),
                }
            }
        }
    }
    if seen.is_empty() {
        s.push_str("<p>No slice was certified over max_risk in this period.</p>");
        return;
    }
    s.push_str("<table><caption class=\"note\">Slices certified over max_risk</caption><thead><tr><th>window</th><th>slice</th><th>first seen</th>\
        <th>last seen</th><th>points</th><th>highest lower bound</th><th>certified by</th></tr></thead><tbody>");
    for c in &seen {
        let _ = write!(
            s,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td class=\"n\">{}</td>{}<td>{}</td></tr>",
            esc(&c.window),
            esc(&c.description),
            time_str(c.first),
            time_str(c.last),
            c.points,
            num_cell(c.highest_lower),
            esc(&c.by.join(", "))
        );
    }
    s.push_str("</tbody></table>");
}

fn files_section(s: &mut String, r: &ReportInput<'_>) {
    let rows: u64 = r.files.iter().map(|f| f.rows_ok).sum();
    let bad: u64 = r.files.iter().map(|f| f.rows_bad).sum();
    let _ = write!(
        s,
        "<h2>Input files taken in the period</h2><p>{} files, {rows} rows accepted, {bad} rejected.</p>",
        r.files.len()
    );
    if !r.files.is_empty() {
        s.push_str("<table class=\"files\"><thead><tr><th>#</th><th>model</th><th>kind</th><th>file</th><th>SHA-256</th><th>rows</th><th>rejected</th>\
            <th>rejected by reason</th><th>event times</th></tr></thead><tbody>");
        for f in &r.files {
            let reasons: Vec<String> = f.rejects.iter().map(|(r, n)| format!("{} {n}", esc(r))).collect();
            let _ = write!(
                s,
                "<tr><td class=\"n\">{}</td><td>{}</td><td>{}</td><td><code>{}</code></td><td class=\"h\"><code>{}</code></td><td class=\"n\">{}</td>\
                 <td class=\"n\">{}</td><td>{}</td><td class=\"t\">{}</td></tr>",
                f.seq,
                esc(&f.model),
                f.kind.as_str(),
                esc(&f.name),
                esc(&f.hash),
                f.rows_ok,
                f.rows_bad,
                if reasons.is_empty() { "-".into() } else { reasons.join(", ") },
                f.span.map_or("-".into(), |(a, b)| format!("{}<br>{}", time_str(a), time_str(b)))
            );
        }
        s.push_str("</tbody></table>");
    }
    let _ = write!(
        s,
        "<h2>Reproducing these numbers</h2><p>The replay reads {} files (those of the period and every earlier one the state still \
         lists, in the order they were taken; each is checked against its SHA-256) into a new state, and the second command writes \
         this report again from it: its <i>Evaluations</i> section comes out the same, number for number.</p><p>File list: <code>{}</code></p><pre>{}</pre>",
        r.replay_files,
        esc(&r.manifest),
        r.replay_commands.iter().map(|c| esc(c)).collect::<Vec<_>>().join("\n")
    );
}

/// What a report of a period without evaluations says.
pub const EMPTY_PERIOD: &str = "No evaluation was recorded in this period.";
