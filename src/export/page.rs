//! The status page at `/`: per model and window the bounds now and over the kept history, the
//! SLA state with its reason, the alarms, the slices and the input-shift tests, each with what
//! it promises and what it assumes. Rendered from the same snapshot a scrape encodes, so its
//! numbers are /metrics' numbers at that moment; the history comes with the snapshot, so a
//! page never touches the database.

use std::fmt::Write as _;

use super::html::{self, chart, chart_points, esc, num, num_cell, state_badge, time_str, BandChoice};
use crate::config::DecideOn;
use crate::estimate::Bounds;
use crate::window::history::HistoryPoint;
use crate::window::{ModelSnapshot, SliceLine, Snapshot, WindowSnapshot};

/// The page for a snapshot. `now_ms` is when it was rendered (shown, not used in numbers).
pub fn render(snap: &Snapshot, now_ms: i64) -> String {
    let mut s = html::page_head(
        "riskbound status",
        &format!(
            "Confidence bounds on each model's true risk, rendered {} from the snapshot /metrics serves. This page needs no script and loads nothing from elsewhere.",
            time_str(now_ms)
        ),
    );
    if snap.models.is_empty() {
        s.push_str("<p>No state resumed yet.</p>");
    }
    let _ = write!(s, "<nav class=\"noprint\"><p>Models: ");
    for m in &snap.models {
        let _ = write!(s, "<a href=\"#m-{0}\">{0}</a> ", esc(&m.name));
    }
    s.push_str("· <a href=\"/metrics\">/metrics</a></p></nav>");
    for m in &snap.models {
        model_section(&mut s, m);
    }
    s.push_str(PROMISES);
    s.push_str(html::PAGE_END);
    s
}

/// What the numbers promise and assume, in words, once per page.
const PROMISES: &str = "<h2 id=\"promises\">What the numbers promise</h2><ul class=\"note\">\
<li><b>Window bounds</b> (Clopper-Pearson, Hoeffding, empirical Bernstein, kl, betting): each interval covers the window's true \
risk with the stated confidence, for the samples of that window, if they are independent draws from one distribution and the \
loss lies in [0, loss_max]. Re-reading a bound every minute does not keep that promise for all the reads together; the anytime \
sequences do.</li>\
<li><b>Labelled-only</b> bounds use the labels that have come. They also assume that which labels have come does not depend on \
the outcome. Label delays usually do depend on it (a mistake is often known later), so the <b>delay-robust</b> bounds count \
every prediction of the window and give each missing label its worst loss (0 for the lower bound, loss_max for the upper): they \
hold whatever the delays depend on, and they narrow as the labels come.</li>\
<li><b>SLA state</b>: VIOLATED when the deciding lower bound is above max_risk, OK when the deciding upper bound is at or below \
it, INCONCLUSIVE otherwise, and also when a window has fewer than min_samples or label coverage is below min_label_coverage \
(missing labels may be missing by outcome, so the tool does not say OK then).</li>\
<li><b>Anytime sequences and alarms</b> (since the last reset): valid at every moment at once, so an alarm fires with the stated \
false-alarm probability however often it is checked. An alarm stays fired until <code>riskbound reset</code>.</li>\
<li><b>Slices</b>: the worst slices found are certified by a bound that holds uniformly over the whole searched class (so \
picking the worst after looking costs nothing extra); registered slices are named in advance and bounded one by one.</li>\
<li><b>Input shift</b>: label-free tests of whether the inputs moved away from a reference. A shift of the inputs is not a \
rise of the risk, and a rise of the risk need not show in the inputs.</li></ul>";

