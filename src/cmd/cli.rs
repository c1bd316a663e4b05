//! The command line: every mode's arguments, typed by clap (every choice a `ValueEnum`), and
//! the one place where arguments become a mode's validated plan. `main.rs` only parses and
//! dispatches; each mode's work is in its own file of `cmd/`.

use std::io;
use std::path::{Path, PathBuf};

use clap::{Args, Parser, Subcommand, ValueEnum};

use super::error::CliError;
use super::{bound, slices, track};
use crate::estimate::anytime::sequence::HoeffdingBoundary;
use crate::estimate::{Confidence, Method};
use crate::ingest::losses::{Input, LossSource};
use crate::ingest::Format;
use crate::loss::LossSpec;

#[derive(Parser)]
#[command(name = "riskbound", version, about = "Certified confidence bounds on a deployed model's true risk")]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand)]
pub enum Command {
    /// Bound the true risk of the labelled predictions in one file (CSV or JSON Lines)
    Bound(BoundArgs),
    /// Replay one file in order and print anytime-valid bounds and SLA alarms as they evolve
    Track(TrackArgs),
    /// Find the worst slices of one file and certify which are over the SLA
    Slices(SlicesArgs),
    /// Run the daemon: watch batch files, keep windows, serve bounds on /metrics
    Run(RunArgs),
    /// Restart a model's anytime sequences and alarms from the next label (after a redeploy,
    /// or once an alarm is handled). Safe while the daemon runs
    Reset(ResetArgs),
    /// Print Prometheus alerting rules for a daemon config (pages only on anytime alarms)
    Rules(RulesArgs),
    /// Read a password on standard input and print its bcrypt hash, for basic_auth_users
    HashPassword(HashPasswordArgs),
    /// Validate a daemon config file (and a web config) and print the resolved settings (exit 0 or 2)
    CheckConfig(CheckConfigArgs),
    /// Test whether the model's inputs (or scores) changed between a reference file and a
    /// current one, without labels: kernel MMD (permutation and spectral tests) and per-column KS
    InputShift(InputShiftArgs),
    /// Pool every replica's windows, read back through the Prometheus HTTP API, into fleet-wide
    /// bounds, SLA states and alarms: printed once, or served on /metrics
    Fleet(FleetArgs),
    /// Write a validator's HTML report of a period from the daemon's state: bounds over time,
    /// SLA states, alarms, certified slices, every input file with its SHA-256, and the replay
    Report(super::report::ReportArgs),
    /// Feed the files a report lists into a new state, as the daemon took them, to reproduce
    /// the report's numbers
    Replay(super::replay::ReplayArgs),
    /// Run the daemon on an invented scenario (a parcel-delivery model) at accelerated speed
    Demo(super::demo::DemoArgs),
}

/// Input formats of the one-off modes.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum FormatArg {
    Csv,
    Jsonl,
}

impl From<FormatArg> for Format {
    fn from(f: FormatArg) -> Format {
        match f {
            FormatArg::Csv => Format::Csv,
            FormatArg::Jsonl => Format::Jsonl,
        }
    }
}

/// How a prediction and a label make a loss.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum LossKind {
    ZeroOne,
    Absolute,
    Squared,
}

/// Log line format.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum LogFormat {
    Human,
    Json,
}

/// The time-uniform boundary of hoeffding-cs.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum BoundaryArg {
    Stitched,
    NormalMixture,
}

impl From<BoundaryArg> for HoeffdingBoundary {
    fn from(b: BoundaryArg) -> HoeffdingBoundary {
        match b {
            BoundaryArg::Stitched => HoeffdingBoundary::Stitched,
            BoundaryArg::NormalMixture => HoeffdingBoundary::NormalMixture,
        }
    }
}

#[derive(Args)]
pub struct RunArgs {
    /// The YAML config file
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
    /// Log format
    #[arg(long, value_name = "FORMAT", default_value = "human")]
    pub log_format: LogFormat,
    /// TLS and basic-auth settings of the HTTP surface (YAML: tls_server_config,
    /// basic_auth_users), as Prometheus exporters take them
    #[arg(long, value_name = "FILE")]
    pub web_config: Option<PathBuf>,
}

