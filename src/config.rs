//! The daemon's configuration: YAML parsed into raw serde types that mirror the file (unknown
//! keys are errors), then validated into [`Config`], the only type the rest of the daemon sees.
//! Validation collects every problem before reporting, each as `FILE:LINE:COL: key: reason`.
//! Relative paths are resolved against the directory of the config file, so a config means the
//! same thing whichever directory the daemon is started from.

use std::collections::HashSet;
use std::fmt;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::Deserialize;
use serde_saphyr::Spanned;

use crate::cmd::bound::{self, Input, LossSource, Plan};
use crate::estimate::anytime::evidence::ChangeDetector;
use crate::estimate::anytime::sequence::HoeffdingBoundary;
use crate::estimate::anytime::{TrackerSpec, DEFAULT_GRID};
use crate::estimate::{Confidence, Method};
use crate::ingest::Format;
use crate::loss::LossSpec;

/// The window name of the anytime sequences in metrics; no configured window may take it.
pub const SINCE_RESET: &str = "since-reset";

/// The change detector's horizon when none is configured: 10^5 labels.
pub const DEFAULT_CHANGE_HORIZON: u64 = 100_000;

/// Default listen address: loopback, so nothing is exposed unless asked for.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:9417";

// === raw types: the YAML as written ===

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawConfig {
    listen: Option<Spanned<String>>,
    state_dir: Option<Spanned<String>>,
    rescan_interval: Option<Spanned<String>>,
    max_row_bytes: Option<Spanned<u64>>,
    future_tolerance: Option<Spanned<String>>,
    max_connections: Option<Spanned<i64>>,
    header_read_timeout: Option<Spanned<String>>,
    keep_alive_idle: Option<Spanned<String>>,
    max_requests_per_connection: Option<Spanned<i64>>,
    connection_lifetime: Option<Spanned<String>>,
    max_header_bytes: Option<Spanned<i64>>,
    memory_limit: Option<Spanned<String>>,
    models: Spanned<Vec<RawModel>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModel {
    name: Spanned<String>,
    predictions: Spanned<RawSource>,
    labels: Spanned<RawSource>,
    loss: Option<Spanned<String>>,
    loss_max: Option<Spanned<f64>>,
    confidence: Option<Spanned<f64>>,
    label_wait: Option<Spanned<String>>,
    windows: Spanned<Vec<RawWindow>>,
    window_guarantee: Option<Spanned<String>>,
    sla: Option<Spanned<RawSla>>,
    alerts: Option<Spanned<RawAlerts>>,
    slices: Option<Spanned<RawSlices>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSlices {
    categorical: Option<Vec<Spanned<String>>>,
    numeric: Option<Vec<Spanned<String>>>,
    depth: Option<Spanned<i64>>,
    registered: Option<Vec<Spanned<String>>>,
    top: Option<Spanned<i64>>,
    sign_draws: Option<Spanned<i64>>,
    decide_state: Option<Spanned<bool>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawAlerts {
    stalled_after: Option<Spanned<String>>,
    max_reject_ratio: Option<Spanned<f64>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSource {
    dir: Spanned<String>,
    pattern: Spanned<String>,
    format: Option<Spanned<String>>,
    columns: Spanned<RawColumns>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawColumns {
    id: Option<Spanned<String>>,
    time: Option<Spanned<String>>,
    prediction: Option<Spanned<String>>,
    label: Option<Spanned<String>>,
    loss: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawWindow {
    name: Spanned<String>,
    last: Option<Spanned<i64>>,
    span: Option<Spanned<String>>,
    mature: Option<Spanned<bool>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSla {
    max_risk: Spanned<f64>,
    method: Option<Spanned<String>>,
    min_samples: Option<Spanned<i64>>,
    min_label_coverage: Option<Spanned<f64>>,
    change_horizon: Option<Spanned<i64>>,
    reference: Option<Spanned<RawReference>>,
    decide_on: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawReference {
    file: Spanned<String>,
    format: Option<Spanned<String>>,
    columns: Spanned<RawColumns>,
    tolerance: Spanned<f64>,
    confidence: Option<Spanned<f64>>,
}

// === validated types ===

/// The validated configuration.
#[derive(Clone, Debug)]
pub struct Config {
    /// Where the config was read from (for messages).
    pub file: PathBuf,
    pub listen: SocketAddr,
    pub state_dir: PathBuf,
    /// How often every input directory is listed even without a file event.
    pub rescan_interval: Duration,
    /// Longest accepted row; longer rows are rejected (bounds memory on hostile input).
    pub max_row_bytes: u64,
    /// What one HTTP client may hold.
    pub http: HttpLimits,
    /// The container's memory limit, for the memory ticket rule: `memory_limit` if set, else
    /// read from the cgroup at start-up (None when unlimited or unknown).
    pub memory_limit_bytes: Option<u64>,
    pub models: Vec<ModelConfig>,
    /// TLS and basic auth of the HTTP surface (from `--web-config`; plain HTTP by default).
    pub web: crate::export::web::WebConfig,
}

/// Limits on the HTTP surface; each bounds what one client can hold.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct HttpLimits {
    /// Open connections at most.
    pub max_connections: usize,
    /// Time allowed for the TLS handshake and the first request's headers (from accept), and
    /// for a later request's headers (from its first byte).
    pub header_read_timeout: Duration,
    /// How long a kept-alive connection may wait for its next request (or take to read a
    /// response).
    pub keep_alive_idle: Duration,
    /// Requests served on one connection; the last is answered with `Connection: close`.
    pub max_requests_per_connection: u32,
    /// Longest life of one connection, whatever it does.
    pub connection_lifetime: Duration,
    /// Largest request head (request line and headers); larger ones get 431.
    pub max_header_bytes: usize,
}

impl Default for HttpLimits {
    fn default() -> Self {
        HttpLimits {
            max_connections: 64,
            header_read_timeout: Duration::from_secs(10),
            keep_alive_idle: Duration::from_secs(90),
            max_requests_per_connection: 1000,
            connection_lifetime: Duration::from_secs(600),
            max_header_bytes: 16 * 1024,
        }
    }
}

/// Parses a byte size: a plain number, or one with a unit (`KiB`/`Ki`, `MiB`/`Mi`, `GiB`/`Gi`,
/// and the decimal `kB`, `MB`, `GB`), as Kubernetes resource quantities are written.
pub fn parse_bytes(s: &str) -> Result<u64, String> {
    let t = s.trim();
    let split = t.find(|c: char| !c.is_ascii_digit()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let v: u64 = num.parse().map_err(|_| format!("{s:?} is not a size such as 512MiB"))?;
    let mult: u64 = match unit.trim() {
        "" | "B" => 1,
        "KiB" | "Ki" => 1 << 10,
        "MiB" | "Mi" => 1 << 20,
        "GiB" | "Gi" => 1 << 30,
        "kB" | "k" => 1_000,
        "MB" | "M" => 1_000_000,
        "GB" | "G" => 1_000_000_000,
        u => return Err(format!("{s:?}: unknown unit {u:?} (KiB, MiB, GiB, kB, MB, GB)")),
    };
    match v.checked_mul(mult) {
        Some(0) => Err(format!("{s:?} must be positive")),
        Some(b) => Ok(b),
        None => Err(format!("{s:?} is too large")),
    }
}

/// One monitored model.
#[derive(Clone, Debug)]
pub struct ModelConfig {
    pub name: String,
    pub predictions: SourceConfig,
    pub labels: SourceConfig,
    pub loss: LossSpec,
    pub confidence: Confidence,
    /// How long (event time, ms) a prediction waits for its label, and a label for its prediction.
    pub label_wait_ms: i64,
    /// Rows whose event time is more than this (ms) ahead of the wall clock are rejected.
    pub future_tolerance_ms: i64,
    pub windows: Vec<WindowConfig>,
    /// What the per-window bounds promise: each evaluation on its own, or δ spent over all.
    pub window_guarantee: WindowGuarantee,
    pub sla: Option<SlaConfig>,
    /// Thresholds of the generated operational alerts (`riskbound rules`).
    pub alerts: AlertsConfig,
    /// The slice search per window, if configured (needs an sla).
    pub slices: Option<SlicesConfig>,
}

/// The slice search of a model's windows (estimate/slices.rs). The feature columns are read
/// from the prediction files.
#[derive(Clone, Debug, PartialEq)]
pub struct SlicesConfig {
    pub categorical: Vec<String>,
    pub numeric: Vec<String>,
    pub depth: usize,
    /// Slices fixed in advance: per-window bounds at δ/M each (Bonferroni).
    pub registered: Vec<crate::estimate::slices::Slice>,
    /// Slices exported per window (bounded cardinality: a `rank` label 1..top).
    pub top: usize,
    pub sign_draws: usize,
    /// A certified violating slice makes the window `violated`.
    pub decide_state: bool,
}

impl SlicesConfig {
    /// The feature columns in the order records carry them: categorical, then numeric.
    pub fn columns(&self) -> Vec<String> {
        self.categorical.iter().chain(&self.numeric).cloned().collect()
    }
}

/// Thresholds of the operational alerts `riskbound rules` generates.
#[derive(Clone, Debug, PartialEq)]
pub struct AlertsConfig {
    /// Ingestion counts as stalled when no batch file was committed for this long.
    pub stalled_after: Duration,
    /// Rejected rows / all rows over 15 minutes above this is an alert.
    pub max_reject_ratio: f64,
}

impl Default for AlertsConfig {
    fn default() -> Self {
        AlertsConfig { stalled_after: Duration::from_secs(3600), max_reject_ratio: 0.05 }
    }
}

/// The guarantee of the per-window bounds (the anytime sequences always hold at every label).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum WindowGuarantee {
    /// Each published bound errs with probability ≤ δ on its own; repeated looks add up.
    PerWindow,
    /// Evaluation k (each publish is one) uses δ_k = δ/(k(k+1)), so all of them together err
    /// with probability ≤ δ (Σ δ/(k(k+1)) = δ); the bounds widen slowly as k grows.
    Spent,
}

impl WindowGuarantee {
    /// The label value metrics carry.
    pub fn as_str(self) -> &'static str {
        match self {
            WindowGuarantee::PerWindow => "per-window",
            WindowGuarantee::Spent => "spent",
        }
    }

    /// δ_k of evaluation k (1-based).
    pub fn delta(self, delta: f64, k: u64) -> f64 {
        match self {
            WindowGuarantee::PerWindow => delta,
            WindowGuarantee::Spent => {
                let k = k.max(1) as f64;
                delta / (k * (k + 1.0))
            }
        }
    }
}

/// Which rows of a directory belong to a model, and which columns hold what.
#[derive(Clone, Debug)]
pub struct SourceConfig {
    pub dir: PathBuf,
    pub pattern: glob::Pattern,
    /// Fixed format, or `None` to go by each file's extension.
    pub format: Option<Format>,
    pub id_column: String,
    pub time_column: String,
    /// The prediction column (predictions), or the label or loss column (labels).
    pub value_column: String,
}

/// A rolling window of labelled samples, by prediction (event) time.
#[derive(Clone, Debug, PartialEq)]
pub struct WindowConfig {
    pub name: String,
    pub kind: WindowKind,
    /// Only predictions whose label_wait is over: every label that will come has had its
    /// chance, so the delay-robust bounds are as tight as the labels allow.
    pub mature: bool,
}

/// Which bounds decide a window's SLA state.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum DecideOn {
    /// The cohort's bounds with unknown losses at their worst (true whatever the delays
    /// depend on): the default.
    DelayRobust,
    /// The labelled samples' bounds: tighter, but true only if which labels have come does not
    /// depend on the outcomes.
    LabelledOnly,
}

impl DecideOn {
    pub fn as_str(self) -> &'static str {
        match self {
            DecideOn::DelayRobust => "delay-robust",
            DecideOn::LabelledOnly => "labelled-only",
        }
    }
}

/// The caution printed when a model's SLA state decides on the labelled samples alone.
pub const LABELLED_ONLY_CAUTION: &str = "sla.decide_on is labelled-only: the SLA state trusts bounds on the labelled \
samples alone, which are wrong when label delays depend on outcomes (a late delivery or a chargeback is known later \
than a good outcome); riskbound_label_delay_outcome_dependent says when that is visible";

/// How a window is bounded.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum WindowKind {
    /// The newest N labelled samples.
    Last(u64),
    /// Samples whose prediction time is within this many ms of the newest one.
    SpanMs(i64),
}

/// The service-level agreement on a model's risk.
#[derive(Clone, Debug)]
pub struct SlaConfig {
    pub max_risk: f64,
    /// The method whose bounds decide the state.
    pub method: Method,
    /// Below this many samples a window is `inconclusive`.
    pub min_samples: u64,
    /// Below this fraction of predictions that got their label (of those whose wait is over),
    /// every window of the model is `inconclusive`: missing labels may be missing by outcome.
    pub min_label_coverage: f64,
    /// The change detector's horizon M: P(false alarm within the first M labels after a reset)
    /// ≤ δ, and its mean run length to a false alarm is ≥ M/δ.
    pub change_horizon: u64,
    /// The harmful-shift test's reference, if configured.
    pub reference: Option<ReferenceConfig>,
    /// Which bounds decide the state.
    pub decide_on: DecideOn,
}

/// A reference set (validation data) for the harmful-shift test: H0 "the deployed risk is at
/// most the reference risk + tolerance". Its upper bound is computed once, when the config is
/// loaded, at the reference's own confidence; the test's total false-alarm probability is
/// (1 − reference confidence) + (1 − model confidence).
#[derive(Clone, Debug, PartialEq)]
pub struct ReferenceConfig {
    pub file: PathBuf,
    pub n: u64,
    pub mean: f64,
    /// The reference's upper bound (by the SLA method) at `confidence`.
    pub upper: f64,
    pub confidence: Confidence,
    pub tolerance: f64,
}

impl ReferenceConfig {
    /// θ of the shift test: the reference's upper bound plus the tolerance.
    pub fn max_risk(&self) -> f64 {
        self.upper + self.tolerance
    }
}

impl ModelConfig {
    /// What the model's anytime tracker computes.
    pub fn tracker_spec(&self) -> TrackerSpec {
        let delta = self.confidence.delta();
        TrackerSpec {
            delta,
            loss_max: self.loss.max(),
            grid: DEFAULT_GRID,
            hoeffding_boundary: HoeffdingBoundary::Stitched,
            sla_max_risk: self.sla.as_ref().map(|s| s.max_risk),
            shift_max_risk: self
                .sla
                .as_ref()
                .and_then(|s| s.reference.as_ref())
                .map(|r| r.max_risk().min(self.loss.max())),
            change: self.sla.as_ref().map(|s| (s.max_risk, ChangeDetector::threshold_for(s.change_horizon, delta))),
        }
    }
}

/// One located configuration problem.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ConfigIssue {
    pub line: u64,
    pub column: u64,
    pub key: String,
    pub reason: String,
}

/// Every problem found in a config file.
#[derive(Debug)]
pub struct ConfigError {
    pub file: String,
    pub issues: Vec<ConfigIssue>,
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, p) in self.issues.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{}:{}:{}: {}: {}", self.file, p.line, p.column, p.key, p.reason)?;
        }
        Ok(())
    }
}