fn model_section(s: &mut String, m: &ModelSnapshot) {
    let binary = m.loss_name == "zero-one";
    let band = BandChoice::of(m.sla.as_ref(), binary);
    let _ = write!(
        s,
        "<h2 id=\"m-{name}\">Model {name}</h2><div class=\"grid note\"><span>loss {loss} in [0, {max}]</span>\
         <span>confidence {conf}</span><span>window bounds at {wconf}</span><span>label coverage {cov}</span>\
         <span>awaiting a label {aw}</span><span>last file taken {last}</span></div>",
        name = esc(&m.name),
        loss = esc(m.loss_name),
        max = num(m.loss_max),
        conf = m.confidence,
        wconf = m.window_confidence,
        cov = m.label_coverage.map_or("-".into(), num),
        aw = m.awaiting,
        last = m.last_commit_ms.map_or("never".into(), time_str),
    );
    overview(s, m, &band);
    cautions(s, m);
    let now = HistoryPoint::now(m);
    for w in &m.windows {
        window_section(s, m, w, &band, now.as_ref());
    }
    anytime_section(s, m);
    if let Some(sh) = &m.input_shift {
        input_shift_section(s, sh);
    }
}

/// Every window in one table: its state and the bounds that decide it, for a glance.
fn overview(s: &mut String, m: &ModelSnapshot, band: &BandChoice) {
    let _ = write!(
        s,
        "<table><caption class=\"note\">Windows at a glance ({})</caption><thead><tr><th>window</th><th>state</th><th>why</th>\
         <th>labelled</th><th>observed mean</th><th>lower</th><th>upper</th><th>predictions without a label</th></tr></thead><tbody>",
        esc(&band.describe())
    );
    for w in &m.windows {
        let set = match band.decide_on {
            DecideOn::DelayRobust => w.cohort.as_ref().map(|c| c.bounds.as_slice()).unwrap_or(&[]),
            DecideOn::LabelledOnly => w.bounds.as_slice(),
        };
        let b = crate::estimate::Method::parse(&band.method).and_then(|k| bound_of(set, k));
        let _ = write!(
            s,
            "<tr><td><a href=\"#w-{m}-{n}\">{n}</a></td><td>{}</td><td>{}</td><td class=\"n\">{}</td>{}{}{}<td class=\"n\">{}</td></tr>",
            state_badge(w.state.map(|(st, _)| st.as_str())),
            esc(w.state.map_or("", |(_, why)| why.describe())),
            w.n,
            num_cell(w.mean),
            b.map_or("<td>-</td>".into(), |b| num_cell(b.lower)),
            b.map_or("<td>-</td>".into(), |b| num_cell(b.upper)),
            w.cohort.as_ref().map_or(0, |c| c.unlabelled),
            m = esc(&m.name),
            n = esc(&w.name),
        );
    }
    s.push_str("</tbody></table>");
}

/// The cautions that apply to this model now, in words.
fn cautions(s: &mut String, m: &ModelSnapshot) {
    s.push_str("<div class=\"caution\"><b>Assumptions and what the tool does when they visibly fail</b><ul>");
    s.push_str("<li>Within a window, samples are taken to be independent draws from one distribution; the loss is bounded by loss_max.</li>");
    match &m.sla {
        Some(sla) if sla.decide_on == DecideOn::LabelledOnly => {
            let _ = write!(s, "<li><b>{}</b></li>", esc(crate::config::LABELLED_ONLY_CAUTION));
        }
        Some(sla) => {
            let _ = write!(
                s,
                "<li>The SLA state decides on the delay-robust {} bounds: true whatever the label delays depend on.</li>",
                esc(sla.method.name())
            );
            let _ = write!(
                s,
                "<li>Label coverage below {} makes every window INCONCLUSIVE, not OK.</li>",
                num(sla.min_label_coverage)
            );
        }
        None => s.push_str("<li>No SLA is configured: no state is decided and no alarm pages.</li>"),
    }
    let d = &m.delay_dependence;
    match d.p_value {
        Some(p) if d.dependent => {
            let _ = write!(
                s,
                "<li><b>Label delays depend on outcomes here</b> (two-sample KS p = {}): the labelled-only bounds are not to be trusted; read the delay-robust ones.</li>",
                num(p)
            );
        }
        Some(p) => {
            let _ = write!(s, "<li>No dependence of label delay on outcome is visible (KS p = {}); that does not prove there is none.</li>", num(p));
        }
        None => {}
    }
    if m.input_shift.is_some() {
        s.push_str("<li>The input-shift tests compare inputs only: a shift is not a rise of the risk.</li>");
    }
    s.push_str("</ul></div>");
}