#[derive(Args)]
pub struct InputShiftArgs {
    /// The reference file (the validation set, or a healthy period): CSV or JSON Lines
    #[arg(long, value_name = "FILE")]
    pub reference: PathBuf,
    /// The current file, compared with the reference (it must share no rows with it)
    #[arg(long, value_name = "FILE")]
    pub current: PathBuf,
    /// Numeric columns, comma-separated; standardised by the reference's mean and standard deviation
    #[arg(long, value_name = "A,B", value_delimiter = ',')]
    pub columns: Vec<String>,
    /// Categorical columns, comma-separated; a differing value adds 1 to the squared distance
    #[arg(long, value_name = "C,D", value_delimiter = ',')]
    pub categorical: Vec<String>,
    /// The Gaussian kernel's bandwidth σ (default: the median pairwise distance of the pooled sample)
    #[arg(long, value_name = "S", value_parser = parse_loss_max)]
    pub bandwidth: Option<f64>,
    /// Confidence C: a test says "shifted" when its p-value is at most 1 - C
    #[arg(long, value_name = "C", default_value = "0.95", value_parser = parse_confidence)]
    pub confidence: Confidence,
    /// Permutations of the permutation test (0: skip it)
    #[arg(long, value_name = "P", default_value = "1000")]
    pub permutations: usize,
    /// Draws from the spectral test's simulated null
    #[arg(long, value_name = "D", default_value = "10000", value_parser = clap::value_parser!(u64).range(99..))]
    pub null_draws: u64,
    /// Seed of the subsample, the permutations and the null draws
    #[arg(long, value_name = "N", default_value = "1")]
    pub seed: u64,
    /// Above this many points per side, a seeded uniform subsample (the tests cost (m+n)^2 memory and up to (m+n)^3 time)
    #[arg(long, value_name = "M", default_value = "2000", value_parser = clap::value_parser!(u64).range(2..=20_000))]
    pub max_points: u64,
    /// Input format of both files; by default taken from each file's extension
    #[arg(long, value_name = "FORMAT")]
    pub format: Option<FormatArg>,
    /// One JSON document instead of a table
    #[arg(long)]
    pub json: bool,
    /// Print the time of each phase to standard error (used by the benchmark)
    #[arg(long, hide = true)]
    pub timings: bool,
}

#[derive(Args)]
pub struct FleetArgs {
    /// The replicas' YAML config (any replica's): the models, losses, confidences, windows and
    /// SLAs to expect. Its input directories need not exist here
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
    /// The Prometheus (or Prometheus-compatible store) that scrapes the replicas, as
    /// http[s]://host:port[/prefix]
    #[arg(long, value_name = "URL")]
    pub prometheus: String,
    /// Only the replicas of this scrape job (default: every job with riskbound series)
    #[arg(long, value_name = "NAME")]
    pub job: Option<String>,
    /// Serve the fleet series on this address (/metrics, /healthz, /readyz)
    #[arg(long, value_name = "ADDR", conflicts_with = "once")]
    pub listen: Option<std::net::SocketAddr>,
    /// Time between rounds when serving
    #[arg(long, value_name = "DURATION", default_value = "30s", value_parser = duration_arg)]
    pub interval: std::time::Duration,
    /// Pool once, print, and exit (2 when Prometheus cannot be read)
    #[arg(long)]
    pub once: bool,
    /// With --once: one JSON document instead of a table
    #[arg(long, requires = "once")]
    pub json: bool,
    /// A replica whose last successful scrape is older than this is left out as stale
    #[arg(long, value_name = "DURATION", default_value = "2m", value_parser = duration_arg)]
    pub max_age: std::time::Duration,
    /// How long one query may take
    #[arg(long, value_name = "DURATION", default_value = "10s", value_parser = duration_arg)]
    pub timeout: std::time::Duration,
    /// Basic-auth user toward Prometheus (with --prometheus-password-file)
    #[arg(long, value_name = "NAME", requires = "prometheus_password_file")]
    pub prometheus_user: Option<String>,
    /// File whose first line is the basic-auth password toward Prometheus
    #[arg(long, value_name = "FILE", requires = "prometheus_user")]
    pub prometheus_password_file: Option<PathBuf>,
    /// PEM file of the CA certificates that sign Prometheus's certificate (https; default: the
    /// platform's trusted roots)
    #[arg(long, value_name = "FILE")]
    pub prometheus_ca_file: Option<PathBuf>,
    /// TLS and basic-auth settings of the fleet view's own /metrics, as for `run`
    #[arg(long, value_name = "FILE", requires = "listen")]
    pub web_config: Option<PathBuf>,
    /// Log format (when serving)
    #[arg(long, value_name = "FORMAT", default_value = "human")]
    pub log_format: LogFormat,
}

/// A duration argument as the config writes them (500ms, 30s, 5m, 1h).
fn duration_arg(s: &str) -> Result<std::time::Duration, String> {
    crate::config::parse_duration(s).and_then(|d| if d.is_zero() { Err("must be above 0".to_string()) } else { Ok(d) })
}

