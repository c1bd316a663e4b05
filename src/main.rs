//! The `riskbound` binary: parses the command line, runs one mode, maps errors to exit codes
//! (0 success, 2 bad input or usage, 1 anything else).

use std::io::{self, BufWriter, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context;
use clap::{Args, Parser, Subcommand};

use riskbound::cmd::bound::{self, BoundError, Input, LossSource, Plan};
use riskbound::cmd::track::{self, TrackError};
use riskbound::estimate::anytime::sequence::HoeffdingBoundary;
use riskbound::estimate::{Confidence, Method};
use riskbound::ingest::Format;
use riskbound::loss::LossSpec;

#[derive(Parser)]
#[command(name = "riskbound", version, about = "Certified confidence bounds on a deployed model's true risk")]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
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
    Reset {
        /// The model's name, as in the config
        model: String,
        /// The daemon's YAML config file
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
    },
    /// Print Prometheus alerting rules for a daemon config (pages only on anytime alarms)
    Rules {
        /// The daemon's YAML config file
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
        /// The job label of Prometheus's scrape of riskbound (for the "down" alert)
        #[arg(long, value_name = "NAME", default_value = riskbound::cmd::rules::DEFAULT_JOB)]
        job: String,
    },
    /// Read a password on standard input and print its bcrypt hash, for basic_auth_users
    HashPassword {
        /// bcrypt cost (4 to 31); each step doubles the work of a check
        #[arg(long, default_value = "12", value_parser = clap::value_parser!(u32).range(4..=31))]
        cost: u32,
    },
    /// Validate a daemon config file and print the resolved settings (exit 0 or 2)
    CheckConfig {
        /// The YAML config file
        file: PathBuf,
    },
    /// Run the daemon on an invented scenario (a parcel-delivery model) at accelerated speed
    Demo(riskbound::cmd::demo::DemoArgs),
}

#[derive(Args)]
struct RunArgs {
    /// The YAML config file
    #[arg(long, value_name = "FILE")]
    config: PathBuf,
    /// Log format
    #[arg(long, value_name = "FORMAT", default_value = "human", value_parser = ["human", "json"])]
    log_format: String,
    /// TLS and basic-auth settings of the HTTP surface (YAML: tls_server_config,
    /// basic_auth_users), as Prometheus exporters take them
    #[arg(long, value_name = "FILE")]
    web_config: Option<PathBuf>,
}

/// The input file and how to get a loss from each row (shared by `bound` and `track`).
#[derive(Args)]
struct InputArgs {
    /// Input file: CSV with a header row, or JSON Lines; `-` reads standard input
    file: String,
    /// Input format; by default taken from the extension (.csv, .jsonl, .ndjson)
    #[arg(long, value_parser = ["csv", "jsonl"])]
    format: Option<String>,
    /// Column holding a precomputed loss in [0, --loss-max]
    #[arg(long, value_name = "COL", requires = "loss_max", conflicts_with_all = ["prediction_column", "label_column", "loss"])]
    loss_column: Option<String>,
    /// The loss maximum B (required with --loss-column, --loss absolute and --loss squared)
    #[arg(long, value_name = "B", value_parser = parse_loss_max, allow_hyphen_values = true)]
    loss_max: Option<f64>,
    /// Column holding the model's prediction
    #[arg(long, value_name = "P", requires_all = ["label_column", "loss"])]
    prediction_column: Option<String>,
    /// Column holding the ground-truth label
    #[arg(long, value_name = "L", requires = "prediction_column")]
    label_column: Option<String>,
    /// How to compare prediction and label
    #[arg(long, value_name = "KIND", value_parser = ["zero-one", "absolute", "squared"], requires = "prediction_column")]
    loss: Option<String>,
    /// Report one set of bounds per value of this column
    #[arg(long, value_name = "COL")]
    group_by: Option<String>,
}

#[derive(Args)]
struct BoundArgs {
    #[command(flatten)]
    input: InputArgs,
    /// Confidence C of each one-sided bound, in (0, 1)
    #[arg(long, value_name = "C", default_value = "0.95", value_parser = parse_confidence, allow_hyphen_values = true)]
    confidence: Confidence,
    /// Bound method (repeatable): hoeffding, empirical-bernstein, clopper-pearson, kl, betting.
    /// Default: every method that applies to the data
    #[arg(long = "method", value_name = "NAME", value_parser = parse_method)]
    methods: Vec<Method>,
    /// Print one JSON document instead of a table
    #[arg(long)]
    json: bool,
    /// Print time spent per phase to standard error (used by the benchmark)
    #[arg(long, hide = true)]
    timings: bool,
}