impl std::error::Error for ConfigError {}

/// Parses a duration such as `30s`, `15m`, `24h`, `7d` or `500ms`.
pub fn parse_duration(s: &str) -> Result<Duration, String> {
    let s = s.trim();
    let split = s
        .find(|c: char| !c.is_ascii_digit() && c != '.')
        .ok_or_else(|| format!("{s:?} has no unit (ms, s, m, h, d)"))?;
    let (num, unit) = s.split_at(split);
    let v: f64 = num.parse().map_err(|_| format!("{s:?} is not a duration"))?;
    let secs = match unit {
        "ms" => v / 1000.0,
        "s" => v,
        "m" => v * 60.0,
        "h" => v * 3600.0,
        "d" => v * 86400.0,
        _ => return Err(format!("{s:?}: unknown unit {unit:?} (ms, s, m, h, d)")),
    };
    if !secs.is_finite() || secs <= 0.0 {
        return Err(format!("{s:?} must be positive"));
    }
    // Past u64::MAX seconds a Duration cannot hold it (found by the config fuzz target).
    Duration::try_from_secs_f64(secs).map_err(|_| format!("{s:?} is too long"))
}

fn valid_name(s: &str) -> bool {
    !s.is_empty() && s.bytes().all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'-' || b == b'_')
}