#[derive(Args)]
pub struct ResetArgs {
    /// The model's name, as in the config
    pub model: String,
    /// The daemon's YAML config file
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
}

#[derive(Args)]
pub struct RulesArgs {
    /// The daemon's YAML config file
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
    /// The job label of Prometheus's scrape of riskbound (for the "down" alert)
    #[arg(long, value_name = "NAME", default_value = super::rules::DEFAULT_JOB)]
    pub job: String,
    /// Also the fleet view's rules, for its scrape job of this name (`riskbound fleet --listen`)
    #[arg(long, value_name = "NAME")]
    pub fleet_job: Option<String>,
}

#[derive(Args)]
pub struct HashPasswordArgs {
    /// bcrypt cost (4 to 31); each step doubles the work of a check
    #[arg(long, default_value = "12", value_parser = clap::value_parser!(u32).range(4..=31))]
    pub cost: u32,
}

#[derive(Args)]
pub struct CheckConfigArgs {
    /// The YAML config file
    pub file: PathBuf,
    /// A web config to validate with it (as `riskbound run --web-config` reads it)
    #[arg(long, value_name = "FILE")]
    pub web_config: Option<PathBuf>,
}

/// The input file and how to get a loss from each row (shared by `bound`, `track`, `slices`).
#[derive(Args)]
pub struct InputArgs {
    /// Input file: CSV with a header row, or JSON Lines; `-` reads standard input
    pub file: String,
    /// Input format; by default taken from the extension (.csv, .jsonl, .ndjson)
    #[arg(long)]
    pub format: Option<FormatArg>,
    /// Column holding a precomputed loss in [0, --loss-max]
    #[arg(long, value_name = "COL", requires = "loss_max", conflicts_with_all = ["prediction_column", "label_column", "loss"])]
    pub loss_column: Option<String>,
    /// The loss maximum B (required with --loss-column, --loss absolute and --loss squared)
    #[arg(long, value_name = "B", value_parser = parse_loss_max, allow_hyphen_values = true)]
    pub loss_max: Option<f64>,
    /// Column holding the model's prediction
    #[arg(long, value_name = "P", requires_all = ["label_column", "loss"])]
    pub prediction_column: Option<String>,
    /// Column holding the ground-truth label
    #[arg(long, value_name = "L", requires = "prediction_column")]
    pub label_column: Option<String>,
    /// How to compare prediction and label
    #[arg(long, value_name = "KIND", requires = "prediction_column")]
    pub loss: Option<LossKind>,
}

/// Grouping, for the modes that report per group.
#[derive(Args)]
pub struct GroupArgs {
    /// Report one set of bounds per value of this column
    #[arg(long, value_name = "COL")]
    pub group_by: Option<String>,
}

#[derive(Args)]
pub struct BoundArgs {
    #[command(flatten)]
    pub input: InputArgs,
    #[command(flatten)]
    pub group: GroupArgs,
    /// Confidence C of each one-sided bound, in (0, 1)
    #[arg(long, value_name = "C", default_value = "0.95", value_parser = parse_confidence, allow_hyphen_values = true)]
    pub confidence: Confidence,
    /// Bound method (repeatable): hoeffding, empirical-bernstein, clopper-pearson, kl, betting.
    /// Default: every method that applies to the data
    #[arg(long = "method", value_name = "NAME", value_parser = parse_method)]
    pub methods: Vec<Method>,
    /// Print one JSON document instead of a table
    #[arg(long)]
    pub json: bool,
    /// Print time spent per phase to standard error (used by the benchmark)
    #[arg(long, hide = true)]
    pub timings: bool,
}

#[derive(Args)]
pub struct TrackArgs {
    #[command(flatten)]
    pub input: InputArgs,
    #[command(flatten)]
    pub group: GroupArgs,
    /// Confidence C: each one-sided bound, and each alarm, errs with probability at most 1 − C
    /// over the whole replay, not per line
    #[arg(long, value_name = "C", default_value = "0.95", value_parser = parse_confidence, allow_hyphen_values = true)]
    pub confidence: Confidence,
    /// Print the state after every K rows of a group (and at the end of each group)
    #[arg(long, value_name = "K", default_value = "1000", value_parser = clap::value_parser!(u64).range(1..))]
    pub every: u64,
    /// The SLA θ: test "the risk exceeded θ since the start" and watch for a rise above θ
    #[arg(long, value_name = "THETA", allow_hyphen_values = true)]
    pub sla_max_risk: Option<f64>,
    /// The change detector's budget: P(false alarm within the first M rows) ≤ 1 − C
    /// [default: 100000]
    #[arg(long, value_name = "M", value_parser = clap::value_parser!(u64).range(1..))]
    pub change_horizon: Option<u64>,
    /// The time-uniform boundary of hoeffding-cs
    #[arg(long, value_name = "KIND", default_value = "stitched")]
    pub hoeffding_boundary: BoundaryArg,
    /// Cells of the betting-cs grid (its bounds are conservative by at most B/G)
    #[arg(long, value_name = "G", default_value = "1000", value_parser = clap::value_parser!(u32).range(2..=100_000))]
    pub grid: u32,
    /// One JSON object a line instead of a table
    #[arg(long)]
    pub json: bool,
}