#[derive(Args)]
struct TrackArgs {
    #[command(flatten)]
    input: InputArgs,
    /// Confidence C: each one-sided bound, and each alarm, errs with probability at most 1 − C
    /// over the whole replay, not per line
    #[arg(long, value_name = "C", default_value = "0.95", value_parser = parse_confidence, allow_hyphen_values = true)]
    confidence: Confidence,
    /// Print the state after every K rows of a group (and at the end of each group)
    #[arg(long, value_name = "K", default_value = "1000", value_parser = clap::value_parser!(u64).range(1..))]
    every: u64,
    /// The SLA θ: test "the risk exceeded θ since the start" and watch for a rise above θ
    #[arg(long, value_name = "THETA", allow_hyphen_values = true)]
    sla_max_risk: Option<f64>,
    /// The change detector's budget: P(false alarm within the first M rows) ≤ 1 − C
    /// [default: 100000]
    #[arg(long, value_name = "M", value_parser = clap::value_parser!(u64).range(1..))]
    change_horizon: Option<u64>,
    /// The time-uniform boundary of hoeffding-cs
    #[arg(long, value_name = "KIND", default_value = "stitched", value_parser = ["stitched", "normal-mixture"])]
    hoeffding_boundary: String,
    /// Cells of the betting-cs grid (its bounds are conservative by at most B/G)
    #[arg(long, value_name = "G", default_value = "1000", value_parser = clap::value_parser!(u32).range(2..=100_000))]
    grid: u32,
    /// One JSON object a line instead of a table
    #[arg(long)]
    json: bool,
}

#[derive(Args)]
struct SlicesArgs {
    #[command(flatten)]
    input: InputArgs,
    /// Categorical feature columns (comma-separated): every value is a slice
    #[arg(long, value_name = "A,B", value_delimiter = ',')]
    categorical: Vec<String>,
    /// Numeric feature columns (comma-separated): thresholds and intervals are slices
    #[arg(long, value_name = "X,Y", value_delimiter = ',')]
    numeric: Vec<String>,
    /// Conjunctions of up to D categorical features
    #[arg(long, value_name = "D", default_value = "1", value_parser = clap::value_parser!(u64).range(1..=3))]
    depth: u64,
    /// The SLA θ: a slice violates when its certified lower bound exceeds it
    #[arg(long, value_name = "THETA", allow_hyphen_values = true)]
    sla_max_risk: f64,
    /// Confidence C: all certificates together err with probability at most 1 − C
    #[arg(long, value_name = "C", default_value = "0.95", value_parser = parse_confidence, allow_hyphen_values = true)]
    confidence: Confidence,
    /// Slices to report (and to confirm on the held-out half)
    #[arg(long, value_name = "K", default_value = "10", value_parser = clap::value_parser!(u64).range(1..=1000))]
    top: u64,
    /// Seed of the split and the sign draws (recorded in the output)
    #[arg(long, value_name = "S", default_value = "1")]
    seed: u64,
    /// Rademacher sign vectors for the uniform certificate
    #[arg(long, value_name = "K", default_value = "100", value_parser = clap::value_parser!(u64).range(1..=100_000))]
    sign_draws: u64,
    /// Print the JSON document (the only output format)
    #[arg(long)]
    json: bool,
    /// A slice fixed in advance (repeatable): F=V, F=V&G=W, F<=T, F>T or A<F<=B; bounded on the
    /// whole file at δ/M each
    #[arg(long, value_name = "SLICE")]
    registered: Vec<String>,
    /// Score column: also bound the error of a decision threshold re-tuned on this file,
    /// uniformly over all thresholds (needs --label-column with labels 0 or 1)
    #[arg(long, value_name = "S", requires = "label_column")]
    score_column: Option<String>,
    /// Print the scan's time split to standard error (used by the benchmark)
    #[arg(long, hide = true)]
    timings: bool,
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

/// An error that is the user's to fix: exit status 2.
#[derive(Debug)]
struct UsageError(String);

impl std::fmt::Display for UsageError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}
impl std::error::Error for UsageError {}