/// Collects issues while walking the raw config.
struct Checker {
    base: PathBuf,
    issues: Vec<ConfigIssue>,
}

impl Checker {
    fn push<T>(&mut self, at: &Spanned<T>, key: &str, reason: impl fmt::Display) {
        self.issues.push(ConfigIssue {
            line: at.referenced.line(),
            column: at.referenced.column(),
            key: key.to_string(),
            reason: reason.to_string(),
        });
    }

    fn path(&self, s: &str) -> PathBuf {
        let p = Path::new(s);
        if p.is_absolute() {
            p.to_path_buf()
        } else {
            self.base.join(p)
        }
    }

    fn source(
        &mut self,
        raw: &Spanned<RawSource>,
        key: &str,
        value_key: &str,
        value_col: Option<&Spanned<String>>,
    ) -> Option<SourceConfig> {
        let r = &raw.value;
        let mut ok = true;
        let dir = self.path(&r.dir.value);
        match std::fs::read_dir(&dir) {
            Ok(_) => {}
            Err(e) => {
                self.push(&r.dir, &format!("{key}.dir"), format!("cannot read directory {}: {e}", dir.display()));
                ok = false;
            }
        }
        let pattern = if r.pattern.value.contains('/') {
            self.push(
                &r.pattern,
                &format!("{key}.pattern"),
                "a file-name pattern, not a path: put the directory in dir",
            );
            None
        } else {
            match glob::Pattern::new(&r.pattern.value) {
                Ok(p) => Some(p),
                Err(e) => {
                    self.push(&r.pattern, &format!("{key}.pattern"), format!("invalid glob pattern: {e}"));
                    None
                }
            }
        };
        let format = match &r.format {
            None => None,
            Some(f) => match Format::parse(&f.value) {
                Some(x) => Some(x),
                None => {
                    self.push(f, &format!("{key}.format"), format!("{:?} is not csv or jsonl", f.value));
                    ok = false;
                    None
                }
            },
        };
        let column = |c: Option<&Spanned<String>>, name: &str, this: &mut Checker| -> Option<String> {
            match c {
                Some(v) if !v.value.trim().is_empty() => Some(v.value.clone()),
                Some(v) => {
                    this.push(v, &format!("{key}.columns.{name}"), "must not be empty");
                    None
                }
                None => {
                    this.push(&r.columns, &format!("{key}.columns.{name}"), "missing: name the column that holds it");
                    None
                }
            }
        };
        let id = column(r.columns.value.id.as_ref(), "id", self);
        let time = column(r.columns.value.time.as_ref(), "time", self);
        let value = column(value_col, value_key, self);
        match (ok, pattern, id, time, value) {
            (true, Some(pattern), Some(id_column), Some(time_column), Some(value_column)) => {
                Some(SourceConfig { dir, pattern, format, id_column, time_column, value_column })
            }
            _ => None,
        }
    }