fn bound_of(b: &[(crate::estimate::Method, Bounds)], method: crate::estimate::Method) -> Option<Bounds> {
    b.iter().find(|(k, _)| *k == method).map(|(_, b)| *b)
}

fn window_section(
    s: &mut String,
    m: &ModelSnapshot,
    w: &WindowSnapshot,
    band: &BandChoice,
    now: Option<&HistoryPoint>,
) {
    let (state, reason) = match w.state {
        Some((st, why)) => (Some(st.as_str()), why.describe()),
        None => (None, ""),
    };
    let _ = write!(
        s,
        "<h3 id=\"w-{m}-{w}\">{m} / window {w} {badge} <span class=\"note\">{reason}</span></h3>",
        m = esc(&m.name),
        w = esc(&w.name),
        badge = state_badge(state),
        reason = esc(reason)
    );
    let (preds, unlabelled) = w.cohort.as_ref().map_or((0, 0), |c| (c.predictions, c.unlabelled));
    let _ = write!(
        s,
        "<p class=\"note\">{n} labelled samples, observed mean <span data-v=\"{mean}\">{mean_s}</span>; the cohort holds {preds} \
         predictions, {unlabelled} of them without a label yet.</p>",
        n = w.n,
        mean = w.mean,
        mean_s = num(w.mean)
    );
    s.push_str("<table><thead><tr><th>method</th><th>labelled-only lower</th><th>upper</th><th>delay-robust lower</th><th>upper</th></tr></thead><tbody>");
    let robust = w.cohort.as_ref().map(|c| c.bounds.as_slice()).unwrap_or(&[]);
    for method in crate::estimate::Method::ALL {
        let (l, r) = (bound_of(&w.bounds, method), bound_of(robust, method));
        if l.is_none() && r.is_none() {
            continue;
        }
        let _ = write!(s, "<tr><td>{}</td>", method.name());
        for (set, b) in [("labelled", l), ("robust", r)] {
            match b {
                Some(b) => {
                    for (edge, v) in [("lower", b.lower), ("upper", b.upper)] {
                        let id = format!("b-{}-{}-{set}-{}-{edge}", m.name, w.name, method.name());
                        s.push_str(&html::num_cell_id(&id, v));
                    }
                }
                None => s.push_str("<td>-</td><td>-</td>"),
            }
        }
        s.push_str("</tr>");
    }
    s.push_str("</tbody></table>");
    let points = chart_points(m.history.iter().chain(now), &w.name, band);
    let title = format!("{} / {}: {} over time", m.name, w.name, band.describe());
    s.push_str(&chart(&format!("c-{}-{}", m.name, w.name), &title, &points, m.sla.as_ref().map(|x| x.max_risk)));
    if let Some(sl) = &w.slices {
        let _ = write!(
            s,
            "<p class=\"note\">Slices of this window (uniform deviation ε = {} over the searched class; {} certified over max_risk):</p>",
            num(sl.uniform_deviation),
            sl.violations
        );
        if sl.top.is_empty() {
            s.push_str("<p class=\"note\">No slice of the searched class has its losses above max_risk in total in this window.</p>");
        } else {
            slice_table(s, "worst slices found", &sl.top);
        }
        if !sl.registered.is_empty() {
            slice_table(s, "registered slices", &sl.registered);
        }
    }
}

/// A table of slices (descriptions hold values from the data, so they are escaped).
pub fn slice_table(s: &mut String, caption: &str, lines: &[SliceLine]) {
    let _ = write!(
        s,
        "<table><caption class=\"note\">{}</caption><thead><tr><th>slice</th><th>n</th><th>mean</th><th>lower</th><th>upper</th>\
         <th>certified by</th><th>over max_risk</th></tr></thead><tbody>",
        esc(caption)
    );
    for l in lines {
        let _ = write!(
            s,
            "<tr><td>{}</td><td class=\"n\">{}</td>{}{}{}<td>{}</td><td>{}</td></tr>",
            esc(&l.description),
            l.n,
            num_cell(l.mean),
            num_cell(l.lower),
            num_cell(l.upper),
            esc(l.certified_by),
            if l.violates { "<b>YES, certified</b>" } else { "no" }
        );
    }
    s.push_str("</tbody></table>");
}