fn plan_input(a: &InputArgs) -> Result<Input, UsageError> {
    let stdin = a.file == "-";
    let format = match (&a.format, stdin) {
        (Some(f), _) => Format::parse(f).expect("clap restricts the values"),
        (None, true) => return Err(UsageError("reading standard input needs --format csv or --format jsonl".into())),
        (None, false) => Format::from_path(Path::new(&a.file)).ok_or_else(|| {
            UsageError(format!(
                "{}: cannot tell the format from the extension; pass --format csv or --format jsonl",
                a.file
            ))
        })?,
    };
    let (source, loss) = match (&a.loss_column, &a.prediction_column, &a.label_column, a.loss.as_deref()) {
        (Some(col), None, None, None) => {
            (LossSource::Column(col.clone()), LossSpec::Column { max: a.loss_max.expect("clap requires it") })
        }
        (None, Some(p), Some(l), Some(kind)) => {
            let spec = match (kind, a.loss_max) {
                ("zero-one", None | Some(1.0)) => LossSpec::ZeroOne,
                ("zero-one", Some(b)) => {
                    return Err(UsageError(format!("--loss zero-one has maximum 1; drop --loss-max {b}")));
                }
                ("absolute", Some(max)) => LossSpec::Absolute { max },
                ("squared", Some(max)) => LossSpec::Squared { max },
                (k, None) => {
                    return Err(UsageError(format!(
                        "--loss {k} needs --loss-max B: the bounds hold only for losses bounded by a declared B"
                    )));
                }
                (k, Some(_)) => unreachable!("clap restricts --loss, got {k}"),
            };
            (LossSource::Compare { prediction: p.clone(), label: l.clone() }, spec)
        }
        _ => {
            return Err(UsageError(
                "give either --loss-column COL --loss-max B, or --prediction-column P --label-column L --loss KIND"
                    .into(),
            ))
        }
    };
    Ok(Input {
        file_label: if stdin { "<stdin>".into() } else { a.file.clone() },
        format,
        source,
        loss,
        group_by: a.group_by.clone(),
    })
}

/// Opens the input (standard input for `-`) and runs `f` on it.
fn with_input<T>(file: &str, f: impl FnOnce(Box<dyn io::Read>) -> anyhow::Result<T>) -> anyhow::Result<T> {
    if file == "-" {
        f(Box::new(io::stdin().lock()))
    } else {
        let h = std::fs::File::open(file).map_err(|e| UsageError(format!("{file}: cannot open: {e}")))?;
        f(Box::new(h))
    }
}

fn run_bound(a: &BoundArgs) -> anyhow::Result<()> {
    let mut methods = a.methods.clone();
    methods.dedup();
    let plan = Plan { input: plan_input(&a.input)?, confidence: a.confidence, methods };
    let report = with_input(&a.input.file, |src| Ok(bound::run(&plan, src)?))?;
    if a.timings {
        for (phase, d) in &report.timings {
            eprintln!("timing {phase} {:.6}", d.as_secs_f64());
        }
    }
    let stdout = io::stdout();
    let mut out = BufWriter::new(stdout.lock());
    if a.json {
        serde_json::to_writer(&mut out, &bound::to_json(&report)).context("writing JSON")?;
        writeln!(out)?;
    } else {
        bound::write_table(&report, &mut out)?;
    }
    out.flush()?;
    Ok(())
}

fn run_slices(a: &SlicesArgs) -> anyhow::Result<()> {
    let input = plan_input(&a.input)?;
    if input.group_by.is_some() {
        return Err(UsageError(
            "slices searches the groups itself: drop --group-by, name --categorical columns".into(),
        )
        .into());
    }
    if !(a.sla_max_risk >= 0.0 && a.sla_max_risk <= input.loss.max()) {
        return Err(UsageError(format!(
            "--sla-max-risk {} is outside the loss range [0, {}]",
            a.sla_max_risk,
            input.loss.max()
        ))
        .into());
    }
    if a.categorical.is_empty() && a.numeric.is_empty() {
        return Err(UsageError("name at least one --categorical or --numeric feature column".into()).into());
    }
    let plan = riskbound::cmd::slices::Plan {
        input,
        categorical: a.categorical.clone(),
        numeric: a.numeric.clone(),
        depth: a.depth as usize,
        sla_max_risk: a.sla_max_risk,
        confidence: a.confidence,
        top: a.top as usize,
        seed: a.seed,
        sign_draws: a.sign_draws as usize,
        score: a.score_column.clone(),
        registered: a
            .registered
            .iter()
            .map(|r| {
                riskbound::cmd::slices::parse_slice(r, &a.categorical, &a.numeric)
                    .map_err(|e| UsageError(format!("--registered {r:?}: {e}")))
            })
            .collect::<Result<_, _>>()?,
    };
    let _ = a.json; // JSON is the one output format; the flag is accepted for symmetry
    let doc = with_input(&a.input.file, |src| {
        Ok(riskbound::cmd::slices::run(&plan, src, a.timings).map_err(BoundError::from)?)
    })?;
    let stdout = io::stdout();
    let mut out = BufWriter::new(stdout.lock());
    serde_json::to_writer(&mut out, &doc).context("writing JSON")?;
    writeln!(out)?;
    out.flush()?;
    Ok(())
}