#[derive(Args)]
pub struct SlicesArgs {
    #[command(flatten)]
    pub input: InputArgs,
    /// Categorical feature columns (comma-separated): every value is a slice
    #[arg(long, value_name = "A,B", value_delimiter = ',')]
    pub categorical: Vec<String>,
    /// Numeric feature columns (comma-separated): thresholds and intervals are slices
    #[arg(long, value_name = "X,Y", value_delimiter = ',')]
    pub numeric: Vec<String>,
    /// Conjunctions of up to D categorical features
    #[arg(long, value_name = "D", default_value = "1", value_parser = clap::value_parser!(u64).range(1..=3))]
    pub depth: u64,
    /// The SLA θ: a slice violates when its certified lower bound exceeds it
    #[arg(long, value_name = "THETA", allow_hyphen_values = true)]
    pub sla_max_risk: f64,
    /// Confidence C: all certificates together err with probability at most 1 − C
    #[arg(long, value_name = "C", default_value = "0.95", value_parser = parse_confidence, allow_hyphen_values = true)]
    pub confidence: Confidence,
    /// Slices to report (and to confirm on the held-out half)
    #[arg(long, value_name = "K", default_value = "10", value_parser = clap::value_parser!(u64).range(1..=1000))]
    pub top: u64,
    /// Seed of the split and the sign draws (recorded in the output)
    #[arg(long, value_name = "S", default_value = "1")]
    pub seed: u64,
    /// Rademacher sign vectors for the uniform certificate
    #[arg(long, value_name = "K", default_value = "100", value_parser = clap::value_parser!(u64).range(1..=100_000))]
    pub sign_draws: u64,
    /// Print one JSON document instead of a table
    #[arg(long)]
    pub json: bool,
    /// A slice fixed in advance (repeatable): F=V, F=V&G=W, F<=T, F>T or A<F<=B; bounded on the
    /// whole file at δ/M each
    #[arg(long, value_name = "SLICE")]
    pub registered: Vec<String>,
    /// Score column: also bound the error of a decision threshold re-tuned on this file,
    /// uniformly over all thresholds (needs --label-column with labels 0 or 1)
    #[arg(long, value_name = "S", requires = "label_column")]
    pub score_column: Option<String>,
    /// Print the scan's time split to standard error (used by the benchmark)
    #[arg(long, hide = true)]
    pub timings: bool,
}

fn parse_confidence(s: &str) -> Result<Confidence, String> {
    let v: f64 = s.parse().map_err(|_| format!("{s:?} is not a number"))?;
    Confidence::new(v).map_err(|e| e.to_string())
}

fn parse_loss_max(s: &str) -> Result<f64, String> {
    let v: f64 = s.parse().map_err(|_| format!("{s:?} is not a number"))?;
    if v > 0.0 && v.is_finite() {
        Ok(v)
    } else {
        Err(format!("must be a positive finite number, got {s}"))
    }
}

fn parse_method(s: &str) -> Result<Method, String> {
    Method::parse(s).ok_or_else(|| {
        let names: Vec<_> = Method::ALL.iter().map(|m| m.name()).collect();
        format!("unknown method {s:?} (one of: {})", names.join(", "))
    })
}