fn anytime_section(s: &mut String, m: &ModelSnapshot) {
    let a = &m.anytime;
    let _ = write!(
        s,
        "<h3>{} since the last reset{}</h3><p class=\"note\">{} predictions past label_wait, {} of them labelled, mean {}. \
         These sequences hold at every moment at once.</p>",
        esc(&m.name),
        a.reset_ms.map_or(String::new(), |t| format!(" ({})", time_str(t))),
        a.n,
        a.labelled,
        num(a.mean)
    );
    if !a.bounds.is_empty() {
        s.push_str("<table><thead><tr><th>sequence</th><th>lower</th><th>upper</th></tr></thead><tbody>");
        for (q, b) in &a.bounds {
            let _ = write!(s, "<tr><td>{}</td>{}{}</tr>", q.name(), num_cell(b.lower), num_cell(b.upper));
        }
        s.push_str("</tbody></table>");
    }
    let shift_alarm = m.input_shift.as_ref().and_then(|sh| sh.alarm.as_ref());
    if a.alarms.is_empty() && shift_alarm.is_none() {
        return;
    }
    s.push_str(
        "<table><thead><tr><th>alarm</th><th>log evidence</th><th>fires at</th><th>state</th></tr></thead><tbody>",
    );
    let row = |s: &mut String, test: &str, e: f64, th: f64, fired: Option<u64>, unit: &str| {
        let _ = write!(
            s,
            "<tr><td>{}</td>{}{}<td>{}</td></tr>",
            esc(test),
            num_cell(e),
            num_cell(th),
            match fired {
                Some(n) => format!("<span class=\"st st-violated\">FIRED</span> at {unit} {n}"),
                None => "<span class=\"st st-ok\">QUIET</span>".into(),
            }
        );
    };
    for x in &a.alarms {
        row(s, x.test.as_str(), x.log_evidence, x.log_threshold, x.fired_at, "prediction");
    }
    if let Some(x) = shift_alarm {
        row(s, crate::window::history::INPUT_SHIFT_TEST, x.log_evidence, x.log_threshold, x.fired_at, "pair");
    }
    s.push_str("</tbody></table>");
}

fn input_shift_section(s: &mut String, sh: &crate::window::shift::ShiftSnapshot) {
    let _ = write!(s, "<h3>Inputs against the reference (window {})</h3>", esc(&sh.window));
    match sh.look.as_ref().map(|l| (l, &l.outcome)) {
        None => s.push_str("<p class=\"note\">No look yet.</p>"),
        Some((_, Err(why))) => {
            let _ = write!(s, "<p><span class=\"st st-inconclusive\">INCONCLUSIVE</span> {}</p>", esc(why));
        }
        Some((l, Ok(t))) => {
            let alpha = 1.0 - sh.confidence;
            let p = t.permutation_p.unwrap_or(t.spectral.p_value);
            let _ = write!(
                s,
                "<p>{} Look at {} of the newest {} inputs against {} reference rows (at {}): permutation p = {}, spectral p = {}, \
                 at level {}.</p>",
                if p <= alpha {
                    "<span class=\"st st-violated\">SHIFTED</span>"
                } else {
                    "<span class=\"st st-ok\">NO SHIFT SEEN</span>"
                },
                l.n_current,
                l.in_window,
                sh.reference_tested,
                time_str(l.at_ms),
                t.permutation_p.map_or("-".into(), num),
                num(t.spectral.p_value),
                num(alpha)
            );
            if !t.ks.is_empty() {
                s.push_str(
                    "<table><thead><tr><th>column</th><th>KS statistic</th><th>KS p-value</th></tr></thead><tbody>",
                );
                for (c, k) in sh.columns.iter().zip(&t.ks) {
                    let _ = write!(s, "<tr><td>{}</td>{}{}</tr>", esc(c), num_cell(k.statistic), num_cell(k.p_value));
                }
                s.push_str("</tbody></table>");
            }
        }
    }
}