    /// Reads the reference file and bounds its risk; problems are reported at `key`.
    fn reference(
        &mut self,
        raw: &Spanned<RawReference>,
        key: &str,
        loss: LossSpec,
        method: Method,
        model_confidence: Confidence,
    ) -> Option<ReferenceConfig> {
        let r = &raw.value;
        let start = self.issues.len();
        if !(r.tolerance.value >= 0.0 && r.tolerance.value <= loss.max()) {
            self.push(
                &r.tolerance,
                &format!("{key}.tolerance"),
                format!("must lie in [0, {}], got {}", loss.max(), r.tolerance.value),
            );
        }
        let confidence = match &r.confidence {
            None => model_confidence,
            Some(c) => Confidence::new(c.value).unwrap_or_else(|e| {
                self.push(c, &format!("{key}.confidence"), e);
                model_confidence
            }),
        };
        let file = self.path(&r.file.value);
        let cols = &r.columns.value;
        let source = match (loss, &cols.loss, &cols.prediction, &cols.label) {
            (LossSpec::Column { .. }, Some(l), None, None) => Some(LossSource::Column(l.value.clone())),
            (LossSpec::Column { .. }, _, _, _) => {
                self.push(&r.columns, &format!("{key}.columns"), "with loss: column, give columns.loss only");
                None
            }
            (_, None, Some(p), Some(l)) => {
                Some(LossSource::Compare { prediction: p.value.clone(), label: l.value.clone() })
            }
            _ => {
                self.push(&r.columns, &format!("{key}.columns"), "give columns.prediction and columns.label");
                None
            }
        };
        let format = match &r.format {
            None => Format::from_path(&file),
            Some(f) => Format::parse(&f.value).or_else(|| {
                self.push(f, &format!("{key}.format"), format!("{:?} is not csv or jsonl", f.value));
                None
            }),
        };
        let Some(format) = format else {
            if r.format.is_none() {
                self.push(
                    &r.file,
                    &format!("{key}.file"),
                    "cannot tell the format from the extension; add format: csv or jsonl",
                );
            }
            return None;
        };
        if self.issues.len() > start {
            return None;
        }
        let source = source?;
        // A regular file only: a device or FIFO named here would block the config load.
        let opened = match std::fs::metadata(&file).map(|m| m.is_file()) {
            Ok(false) => {
                self.push(&r.file, &format!("{key}.file"), format!("{} is not a regular file", file.display()));
                return None;
            }
            _ => std::fs::File::open(&file),
        };
        let opened = match opened {
            Ok(f) => f,
            Err(e) => {
                self.push(&r.file, &format!("{key}.file"), format!("cannot read {}: {e}", file.display()));
                return None;
            }
        };
        let plan = Plan {
            input: Input { file_label: file.display().to_string(), format, source, loss, group_by: None },
            confidence,
            methods: vec![method],
        };
        match bound::run(&plan, std::io::BufReader::new(opened)) {
            Ok(report) => {
                let g = &report.groups[0];
                Some(ReferenceConfig {
                    file,
                    n: g.n,
                    mean: g.mean,
                    upper: g.bounds[0].1.upper,
                    confidence,
                    tolerance: r.tolerance.value,
                })
            }
            Err(e) => {
                self.push(&r.file, &format!("{key}.file"), e);
                None
            }
        }
    }