impl InputArgs {
    /// Where the losses come from, checked: the format, the columns and the loss.
    pub fn plan(&self, group_by: Option<String>) -> Result<Input, CliError> {
        let usage = |m: String| Err(CliError::Usage(m));
        let stdin = self.file == "-";
        let format = match (self.format, stdin) {
            (Some(f), _) => f.into(),
            (None, true) => return usage("reading standard input needs --format csv or --format jsonl".into()),
            (None, false) => match Format::from_path(Path::new(&self.file)) {
                Some(f) => f,
                None => {
                    return usage(format!(
                        "{}: cannot tell the format from the extension; pass --format csv or --format jsonl",
                        self.file
                    ))
                }
            },
        };
        let (source, loss) = match (&self.loss_column, &self.prediction_column, &self.label_column, self.loss) {
            (Some(col), None, None, None) => {
                (LossSource::Column(col.clone()), LossSpec::Column { max: self.loss_max.expect("clap requires it") })
            }
            (None, Some(p), Some(l), Some(kind)) => {
                let spec = match (kind, self.loss_max) {
                    (LossKind::ZeroOne, None | Some(1.0)) => LossSpec::ZeroOne,
                    (LossKind::ZeroOne, Some(b)) => {
                        return usage(format!("--loss zero-one has maximum 1; drop --loss-max {b}"));
                    }
                    (LossKind::Absolute, Some(max)) => LossSpec::Absolute { max },
                    (LossKind::Squared, Some(max)) => LossSpec::Squared { max },
                    (k, None) => {
                        let name = k.to_possible_value().expect("no skipped variants").get_name().to_string();
                        return usage(format!(
                            "--loss {name} needs --loss-max B: the bounds hold only for losses bounded by a declared B"
                        ));
                    }
                };
                (LossSource::Compare { prediction: p.clone(), label: l.clone() }, spec)
            }
            _ => {
                return usage(
                    "give either --loss-column COL --loss-max B, or --prediction-column P --label-column L --loss KIND"
                        .into(),
                )
            }
        };
        Ok(Input {
            file_label: if stdin { "<stdin>".into() } else { self.file.clone() },
            format,
            source,
            loss,
            group_by,
        })
    }

    /// Opens the input (standard input for `-`) and runs `f` on it.
    pub fn with_reader<T>(&self, f: impl FnOnce(Box<dyn io::Read>) -> anyhow::Result<T>) -> anyhow::Result<T> {
        if self.file == "-" {
            f(Box::new(io::stdin().lock()))
        } else {
            let h = std::fs::File::open(&self.file)
                .map_err(|e| CliError::Usage(format!("{}: cannot open: {e}", self.file)))?;
            f(Box::new(h))
        }
    }
}

/// θ must lie in the loss range.
fn check_theta(theta: f64, input: &Input) -> Result<(), CliError> {
    if theta >= 0.0 && theta <= input.loss.max() {
        Ok(())
    } else {
        Err(CliError::Usage(format!("--sla-max-risk {theta} is outside the loss range [0, {}]", input.loss.max())))
    }
}

impl BoundArgs {
    pub fn plan(&self) -> Result<bound::Plan, CliError> {
        let mut methods = self.methods.clone();
        methods.dedup();
        Ok(bound::Plan { input: self.input.plan(self.group.group_by.clone())?, confidence: self.confidence, methods })
    }
}

impl TrackArgs {
    pub fn plan(&self) -> Result<track::Plan, CliError> {
        let input = self.input.plan(self.group.group_by.clone())?;
        match self.sla_max_risk {
            Some(t) => check_theta(t, &input)?,
            None if self.change_horizon.is_some() => {
                return Err(CliError::Usage(
                    "--change-horizon needs --sla-max-risk: the detector watches for a rise above it".into(),
                ))
            }
            None => {}
        }
        Ok(track::Plan {
            input,
            confidence: self.confidence,
            every: self.every,
            sla_max_risk: self.sla_max_risk,
            change_horizon: self.change_horizon.unwrap_or(track::DEFAULT_CHANGE_HORIZON),
            hoeffding_boundary: self.hoeffding_boundary.into(),
            grid: self.grid,
        })
    }
}

impl SlicesArgs {
    pub fn plan(&self) -> Result<slices::Plan, CliError> {
        let input = self.input.plan(None)?;
        check_theta(self.sla_max_risk, &input)?;
        if self.categorical.is_empty() && self.numeric.is_empty() {
            return Err(CliError::Usage("name at least one --categorical or --numeric feature column".into()));
        }
        let registered = self
            .registered
            .iter()
            .map(|r| {
                slices::parse_slice(r, &self.categorical, &self.numeric)
                    .map_err(|e| CliError::Usage(format!("--registered {r:?}: {e}")))
            })
            .collect::<Result<_, _>>()?;
        Ok(slices::Plan {
            input,
            categorical: self.categorical.clone(),
            numeric: self.numeric.clone(),
            depth: self.depth as usize,
            sla_max_risk: self.sla_max_risk,
            confidence: self.confidence,
            top: self.top as usize,
            seed: self.seed,
            sign_draws: self.sign_draws as usize,
            score: self.score_column.clone(),
            registered,
        })
    }
}
