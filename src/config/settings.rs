//! The validated types: the settings the rest of the daemon trusts.

use super::*;

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
    /// How long SIGTERM waits for the file being read to finish before the daemon exits
    /// anyway (its transaction then rolls back; nothing is lost or counted twice).
    pub shutdown_grace_period: Duration,
    /// What one HTTP client may hold.
    pub http: HttpLimits,
    /// The container's memory limit, for the memory ticket rule: `memory_limit` if set, else
    /// read from the cgroup at start-up (None when unlimited or unknown).
    pub memory_limit_bytes: Option<u64>,
    /// The most the state database may grow to (`state_max_size`): beyond it commits are
    /// refused as on a full disk, so riskbound pauses its ingest before an emptyDir's sizeLimit
    /// would make the kubelet evict the whole pod, model and all.
    pub state_max_bytes: Option<u64>,
    /// The evaluation history's retention (the status page and the report read it).
    pub history: HistoryConfig,
    pub models: Vec<ModelConfig>,
    /// TLS and basic auth of the HTTP surface (from `--web-config`; plain HTTP by default).
    pub web: super::web::WebConfig,
}

/// The evaluation history: a point per model whenever its event clock (the newest event time
/// it has taken) enters a new `every`, kept while it is within `keep` of that clock.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct HistoryConfig {
    pub every_ms: i64,
    pub keep_ms: i64,
}

impl Default for HistoryConfig {
    /// An hourly point for 90 days: 2160 points per model.
    fn default() -> Self {
        HistoryConfig { every_ms: 3_600_000, keep_ms: 90 * 86_400_000 }
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
    /// The most samples of a window the methods that need the samples themselves (betting,
    /// the slice search) read: a seeded uniform subsample above it.
    pub max_samples: u64,
    /// Label-free tests of whether the model's inputs moved away from a reference, if configured.
    pub input_shift: Option<InputShiftConfig>,
}

/// A model's label-free input-shift tests: a reference sample of its inputs (read when the
/// config is loaded), the feature columns read from its prediction files, a window of recent
/// predictions tested against the reference every `every_ms` of event time, and an
/// anytime-valid alarm fed with every sampled prediction.
#[derive(Clone, Debug)]
pub struct InputShiftConfig {
    pub reference_file: PathBuf,
    pub numeric: Vec<String>,
    pub categorical: Vec<String>,
    /// Where each of `numeric` then `categorical` sits among a prediction record's feature
    /// cells (slice columns first, then the shift columns slices do not already read).
    pub cells: Vec<usize>,
    /// The window tested (by prediction time; never `mature`: no labels are involved).
    pub window: WindowConfig,
    /// Event time between two looks.
    pub every_ms: i64,
    /// Fewer current points than this make a look inconclusive.
    pub min_points: usize,
    /// Above this many points per side, a subsample.
    pub max_points: usize,
    pub permutations: usize,
    pub bandwidth: Option<f64>,
    pub confidence: Confidence,
    pub seed: u64,
    pub alarm: Option<ShiftAlarmConfig>,
    pub reference: std::sync::Arc<ShiftReference>,
}

/// The feature cells a prediction record carries: the slice search's columns (categorical,
/// then numeric), then the input-shift columns the slices do not already read; and where each
/// input-shift column sits among them. The one place that lays the cells out.
pub fn feature_layout(slice_columns: Vec<String>, shift_columns: &[String]) -> (Vec<String>, Vec<usize>) {
    let mut cols = slice_columns;
    let cells = shift_columns
        .iter()
        .map(|c| {
            cols.iter().position(|f| f == c).unwrap_or_else(|| {
                cols.push(c.clone());
                cols.len() - 1
            })
        })
        .collect();
    (cols, cells)
}

/// The draws of the null spectrum per look.
pub const SHIFT_NULL_DRAWS: usize = 10_000;

/// The sequential alarm's settings.
#[derive(Clone, Debug, PartialEq)]
pub struct ShiftAlarmConfig {
    /// The share of predictions paired with a reference point (by a hash of the request id).
    pub sample_rate: f64,
    /// Past pairs the witness is built from.
    pub memory: usize,
    /// Reference points set aside for the standardisation and bandwidth, never paired.
    pub calibration: usize,
}

/// The reference as the tests use it.
#[derive(Clone, Debug)]
pub struct ShiftReference {
    /// Rows in the file.
    pub rows: usize,
    /// The per-look tests' reference: a seeded subsample of at most max_points rows.
    pub tested: crate::estimate::kernel::Points,
    /// Mean and standard deviation (ddof 1) per numeric column, of `tested`.
    pub scale: Vec<(f64, f64)>,
    /// The reference's categorical values and their codes.
    pub coder: crate::ingest::points::Coder,
    pub alarm: Option<AlarmReference>,
}

/// The alarm's share of the reference.
#[derive(Clone, Debug)]
pub struct AlarmReference {
    /// Standardisation from the calibration rows.
    pub scale: Vec<(f64, f64)>,
    /// The kernel's bandwidth: given, or the median pairwise distance of the calibration rows.
    pub sigma: f64,
    /// The rows to pair, in a seeded random order, standardised; each is used once.
    pub pool: Vec<crate::estimate::kernel_betting::Point>,
    /// Identifies pool, scale and bandwidth: the stored alarm keeps its place in the pool only
    /// while they are the same.
    pub fingerprint: String,
}

/// The least `state_max_size`: the schema and one batch file's transaction need room.
pub const MIN_STATE_BYTES: u64 = 16 << 20;

/// The default of `max_samples`: betting and the slice search on 20 000 samples take tens of
/// milliseconds a round, and their bounds are within a few 1/√20 000 ≈ 0.007 of the mean.
pub const DEFAULT_MAX_SAMPLES: u64 = 20_000;
/// The least `max_samples` at all: betting needs some hundred samples to say anything.
pub const MIN_MAX_SAMPLES: u64 = 100;
/// The least `max_samples` with a slice search (a judgement, not a law): the search discovers
/// on one half and confirms on the other, and a slice of 5% of 1 000 samples leaves 25 rows to
/// confirm it on, about the fewest on which a confirmation can clear a margin of 0.1.
pub const MIN_SLICE_SAMPLES: u64 = 1_000;

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
    /// The feature columns prediction records carry (see [`feature_layout`]).
    pub fn feature_columns(&self) -> Vec<String> {
        let slices = self.slices.as_ref().map(SlicesConfig::columns).unwrap_or_default();
        let shift =
            self.input_shift.as_ref().map(|s| [s.numeric.as_slice(), &s.categorical].concat()).unwrap_or_default();
        feature_layout(slices, &shift).0
    }

    /// How many of the feature cells are the slice search's.
    pub fn slice_feature_count(&self) -> usize {
        self.slices.as_ref().map_or(0, |s| s.categorical.len() + s.numeric.len())
    }

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