    fn duration_ms(&mut self, raw: &Spanned<String>, key: &str) -> Option<i64> {
        match parse_duration(&raw.value) {
            Ok(d) => Some(d.as_millis().min(i64::MAX as u128) as i64),
            Err(e) => {
                self.push(raw, key, e);
                None
            }
        }
    }

    fn model(&mut self, raw: &RawModel, i: usize) -> Option<ModelConfig> {
        let k = format!("models[{i}]");
        let start = self.issues.len();
        if !valid_name(&raw.name.value) {
            self.push(&raw.name, &format!("{k}.name"), format!("{:?} must match [a-z0-9_-]+", raw.name.value));
        }
        let loss_name = raw.loss.as_ref().map_or("zero-one", |l| l.value.as_str());
        let loss_max = raw.loss_max.as_ref().map(|m| m.value);
        if let Some(m) = &raw.loss_max {
            if !(m.value > 0.0 && m.value.is_finite()) {
                self.push(m, &format!("{k}.loss_max"), format!("must be a positive finite number, got {}", m.value));
            }
        }
        let need_max = |this: &mut Checker| -> f64 {
            match loss_max {
                Some(v) => v,
                None => {
                    let at = raw.loss.as_ref().expect("only named losses need a maximum");
                    this.push(at, &format!("{k}.loss_max"), format!("loss {loss_name} needs loss_max: the bounds hold only for losses bounded by a declared maximum"));
                    1.0
                }
            }
        };
        let loss = match loss_name {
            "zero-one" => {
                if let (Some(m), Some(v)) = (&raw.loss_max, loss_max) {
                    if v != 1.0 {
                        self.push(m, &format!("{k}.loss_max"), "zero-one loss has maximum 1; drop loss_max");
                    }
                }
                LossSpec::ZeroOne
            }
            "absolute" => LossSpec::Absolute { max: need_max(self) },
            "squared" => LossSpec::Squared { max: need_max(self) },
            "column" => LossSpec::Column { max: need_max(self) },
            other => {
                let at = raw.loss.as_ref().expect("a non-default name was written");
                self.push(
                    at,
                    &format!("{k}.loss"),
                    format!("{other:?} is not one of zero-one, absolute, squared, column"),
                );
                LossSpec::ZeroOne
            }
        };
        let confidence = match &raw.confidence {
            None => Confidence::new(0.95).expect("valid default"),
            Some(c) => Confidence::new(c.value).unwrap_or_else(|e| {
                self.push(c, &format!("{k}.confidence"), e);
                Confidence::new(0.95).expect("valid default")
            }),
        };
        let label_wait_ms = match &raw.label_wait {
            None => 7 * 86_400_000,
            Some(w) => self.duration_ms(w, &format!("{k}.label_wait")).unwrap_or(1),
        };
        let predictions = self.source(
            &raw.predictions,
            &format!("{k}.predictions"),
            "prediction",
            raw.predictions.value.columns.value.prediction.as_ref(),
        );
        let (label_key, label_col) = if loss_name == "column" {
            ("loss", raw.labels.value.columns.value.loss.as_ref())
        } else {
            ("label", raw.labels.value.columns.value.label.as_ref())
        };
        let labels = self.source(&raw.labels, &format!("{k}.labels"), label_key, label_col);

        let mut windows = Vec::new();
        let mut names = HashSet::new();
        if raw.windows.value.is_empty() {
            self.push(&raw.windows, &format!("{k}.windows"), "at least one window is needed");
        }
        for (j, w) in raw.windows.value.iter().enumerate() {
            let wk = format!("{k}.windows[{j}]");
            if !valid_name(&w.name.value) {
                self.push(&w.name, &format!("{wk}.name"), format!("{:?} must match [a-z0-9_-]+", w.name.value));
            } else if w.name.value == SINCE_RESET {
                self.push(
                    &w.name,
                    &format!("{wk}.name"),
                    format!("{SINCE_RESET:?} is reserved for the anytime sequences"),
                );
            } else if !names.insert(w.name.value.clone()) {
                self.push(&w.name, &format!("{wk}.name"), format!("duplicate window name {:?}", w.name.value));
            }
            let kind = match (&w.last, &w.span) {
                (Some(n), None) if n.value >= 1 => Some(WindowKind::Last(n.value as u64)),
                (Some(n), None) => {
                    self.push(n, &format!("{wk}.last"), format!("must be at least 1, got {}", n.value));
                    None
                }
                (None, Some(s)) => match self.duration_ms(s, &format!("{wk}.span")) {
                    Some(ms) if ms >= 1000 => Some(WindowKind::SpanMs(ms)),
                    Some(_) => {
                        self.push(
                            s,
                            &format!("{wk}.span"),
                            "must be at least 1s (cohorts count predictions per second)",
                        );
                        None
                    }
                    None => None,
                },
                (Some(n), Some(_)) => {
                    self.push(n, &wk, "give last or span, not both");
                    None
                }
                (None, None) => {
                    self.push(&w.name, &wk, "give last: N (newest N samples) or span: DURATION");
                    None
                }
            };
            if let Some(kind) = kind {
                windows.push(WindowConfig {
                    name: w.name.value.clone(),
                    kind,
                    mature: w.mature.as_ref().is_some_and(|m| m.value),
                });
            }
        }

        let sla = raw.sla.as_ref().map(|s| {
            let s = &s.value;
            let b = loss.max();
            if !(s.max_risk.value >= 0.0 && s.max_risk.value <= b) {
                self.push(
                    &s.max_risk,
                    &format!("{k}.sla.max_risk"),
                    format!("must lie in the loss range [0, {b}], got {}", s.max_risk.value),
                );
            }
            let default_method = if loss.is_binary() { Method::ClopperPearson } else { Method::Betting };
            let method = match &s.method {
                None => default_method,
                Some(m) => match Method::parse(&m.value) {
                    Some(Method::ClopperPearson) if !loss.is_binary() => {
                        self.push(m, &format!("{k}.sla.method"), "clopper-pearson needs zero-one loss");
                        default_method
                    }
                    Some(x) => x,
                    None => {
                        self.push(m, &format!("{k}.sla.method"), format!("unknown method {:?}", m.value));
                        default_method
                    }
                },
            };
            let min_samples = match &s.min_samples {
                None => 30,
                Some(n) if n.value >= 1 => n.value as u64,
                Some(n) => {
                    self.push(n, &format!("{k}.sla.min_samples"), format!("must be at least 1, got {}", n.value));
                    1
                }
            };
            let min_label_coverage = match &s.min_label_coverage {
                None => 0.5,
                Some(c) if (0.0..=1.0).contains(&c.value) => c.value,
                Some(c) => {
                    self.push(
                        c,
                        &format!("{k}.sla.min_label_coverage"),
                        format!("must lie in [0, 1], got {}", c.value),
                    );
                    0.0
                }
            };
            let change_horizon = match &s.change_horizon {
                None => DEFAULT_CHANGE_HORIZON,
                Some(n) if n.value >= 1 => n.value as u64,
                Some(n) => {
                    self.push(
                        n,
                        &format!("{k}.sla.change_horizon"),
                        format!("must be at least 1 label, got {}", n.value),
                    );
                    1
                }
            };
            let reference = s
                .reference
                .as_ref()
                .and_then(|r| self.reference(r, &format!("{k}.sla.reference"), loss, method, confidence));
            let decide_on = match s.decide_on.as_ref().map(|d| d.value.as_str()) {
                None | Some("delay-robust") => DecideOn::DelayRobust,
                Some("labelled-only") => DecideOn::LabelledOnly,
                Some(other) => {
                    let d = s.decide_on.as_ref().expect("matched Some");
                    self.push(
                        d,
                        &format!("{k}.sla.decide_on"),
                        format!("{other:?} is not delay-robust or labelled-only"),
                    );
                    DecideOn::DelayRobust
                }
            };
            SlaConfig {
                max_risk: s.max_risk.value,
                method,
                min_samples,
                min_label_coverage,
                change_horizon,
                reference,
                decide_on,
            }
        });
        let mut alerts = AlertsConfig::default();
        if let Some(a) = &raw.alerts {
            if let Some(d) = &a.value.stalled_after {
                if let Some(ms) = self.duration_ms(d, &format!("{k}.alerts.stalled_after")) {
                    if ms < 60_000 {
                        self.push(d, &format!("{k}.alerts.stalled_after"), "must be at least 1m");
                    }
                    alerts.stalled_after = Duration::from_millis(ms.max(0) as u64);
                }
            }
            if let Some(r) = &a.value.max_reject_ratio {
                if r.value > 0.0 && r.value <= 1.0 {
                    alerts.max_reject_ratio = r.value;
                } else {
                    self.push(
                        r,
                        &format!("{k}.alerts.max_reject_ratio"),
                        format!("must lie in (0, 1], got {}", r.value),
                    );
                }
            }
        }
        let slices = raw.slices.as_ref().map(|sl| {
            let at = sl;
            let sl = &sl.value;
            let key = format!("{k}.slices");
            if raw.sla.is_none() {
                self.push(at, &key, "slices need an sla: they are searched for risk above max_risk");
            }
            let names = |list: &Option<Vec<Spanned<String>>>, what: &str, this: &mut Checker| -> Vec<String> {
                let mut out = Vec::new();
                for n in list.iter().flatten() {
                    if n.value.trim().is_empty() {
                        this.push(n, &format!("{key}.{what}"), "column names must not be empty");
                    } else if out.contains(&n.value) {
                        this.push(n, &format!("{key}.{what}"), format!("duplicate column {:?}", n.value));
                    } else {
                        out.push(n.value.clone());
                    }
                }
                out
            };
            let categorical = names(&sl.categorical, "categorical", self);
            let numeric = names(&sl.numeric, "numeric", self);
            if categorical.is_empty() && numeric.is_empty() {
                self.push(at, &key, "name at least one categorical or numeric feature column");
            }
            let ranged =
                |v: &Option<Spanned<i64>>, what: &str, lo: i64, hi: i64, default: i64, this: &mut Checker| -> usize {
                    match v {
                        None => default as usize,
                        Some(x) if (lo..=hi).contains(&x.value) => x.value as usize,
                        Some(x) => {
                            this.push(
                                x,
                                &format!("{key}.{what}"),
                                format!("must lie in [{lo}, {hi}], got {}", x.value),
                            );
                            default as usize
                        }
                    }
                };
            let depth = ranged(&sl.depth, "depth", 1, 3, 1, self);
            let top = ranged(&sl.top, "top", 1, 50, 5, self);
            let sign_draws = ranged(&sl.sign_draws, "sign_draws", 1, 1000, 20, self);
            let mut registered = Vec::new();
            for r in sl.registered.iter().flatten() {
                match crate::estimate::slices::parse_slice(&r.value, &categorical, &numeric) {
                    Ok(s) => registered.push(s),
                    Err(e) => self.push(r, &format!("{key}.registered"), e),
                }
            }
            let decide_state = sl.decide_state.as_ref().is_some_and(|d| d.value);
            SlicesConfig { categorical, numeric, depth, registered, top, sign_draws, decide_state }
        });
        let window_guarantee = match &raw.window_guarantee {
            None => WindowGuarantee::PerWindow,
            Some(g) => match g.value.as_str() {
                "per-window" => WindowGuarantee::PerWindow,
                "spent" => WindowGuarantee::Spent,
                other => {
                    self.push(g, &format!("{k}.window_guarantee"), format!("{other:?} is not per-window or spent"));
                    WindowGuarantee::PerWindow
                }
            },
        };

        if self.issues.len() > start {
            return None;
        }
        Some(ModelConfig {
            name: raw.name.value.clone(),
            predictions: predictions?,
            labels: labels?,
            loss,
            confidence,
            label_wait_ms,
            future_tolerance_ms: 86_400_000,
            windows,
            window_guarantee,
            sla,
            alerts,
            slices,
        })
    }
}