fn run_track(a: &TrackArgs) -> anyhow::Result<()> {
    let input = plan_input(&a.input)?;
    if let Some(t) = a.sla_max_risk {
        if !(t >= 0.0 && t <= input.loss.max()) {
            return Err(
                UsageError(format!("--sla-max-risk {t} is outside the loss range [0, {}]", input.loss.max())).into()
            );
        }
    } else if a.change_horizon.is_some() {
        return Err(UsageError(
            "--change-horizon needs --sla-max-risk: the detector watches for a rise above it".into(),
        )
        .into());
    }
    let plan = track::Plan {
        input,
        confidence: a.confidence,
        every: a.every,
        sla_max_risk: a.sla_max_risk,
        change_horizon: a.change_horizon.unwrap_or(track::DEFAULT_CHANGE_HORIZON),
        hoeffding_boundary: HoeffdingBoundary::parse(&a.hoeffding_boundary).expect("clap restricts the values"),
        grid: a.grid,
    };
    let stdout = io::stdout();
    let mut out = BufWriter::new(stdout.lock());
    let json = a.json;
    with_input(&a.input.file, |src| Ok(track::run(&plan, src, &mut out, json)?))?;
    out.flush()?;
    Ok(())
}

/// Logs go to standard error, human-readable or one JSON object a line; RUST_LOG filters.
fn init_logs(format: &str) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into());
    // Colour only on a terminal: logs piped to files or collectors stay plain text.
    let ansi = std::io::IsTerminal::is_terminal(&io::stderr());
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(io::stderr).with_ansi(ansi);
    if format == "json" {
        builder.json().init();
    } else {
        builder.init();
    }
}

fn load_config(path: &Path) -> anyhow::Result<riskbound::config::Config> {
    riskbound::config::load(path).map_err(|e| UsageError(e.to_string()).into())
}

fn hash_password(cost: u32) -> anyhow::Result<()> {
    let mut line = String::new();
    io::stdin().read_line(&mut line).context("reading the password")?;
    let password = line.trim_end_matches(['\n', '\r']);
    if password.is_empty() {
        return Err(UsageError("no password on standard input".into()).into());
    }
    println!("{}", bcrypt::hash(password, cost).context("hashing")?);
    Ok(())
}

fn run_reset(model: &str, config: &Path) -> anyhow::Result<()> {
    let config = load_config(config)?;
    if !config.models.iter().any(|m| m.name == model) {
        let names: Vec<_> = config.models.iter().map(|m| m.name.as_str()).collect();
        return Err(UsageError(format!(
            "no model {model:?} in {} (models: {})",
            config.file.display(),
            names.join(", ")
        ))
        .into());
    }
    let mut store = riskbound::window::Store::open(&config.state_dir)
        .with_context(|| format!("opening the state in {}", config.state_dir.display()))?;
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_millis() as i64);
    store.reset(model, now).context("writing the reset")?;
    println!("{model}: anytime sequences and alarms restart from the next prediction whose label_wait is over");
    Ok(())
}

fn run_daemon(a: &RunArgs) -> anyhow::Result<()> {
    let mut config = load_config(&a.config)?;
    if let Some(w) = &a.web_config {
        config.web = riskbound::export::web::load(w).map_err(|e| UsageError(e.to_string()))?;
    }
    init_logs(&a.log_format);
    tracing::info!(
        models = config.models.len(),
        "riskbound {}: bounds assume i.i.d. predictions within a window and bounded losses; the delay-robust bounds \
         (which decide the SLA state by default) and the anytime sequences and alarms (fed in prediction-time order \
         once label_wait is over) hold whatever the label delays depend on; the labelled-only bounds also assume \
         labels are not delayed or missing because of the outcome",
        env!("CARGO_PKG_VERSION")
    );
    for m in &config.models {
        if m.sla.as_ref().is_some_and(|s| s.decide_on == riskbound::config::DecideOn::LabelledOnly) {
            tracing::warn!(model = %m.name, "{}", riskbound::config::LABELLED_ONLY_CAUTION);
        }
    }
    let running = riskbound::app::start(config)?;
    running.run_until_signal()
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    let result = match &cli.command {
        Command::Bound(a) => run_bound(a),
        Command::Track(a) => run_track(a),
        Command::Slices(a) => run_slices(a),
        Command::Run(a) => run_daemon(a),
        Command::Reset { model, config } => run_reset(model, config),
        Command::HashPassword { cost } => hash_password(*cost),
        Command::Rules { config, job } => {
            load_config(config).map(|c| print!("{}", riskbound::cmd::rules::render(&c, job)))
        }
        Command::CheckConfig { file } => load_config(file).map(|c| print!("{}", c.describe())),
        Command::Demo(a) => {
            init_logs("human");
            riskbound::cmd::demo::run(a)
        }
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            if e.downcast_ref::<UsageError>().is_some() {
                eprintln!("{e}");
            } else {
                eprintln!("riskbound: {e:#}");
            }
            let user_error = e.downcast_ref::<UsageError>().is_some()
                || e.downcast_ref::<BoundError>().is_some()
                || matches!(e.downcast_ref::<TrackError>(), Some(TrackError::Input(_)))
                || e.chain().any(|c| c.to_string().starts_with("binding "));
            ExitCode::from(if user_error { 2 } else { 1 })
        }
    }
}
