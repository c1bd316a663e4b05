//! What the status page and the report share: escaping, the stylesheet, times, numbers, and
//! the bound chart (inline SVG). Pages are plain server-rendered HTML: no script, no request
//! to anywhere else (no fonts, images or styles from outside), so they work air-gapped, print
//! as they show, and cannot be made to run anything.

use std::fmt::Write as _;

use crate::config::DecideOn;
use crate::window::history::{deciding, state_rank, HistoryPoint};

/// Escapes text for HTML content and quoted attribute values. Every string that comes from a
/// config, a file or a row goes through here (slice descriptions hold category values from the
/// prediction files, file names come from the spool).
pub fn esc(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

/// A loss value for people: four decimals, or scientific where that would show nothing.
pub fn num(x: f64) -> String {
    if !x.is_finite() {
        return "-".into();
    }
    if x != 0.0 && x.abs() < 1e-3 {
        format!("{x:.2e}")
    } else {
        format!("{x:.4}")
    }
}

/// A number as people read it, with its exact value for machines (`data-v` holds the same
/// shortest round-trip text /metrics prints, so a test compares them without rounding).
pub fn num_cell(x: f64) -> String {
    format!("<td class=\"n\" data-v=\"{}\">{}</td>", x, num(x))
}

/// [`num_cell`] with an id, for the cells a test looks up by name.
pub fn num_cell_id(id: &str, x: f64) -> String {
    format!("<td id=\"{}\" class=\"n\" data-v=\"{}\">{}</td>", esc(id), x, num(x))
}

/// Milliseconds since the epoch as `2026-11-02 14:00 UTC`.
pub fn time_str(ms: i64) -> String {
    match time::OffsetDateTime::from_unix_timestamp(ms.div_euclid(1000)) {
        Ok(t) => format!("{:04}-{:02}-{:02} {:02}:{:02} UTC", t.year(), t.month() as u8, t.day(), t.hour(), t.minute()),
        Err(_) => format!("{ms} ms"),
    }
}

/// The day (UTC, `2026-11-02`) of a time in ms.
pub fn day_str(ms: i64) -> String {
    time_str(ms)[..10].to_string()
}

/// The state words and the classes that give each its colour and pattern. Colour is never
/// the only cue: each state has a word, and violated and inconclusive a hatch or dots.
pub fn state_badge(state: Option<&str>) -> String {
    match state {
        Some(s) => format!("<span class=\"st st-{0}\">{1}</span>", esc(s), esc(&s.to_uppercase())),
        None => "<span class=\"st\">NO SLA</span>".into(),
    }
}

/// The stylesheet of both pages, with its print rules.
pub const CSS: &str = r#"
:root { --ink:#1f2a30; --muted:#5b6b73; --rule:#d5dde1; --band:#4f8fa3; --mean:#1f2a30; --sla:#a63d2a;
  --ok:#2d7045; --bad:#a63d2a; --unsure:#8a6a12; --paper:#fbfcfc; }
* { box-sizing: border-box; }
body { margin: 0; font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
  color: var(--ink); background: var(--paper); }
header.top { padding: 14px 24px; border-bottom: 3px solid var(--band); background: #eef3f5; }
header.top h1 { margin: 0; font-size: 20px; letter-spacing: .02em; }
header.top p { margin: 2px 0 0; color: var(--muted); }
main { padding: 8px 24px 40px; max-width: 1180px; }
h2 { font-size: 18px; margin: 28px 0 6px; border-bottom: 1px solid var(--rule); padding-bottom: 4px; }
h3 { font-size: 15px; margin: 18px 0 6px; }
table { border-collapse: collapse; margin: 6px 0 12px; font-size: 13px; }
th, td { border-bottom: 1px solid var(--rule); padding: 3px 8px; text-align: left; vertical-align: top; }
th { background: #eef3f5; font-weight: 600; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
.st { display: inline-block; padding: 0 6px; border: 1px solid var(--muted); border-radius: 3px;
  font-weight: 700; font-size: 12px; letter-spacing: .04em; }
.st-ok { color: var(--ok); border-color: var(--ok); }
.st-violated { color: #fff; background: repeating-linear-gradient(45deg, var(--bad) 0 6px, #7d2c1e 6px 9px); border-color: var(--bad); }
.st-inconclusive { color: var(--unsure); border-color: var(--unsure); border-style: dashed; }
.note { color: var(--muted); font-size: 13px; max-width: 900px; }
.caution { border-left: 4px solid var(--unsure); padding: 4px 12px; background: #fbf6e9; max-width: 960px; }
.caution li { margin: 2px 0; }
figure { margin: 8px 0 16px; }
figcaption { font-size: 12px; color: var(--muted); max-width: 900px; }
svg text { font: 11px system-ui, "DejaVu Sans", sans-serif; fill: var(--ink); }
code, pre { font: 12px ui-monospace, "DejaVu Sans Mono", monospace; }
pre { background: #f1f4f5; padding: 8px; overflow-x: auto; white-space: pre-wrap; }
.files td { font-size: 11px; }
.files td.h { word-break: break-all; min-width: 30ch; }
.files td.t { white-space: nowrap; }
.grid { display: flex; flex-wrap: wrap; gap: 4px 28px; }
@media print {
  body { background: #fff; font-size: 11pt; }
  header.top { background: none; }
  main { max-width: none; padding: 0; }
  h2 { break-after: avoid; }
  figure, table { break-inside: avoid; }
  a { color: inherit; text-decoration: none; }
  .noprint { display: none; }
}
"#;

/// Opens a page: doctype, title, the stylesheet inline, the header band.
pub fn page_head(title: &str, subtitle: &str) -> String {
    format!(
        "<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
         <title>{t}</title><style>{CSS}</style></head>\n<body><header class=\"top\"><h1>{t}</h1><p>{s}</p></header><main>\n",
        t = esc(title),
        s = esc(subtitle)
    )
}

pub const PAGE_END: &str = "</main></body></html>\n";

/// One point of a window's chart.
#[derive(Clone, Debug, PartialEq)]
pub struct ChartPoint {
    pub t_ms: i64,
    pub lower: f64,
    pub upper: f64,
    pub mean: f64,
    pub state: Option<String>,
    pub coverage: Option<f64>,
    /// Alarms that fired at this point (first point they are seen fired).
    pub fired: Vec<String>,
}

/// A window's chart points from the history: the deciding band (the SLA's method on the
/// bounds the SLA decides on; without an SLA, the labelled Clopper-Pearson or Hoeffding band).
pub fn chart_points<'a>(
    history: impl IntoIterator<Item = &'a HistoryPoint>,
    window: &str,
    band: &BandChoice,
) -> Vec<ChartPoint> {
    let mut out = Vec::new();
    let mut seen_fired: Vec<String> = Vec::new();
    for p in history {
        let Some(w) = p.windows.iter().find(|w| w.name == window) else { continue };
        let Some(b) = deciding(w, band.decide_on, &band.method) else { continue };
        let mut fired = Vec::new();
        for a in p.alarms.iter().filter(|a| a.fired) {
            if !seen_fired.contains(&a.test) {
                seen_fired.push(a.test.clone());
                fired.push(a.test.clone());
            }
        }
        // A reset clears a fired alarm: it may fire again.
        seen_fired.retain(|t| p.alarms.iter().any(|a| a.fired && &a.test == t));
        out.push(ChartPoint {
            t_ms: p.t_ms,
            lower: b.lower,
            upper: b.upper,
            mean: w.mean,
            state: w.state.clone(),
            coverage: p.label_coverage,
            fired,
        });
    }
    out
}

/// Which band a chart draws.
#[derive(Clone, Debug)]
pub struct BandChoice {
    pub decide_on: DecideOn,
    pub method: String,
}

impl BandChoice {
    /// The SLA's deciding band, or the labelled band of the tightest method every loss has.
    pub fn of(sla: Option<&crate::config::SlaConfig>, binary: bool) -> BandChoice {
        match sla {
            Some(s) => BandChoice { decide_on: s.decide_on, method: s.method.name().to_string() },
            None => BandChoice {
                decide_on: DecideOn::LabelledOnly,
                method: if binary { "clopper-pearson" } else { "empirical-bernstein" }.to_string(),
            },
        }
    }

    pub fn describe(&self) -> String {
        format!("{} bounds by {}", self.decide_on.as_str(), self.method)
    }
}

/// At most `max` points: consecutive points merged into one that keeps the lowest lower and
/// the highest upper bound (so the band never looks narrower than it was), the last mean and
/// coverage, the worst state and every alarm fired.
pub fn downsample(points: &[ChartPoint], max: usize) -> Vec<ChartPoint> {
    if points.len() <= max || max == 0 {
        return points.to_vec();
    }
    let per = points.len().div_ceil(max);
    points
        .chunks(per)
        .map(|c| {
            let last = c.last().expect("chunks are never empty");
            ChartPoint {
                t_ms: last.t_ms,
                lower: c.iter().map(|p| p.lower).fold(f64::INFINITY, f64::min),
                upper: c.iter().map(|p| p.upper).fold(f64::NEG_INFINITY, f64::max),
                mean: last.mean,
                state: c.iter().max_by_key(|p| state_rank(p.state.as_deref())).and_then(|p| p.state.clone()),
                coverage: last.coverage,
                fired: c.iter().flat_map(|p| p.fired.iter().cloned()).collect(),
            }
        })
        .collect()
}

/// The most points a chart draws (the page stays small whatever `history.keep`).
pub const CHART_POINTS: usize = 240;

const W: f64 = 760.0;
const PLOT_H: f64 = 190.0;
const LEFT: f64 = 68.0;
const RIGHT: f64 = 14.0;
const TOP: f64 = 14.0;

/// The chart of one window: the band, the observed mean, the SLA line, alarm marks, then a
/// strip of the SLA state and a strip of label coverage. `id` makes the SVG ids unique on a
/// page. The text alternative says in words what the chart shows.
pub fn chart(id: &str, title: &str, points: &[ChartPoint], max_risk: Option<f64>) -> String {
    let mut s = String::new();
    let t_id = format!("{id}-t");
    let d_id = format!("{id}-d");
    if points.is_empty() {
        let _ = write!(s, "<p class=\"note\">{}: no evaluation recorded yet.</p>", esc(title));
        return s;
    }
    let pts = downsample(points, CHART_POINTS);
    let (t0, t1) = (pts[0].t_ms as f64, pts[pts.len() - 1].t_ms as f64);
    let span = (t1 - t0).max(1.0);
    let top_v = nice_ceiling(pts.iter().map(|p| p.upper.max(p.mean)).fold(max_risk.unwrap_or(0.0) * 1.25, f64::max));
    let plot_w = W - LEFT - RIGHT;
    let x = |t: i64| LEFT + (t as f64 - t0) / span * plot_w;
    let y = |v: f64| TOP + PLOT_H - (v / top_v).clamp(0.0, 1.0) * PLOT_H;
    let strip_y = TOP + PLOT_H + 26.0;
    let cov_y = strip_y + 30.0;
    let h = cov_y + 40.0;
    let desc = chart_words(&pts, max_risk);
    let _ = write!(
        s,
        "<figure><svg role=\"img\" aria-labelledby=\"{t_id} {d_id}\" viewBox=\"0 0 {W} {h}\" width=\"{W}\" height=\"{h}\"><title id=\"{t_id}\">{}</title><desc id=\"{d_id}\">{}</desc>",
        esc(title),
        esc(&desc)
    );
    let _ = write!(
        s,
        "<defs><pattern id=\"{id}-hatch\" width=\"6\" height=\"6\" patternUnits=\"userSpaceOnUse\" patternTransform=\"rotate(45)\">\
         <rect width=\"6\" height=\"6\" fill=\"#a63d2a\"/><line x1=\"0\" y1=\"0\" x2=\"0\" y2=\"6\" stroke=\"#fff\" stroke-width=\"2\"/></pattern>\
         <pattern id=\"{id}-dots\" width=\"5\" height=\"5\" patternUnits=\"userSpaceOnUse\">\
         <rect width=\"5\" height=\"5\" fill=\"#efe3bd\"/><circle cx=\"2.5\" cy=\"2.5\" r=\"1.2\" fill=\"#8a6a12\"/></pattern>\
         <pattern id=\"{id}-band\" width=\"4\" height=\"4\" patternUnits=\"userSpaceOnUse\">\
         <rect width=\"4\" height=\"4\" fill=\"#4f8fa3\" fill-opacity=\"0.28\"/><line x1=\"0\" y1=\"4\" x2=\"4\" y2=\"0\" stroke=\"#4f8fa3\" stroke-opacity=\"0.5\"/></pattern></defs>"
    );
    // Axes and grid.
    for k in 0..=4 {
        let v = top_v * f64::from(k) / 4.0;
        let _ = write!(
            s,
            "<line x1=\"{LEFT}\" x2=\"{:.1}\" y1=\"{:.1}\" y2=\"{:.1}\" stroke=\"#d5dde1\"/><text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">{}</text>",
            W - RIGHT,
            y(v),
            y(v),
            LEFT - 4.0,
            y(v) + 4.0,
            num(v)
        );
    }
    // The band: upper edge forward, lower edge back.
    let mut poly = String::new();
    for p in &pts {
        let _ = write!(poly, "{:.1},{:.1} ", x(p.t_ms), y(p.upper));
    }
    for p in pts.iter().rev() {
        let _ = write!(poly, "{:.1},{:.1} ", x(p.t_ms), y(p.lower));
    }
    let _ = write!(s, "<polygon points=\"{poly}\" fill=\"url(#{id}-band)\" stroke=\"#4f8fa3\" stroke-width=\"1\"/>");
    let line: String = pts.iter().map(|p| format!("{:.1},{:.1} ", x(p.t_ms), y(p.mean))).collect();
    let _ = write!(s, "<polyline points=\"{line}\" fill=\"none\" stroke=\"#1f2a30\" stroke-width=\"1.6\"/>");
    if let Some(m) = max_risk {
        let _ = write!(
            s,
            "<line x1=\"{LEFT}\" x2=\"{:.1}\" y1=\"{:.1}\" y2=\"{:.1}\" stroke=\"#a63d2a\" stroke-width=\"1.5\" stroke-dasharray=\"7 4\"/>\
             <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\" fill=\"#a63d2a\">SLA max_risk {}</text>",
            W - RIGHT,
            y(m),
            y(m),
            W - RIGHT,
            y(m) - 4.0,
            num(m)
        );
    }
    for p in pts.iter().filter(|p| !p.fired.is_empty()) {
        let xf = x(p.t_ms);
        let _ = write!(
            s,
            "<line x1=\"{xf:.1}\" x2=\"{xf:.1}\" y1=\"{TOP}\" y2=\"{:.1}\" stroke=\"#1f2a30\" stroke-dasharray=\"2 2\"/>\
             <path d=\"M{:.1},{TOP} l5,-9 l-10,0 z\" fill=\"#1f2a30\"/><text x=\"{:.1}\" y=\"{:.1}\">alarm: {}</text>",
            TOP + PLOT_H,
            xf,
            xf + 4.0,
            TOP + 12.0,
            esc(&p.fired.join(", "))
        );
    }
    // Time axis: first and last point, and the middle.
    for (t, anchor) in [(pts[0].t_ms, "start"), (pts[pts.len() / 2].t_ms, "middle"), (pts[pts.len() - 1].t_ms, "end")] {
        let _ = write!(
            s,
            "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"{anchor}\">{}</text>",
            x(t),
            TOP + PLOT_H + 14.0,
            time_str(t)
        );
    }
    strips(&mut s, id, &pts, &x, strip_y, cov_y);
    let _ = write!(
        s,
        "</svg><figcaption>Hatched band: the confidence bounds (lower to upper). Dark line: the observed mean of the labelled losses. Dashed red line: the SLA's \
         max_risk. State strip: solid = OK, diagonal hatch = VIOLATED, dots = INCONCLUSIVE, grey = no SLA. Lower strip: label \
         coverage from 0 to 1. {} points{}.</figcaption></figure>",
        points.len(),
        if pts.len() < points.len() { format!(", drawn as {} (each keeps its span's lowest lower and highest upper bound)", pts.len()) } else { String::new() }
    );
    s
}

/// Below the plot: the SLA state as one cell per point (to the next point), and label
/// coverage from 0 to 1.
fn strips(s: &mut String, id: &str, pts: &[ChartPoint], x: &dyn Fn(i64) -> f64, strip_y: f64, cov_y: f64) {
    let plot_w = W - LEFT - RIGHT;
    let _ = write!(s, "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">state</text>", LEFT - 4.0, strip_y + 11.0);
    for (i, p) in pts.iter().enumerate() {
        let x0 = x(p.t_ms);
        let x1 = pts.get(i + 1).map_or(W - RIGHT, |q| x(q.t_ms)).max(x0 + 1.0);
        let fill = match p.state.as_deref() {
            Some("ok") => "#2d7045".to_string(),
            Some("violated") => format!("url(#{id}-hatch)"),
            Some("inconclusive") => format!("url(#{id}-dots)"),
            _ => "#d5dde1".to_string(),
        };
        let _ = write!(
            s,
            "<rect x=\"{x0:.1}\" y=\"{strip_y:.1}\" width=\"{:.1}\" height=\"14\" fill=\"{fill}\"><title>{}: {}</title></rect>",
            x1 - x0,
            time_str(p.t_ms),
            esc(p.state.as_deref().unwrap_or("no SLA"))
        );
    }
    // Label coverage, 0 to 1.
    let _ = write!(s, "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">coverage</text>", LEFT - 4.0, cov_y + 16.0);
    let _ = write!(
        s,
        "<rect x=\"{LEFT}\" y=\"{cov_y:.1}\" width=\"{plot_w:.1}\" height=\"26\" fill=\"none\" stroke=\"#d5dde1\"/>"
    );
    let cov: String = pts
        .iter()
        .filter_map(|p| p.coverage.map(|c| format!("{:.1},{:.1} ", x(p.t_ms), cov_y + 26.0 - c.clamp(0.0, 1.0) * 26.0)))
        .collect();
    let _ = write!(
        s,
        "<text x=\"{:.1}\" y=\"{:.1}\">1</text><text x=\"{:.1}\" y=\"{:.1}\">0</text>",
        W - RIGHT + 3.0,
        cov_y + 8.0,
        W - RIGHT + 3.0,
        cov_y + 26.0
    );
    if !cov.is_empty() {
        let _ = write!(s, "<polyline points=\"{cov}\" fill=\"none\" stroke=\"#5b6b73\" stroke-width=\"1.2\"/>");
    }
}

/// The smallest of 1, 2, 2.5 or 5 times a power of ten at or above `v`: an axis top whose
/// quarters read as round numbers.
fn nice_ceiling(v: f64) -> f64 {
    if v.is_nan() || v <= 0.0 || !v.is_finite() {
        return 1.0;
    }
    let p = 10f64.powf(v.log10().floor());
    [1.0, 2.0, 2.5, 5.0, 10.0].iter().map(|m| m * p).find(|c| *c >= v * (1.0 - 1e-12)).unwrap_or(10.0 * p)
}

/// The chart in words, for its text alternative.
fn chart_words(pts: &[ChartPoint], max_risk: Option<f64>) -> String {
    let first = &pts[0];
    let last = &pts[pts.len() - 1];
    let mut d = format!(
        "From {} to {}: bounds went from [{}, {}] to [{}, {}], observed mean from {} to {}.",
        time_str(first.t_ms),
        time_str(last.t_ms),
        num(first.lower),
        num(first.upper),
        num(last.lower),
        num(last.upper),
        num(first.mean),
        num(last.mean)
    );
    if let Some(m) = max_risk {
        let above = pts.iter().filter(|p| p.lower > m).count();
        let _ = write!(d, " SLA max_risk {}; lower bound above it at {above} of {} points.", num(m), pts.len());
    }
    let fired: Vec<String> =
        pts.iter().flat_map(|p| p.fired.iter().map(move |f| format!("{f} at {}", time_str(p.t_ms)))).collect();
    if !fired.is_empty() {
        let _ = write!(d, " Alarms fired: {}.", fired.join("; "));
    }
    d
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escaping_covers_every_html_metacharacter() {
        assert_eq!(esc("<script>alert('x')&\"</script>"), "&lt;script&gt;alert(&#39;x&#39;)&amp;&quot;&lt;/script&gt;");
    }

    #[test]
    fn downsampling_keeps_the_envelope_and_the_worst_state() {
        let p = |t, lower, upper, st: &str| ChartPoint {
            t_ms: t,
            lower,
            upper,
            mean: (lower + upper) / 2.0,
            state: Some(st.into()),
            coverage: None,
            fired: vec![],
        };
        let pts = vec![p(0, 0.1, 0.2, "ok"), p(1, 0.05, 0.3, "violated"), p(2, 0.2, 0.25, "ok"), p(3, 0.0, 0.1, "ok")];
        let d = downsample(&pts, 2);
        assert_eq!(d.len(), 2);
        assert_eq!((d[0].lower, d[0].upper, d[0].state.as_deref()), (0.05, 0.3, Some("violated")));
        assert_eq!((d[1].lower, d[1].upper, d[1].t_ms), (0.0, 0.25, 3));
    }

    #[test]
    fn axis_tops_are_round() {
        assert_eq!(nice_ceiling(0.2004), 0.25);
        assert_eq!(nice_ceiling(0.125), 0.2);
        assert_eq!(nice_ceiling(1.0), 1.0);
        assert_eq!(nice_ceiling(0.0), 1.0);
        assert_eq!(nice_ceiling(3.1), 5.0);
    }
}