/// Turns a parser error into one located issue. The parser reports one problem at a time
/// (syntax, an unknown key, a wrong type); semantic problems are all collected afterwards.
pub(crate) fn parse_issue(e: &serde_saphyr::Error) -> ConfigIssue {
    let (line, column) = e.location().map_or((1, 1), |l| (l.line(), l.column()));
    let text = e.without_snippet().to_string();
    let text = text.lines().next().unwrap_or("").trim_start_matches("error: ");
    // "line L column C: message" → "message"
    let message = match text.find(": ") {
        Some(i) if text.starts_with("line ") => &text[i + 2..],
        _ => text,
    };
    // The position is already in the prefix; drop the parser's repetition of it.
    let message = message.rsplit_once(" at line ").map_or(message, |(m, _)| m);
    let key = if let Some(rest) = message.strip_prefix("duplicate mapping key: ") {
        rest.split(',').next().unwrap_or("(yaml)").trim().to_string()
    } else {
        message
            .split('`')
            .nth(1)
            .filter(|_| message.starts_with("unknown field") || message.starts_with("missing field"))
            .unwrap_or("(yaml)")
            .to_string()
    };
    // Found by fuzzing: a key written as '' gives an empty name, which would read as no key.
    let key = if key.is_empty() { "\"\"".to_string() } else { key };
    ConfigIssue { line, column, key, reason: message.to_string() }
}

/// Reads and validates a config file.
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let file = path.display().to_string();
    let one = |reason: String| ConfigError {
        file: file.clone(),
        issues: vec![ConfigIssue { line: 1, column: 1, key: "(file)".into(), reason }],
    };
    let text = std::fs::read_to_string(path).map_err(|e| one(format!("cannot read: {e}")))?;
    parse(&text, path)
}

/// Validates config text as if it were read from `path`.
pub fn parse(text: &str, path: &Path) -> Result<Config, ConfigError> {
    let file = path.display().to_string();
    let raw: RawConfig =
        serde_saphyr::from_str(text).map_err(|e| ConfigError { file: file.clone(), issues: vec![parse_issue(&e)] })?;
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let base = if base.as_os_str().is_empty() { PathBuf::from(".") } else { base };
    let mut c = Checker { base, issues: Vec::new() };

    let listen = match &raw.listen {
        None => DEFAULT_LISTEN.parse().expect("valid default"),
        Some(l) => l.value.parse().unwrap_or_else(|_| {
            c.push(l, "listen", format!("{:?} is not an address:port such as 127.0.0.1:9417", l.value));
            DEFAULT_LISTEN.parse().expect("valid default")
        }),
    };
    let state_dir = c.path(raw.state_dir.as_ref().map_or("./state", |s| s.value.as_str()));
    let rescan_interval = match &raw.rescan_interval {
        None => Duration::from_secs(30),
        Some(r) => parse_duration(&r.value).unwrap_or_else(|e| {
            c.push(r, "rescan_interval", e);
            Duration::from_secs(30)
        }),
    };
    let max_row_bytes = match &raw.max_row_bytes {
        None => 1 << 20,
        Some(m) if m.value >= 64 => m.value,
        Some(m) => {
            c.push(m, "max_row_bytes", format!("must be at least 64, got {}", m.value));
            1 << 20
        }
    };
    let http = http_limits(&mut c, &raw);
    let memory_limit_bytes =
        raw.memory_limit.as_ref().and_then(|m| parse_bytes(&m.value).map_err(|e| c.push(m, "memory_limit", e)).ok());
    let future_tolerance_ms = match &raw.future_tolerance {
        None => 86_400_000,
        Some(f) => c.duration_ms(f, "future_tolerance").unwrap_or(86_400_000),
    };
    if raw.models.value.is_empty() {
        c.push(&raw.models, "models", "at least one model is needed");
    }
    let mut models = Vec::new();
    let mut names = HashSet::new();
    for (i, m) in raw.models.value.iter().enumerate() {
        if !names.insert(m.name.value.clone()) {
            c.push(&m.name, &format!("models[{i}].name"), format!("duplicate model name {:?}", m.name.value));
        }
        if let Some(mc) = c.model(m, i) {
            models.push(ModelConfig { future_tolerance_ms, ..mc });
        }
    }
    if !c.issues.is_empty() {
        c.issues.sort_by_key(|p| (p.line, p.column));
        return Err(ConfigError { file, issues: c.issues });
    }
    Ok(Config {
        file: path.to_path_buf(),
        listen,
        state_dir,
        rescan_interval,
        max_row_bytes,
        http,
        memory_limit_bytes,
        models,
        web: crate::export::web::WebConfig::plain(),
    })
}

/// The HTTP surface's limits, each checked against a stated range.
fn http_limits(c: &mut Checker, raw: &RawConfig) -> HttpLimits {
    let d = HttpLimits::default();
    let mut int = |v: &Option<Spanned<i64>>, key: &str, lo: i64, hi: i64, default: i64| match v {
        None => default,
        Some(m) if (lo..=hi).contains(&m.value) => m.value,
        Some(m) => {
            c.push(m, key, format!("must lie in [{lo}, {hi}], got {}", m.value));
            default
        }
    };
    let max_connections = int(&raw.max_connections, "max_connections", 1, 65_536, d.max_connections as i64) as usize;
    let max_requests_per_connection =
        int(&raw.max_requests_per_connection, "max_requests_per_connection", 1, 1_000_000, 1000) as u32;
    // hyper's read buffer cannot be smaller than 8 KiB; 1 MiB of headers is already hostile.
    let max_header_bytes =
        int(&raw.max_header_bytes, "max_header_bytes", 1024, 1 << 20, d.max_header_bytes as i64) as usize;
    let mut dur = |v: &Option<Spanned<String>>, key: &str, default: Duration| match v {
        None => default,
        Some(h) => parse_duration(&h.value).unwrap_or_else(|e| {
            c.push(h, key, e);
            default
        }),
    };
    let limits = HttpLimits {
        max_connections,
        header_read_timeout: dur(&raw.header_read_timeout, "header_read_timeout", d.header_read_timeout),
        keep_alive_idle: dur(&raw.keep_alive_idle, "keep_alive_idle", d.keep_alive_idle),
        max_requests_per_connection,
        connection_lifetime: dur(&raw.connection_lifetime, "connection_lifetime", d.connection_lifetime),
        max_header_bytes,
    };
    if let Some(l) = &raw.connection_lifetime {
        if limits.connection_lifetime < limits.header_read_timeout {
            c.push(l, "connection_lifetime", "must be at least header_read_timeout");
        }
    }
    limits
}

impl Config {
    /// The resolved settings, as `check-config` prints them.
    pub fn describe(&self) -> String {
        let mut s = format!(
            "config: {}\nlisten: {}\nstate_dir: {}\nrescan_interval: {:?}\nmax_row_bytes: {}\nfuture_tolerance: {}s\n",
            self.file.display(),
            self.listen,
            self.state_dir.display(),
            self.rescan_interval,
            self.max_row_bytes,
            self.models.first().map_or(86_400, |m| m.future_tolerance_ms / 1000)
        );
        let h = &self.http;
        s += &format!(
            "http: max_connections {}, header_read_timeout {:?}, keep_alive_idle {:?}, max_requests_per_connection {}, connection_lifetime {:?}, max_header_bytes {}\n",
            h.max_connections, h.header_read_timeout, h.keep_alive_idle, h.max_requests_per_connection, h.connection_lifetime, h.max_header_bytes
        );
        s += &match self.memory_limit_bytes {
            Some(b) => format!("memory_limit: {b} bytes\n"),
            None => "memory_limit: from the cgroup at start-up, if any\n".to_string(),
        };
        for m in &self.models {
            s += &format!(
                "model {}:\n  loss: {}\n  confidence: {}\n  label_wait: {}s\n",
                m.name,
                m.loss,
                m.confidence.level(),
                m.label_wait_ms / 1000
            );
            for (kind, src) in [("predictions", &m.predictions), ("labels", &m.labels)] {
                s += &format!(
                    "  {kind}: {}/{} (format: {}; id: {}, time: {}, value: {})\n",
                    src.dir.display(),
                    src.pattern,
                    src.format.map_or("by extension", |f| if f == Format::Csv { "csv" } else { "jsonl" }),
                    src.id_column,
                    src.time_column,
                    src.value_column
                );
            }
            for w in &m.windows {
                let what = match (w.kind, w.mature) {
                    (WindowKind::Last(n), false) => {
                        format!("newest {n} labelled samples; cohort: the newest {n} predictions, labelled or not")
                    }
                    (WindowKind::SpanMs(ms), false) => {
                        format!("prediction time within {}s of the newest prediction", ms / 1000)
                    }
                    (WindowKind::Last(n), true) => format!("the newest {n} predictions whose label_wait is over"),
                    (WindowKind::SpanMs(ms), true) => {
                        format!("prediction time within {}s, ending label_wait before the newest prediction", ms / 1000)
                    }
                };
                s += &format!("  window {}: {what}\n", w.name);
            }
            match &m.sla {
                Some(sla) => {
                    s += &format!(
                        "  sla: max_risk {} decided by {} on the {} bounds (min_samples {}, min_label_coverage {})\n",
                        sla.max_risk,
                        sla.method,
                        sla.decide_on.as_str(),
                        sla.min_samples,
                        sla.min_label_coverage
                    );
                    if sla.decide_on == DecideOn::LabelledOnly {
                        s += &format!("  caution: {LABELLED_ONLY_CAUTION}\n");
                    }
                }
                None => s += "  sla: none\n",
            }
            s += &format!("  window bounds: {}\n", m.window_guarantee.as_str());
            if let Some(sla) = &m.sla {
                let delta = m.confidence.delta();
                s += &format!(
                    "  alarms (anytime, each false with probability <= {delta:.3e}): exceeded since reset (risk > {}); \
                     change (rise above {}; P(false alarm in the first {} labels) <= {delta:.3e})\n",
                    sla.max_risk, sla.max_risk, sla.change_horizon
                );
                if let Some(r) = &sla.reference {
                    s += &format!(
                        "  shift: reference {} (n {}, mean {:.6}, upper {:.6} at confidence {}) + tolerance {} = {:.6}; \
                         false alarm probability <= {:.3e}\n",
                        r.file.display(),
                        r.n,
                        r.mean,
                        r.upper,
                        r.confidence.level(),
                        r.tolerance,
                        r.max_risk(),
                        r.confidence.delta() + delta
                    );
                }
            }
        }
        s
    }
}

#[cfg(test)]
mod tests;
