//! `riskbound report`: a validator's HTML report of a period, from the daemon's durable state
//! (read only, so it runs beside a live daemon), with the list of files a replay needs.

use std::path::{Path, PathBuf};

use anyhow::Context;
use sha2::{Digest, Sha256};

use super::error::CliError;
use crate::export::report::{self, ModelReport, ReportInput};
use crate::window::history::HistoryPoint;
use crate::window::{Store, TakenFile};

/// Options of `riskbound report`.
#[derive(clap::Args, Debug)]
pub struct ReportArgs {
    /// The daemon's YAML config file
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
    /// Only this model (default: every model of the config)
    #[arg(long, value_name = "NAME")]
    pub model: Option<String>,
    /// Start of the period, event time: RFC 3339, a date (2026-11-02, 00:00 UTC) or Unix seconds
    #[arg(long, value_name = "TIME")]
    pub from: Option<String>,
    /// End of the period (inclusive; a date means the end of that day)
    #[arg(long, value_name = "TIME")]
    pub to: Option<String>,
    /// The state folder to read (default: the config's state_dir)
    #[arg(long, value_name = "DIR")]
    pub state: Option<PathBuf>,
    /// Where to write the report; the replay's file list goes beside it (FILE.replay.tsv)
    #[arg(long, value_name = "FILE.html")]
    pub out: PathBuf,
}

/// A period bound: a date is its day's first (or, for `to`, last) millisecond.
pub fn parse_period(s: &str, end: bool) -> Result<i64, CliError> {
    let date = time::format_description::parse_borrowed::<2>("[year]-[month]-[day]").expect("a valid description");
    if let Ok(d) = time::Date::parse(s.trim(), &date) {
        let start = d.midnight().assume_utc().unix_timestamp() * 1000;
        return Ok(if end { start + 86_400_000 - 1 } else { start });
    }
    crate::ingest::records::parse_time_ms(s).ok_or_else(|| {
        CliError::Usage(format!("{s:?} is not a time: use RFC 3339, a date such as 2026-11-02, or Unix seconds"))
    })
}

/// The files of the period (their accepted rows' event times meet it; a file with none counts
/// when it was taken between two that do), and how many files a replay must read: every file
/// up to the period's last, since a window may reach back before the period.
pub fn period_files(all: &[TakenFile], from: Option<i64>, to: Option<i64>) -> (Vec<TakenFile>, usize) {
    let (lo, hi) = (from.unwrap_or(i64::MIN), to.unwrap_or(i64::MAX));
    let meets = |f: &TakenFile| f.span.is_some_and(|(a, b)| b >= lo && a <= hi);
    let first = all.iter().position(meets);
    let last = all.iter().rposition(meets);
    let (Some(first), Some(last)) = (first, last) else { return (Vec::new(), 0) };
    let files = all[first..=last].iter().filter(|f| f.span.is_none() || meets(f)).cloned().collect();
    (files, last + 1)
}

/// Writes the replay's file list: one line per file, tab-separated model, kind, SHA-256, path.
fn write_manifest(path: &Path, files: &[TakenFile]) -> anyhow::Result<()> {
    let mut body =
        String::from("# riskbound replay list: model, kind, SHA-256, path (tab-separated), in the order taken\n");
    for f in files {
        // A relative name is relative to where the daemon ran; written absolute when it is here.
        let name = std::fs::canonicalize(&f.name).map_or(f.name.clone(), |p| p.display().to_string());
        body.push_str(&format!("{}\t{}\t{}\t{}\n", f.model, f.kind.as_str(), f.hash, name));
    }
    std::fs::write(path, body).with_context(|| format!("writing {}", path.display()))
}

/// The state after the last file, as the newest point, when the period reaches the model's
/// event clock and the clock has moved past the last kept point (the history holds closed
/// buckets only). Not for δ spent over evaluations: a report is not an evaluation the daemon
/// counted, and k = 1 would claim more confidence than the budget paid for.
fn state_now(store: &Store, m: &crate::config::ModelConfig, to: Option<i64>) -> anyhow::Result<Option<HistoryPoint>> {
    if m.window_guarantee == crate::config::WindowGuarantee::Spent {
        return Ok(None);
    }
    let Some(clock) = store.watermark(&m.name)? else { return Ok(None) };
    if to.is_some_and(|t| t < clock) {
        return Ok(None);
    }
    let mut snap = crate::window::model_snapshot(store, m, 1)?;
    snap.input_shift = crate::window::shift::snapshot(store, m, None)?;
    Ok(Some(HistoryPoint::of(&snap, clock)))
}

pub fn main(a: &ReportArgs) -> anyhow::Result<()> {
    let text = std::fs::read_to_string(&a.config).with_context(|| format!("reading {}", a.config.display()))?;
    let config = crate::config::load_elsewhere(&a.config)?;
    let models: Vec<_> = config.models.iter().filter(|m| a.model.as_ref().is_none_or(|n| &m.name == n)).collect();
    if models.is_empty() {
        let names: Vec<_> = config.models.iter().map(|m| m.name.as_str()).collect();
        return Err(CliError::Usage(format!(
            "no model {:?} in {} (models: {})",
            a.model,
            a.config.display(),
            names.join(", ")
        ))
        .into());
    }
    let from = a.from.as_deref().map(|s| parse_period(s, false)).transpose()?;
    let to = a.to.as_deref().map(|s| parse_period(s, true)).transpose()?;
    if let (Some(f), Some(t)) = (from, to) {
        if f > t {
            return Err(CliError::Usage("--from is after --to".into()).into());
        }
    }
    let state_dir = a.state.clone().unwrap_or_else(|| config.state_dir.clone());
    let store = Store::open_read_only(&state_dir)
        .ok_or_else(|| CliError::Usage(format!("no riskbound state in {}", state_dir.display())))?;
    let mut reports = Vec::new();
    for m in &models {
        let mut history: Vec<HistoryPoint> = store
            .history(&m.name, from.unwrap_or(i64::MIN), to.unwrap_or(i64::MAX))?
            .into_iter()
            .filter_map(|(_, j)| HistoryPoint::parse(&j))
            .collect();
        if let Some(now) = state_now(&store, m, to)? {
            history.push(now);
        }
        reports.push(ModelReport { config: m, history });
    }
    let one = a.model.as_deref();
    let all_files: Vec<TakenFile> =
        store.taken_files(one)?.into_iter().filter(|f| models.iter().any(|m| m.name == f.model)).collect();
    let (files, replay_files) = period_files(&all_files, from, to);
    let manifest = PathBuf::from(format!("{}.replay.tsv", a.out.display()));
    write_manifest(&manifest, &all_files[..replay_files])?;
    let mut period_args = String::new();
    for (flag, v) in [("--model", &a.model), ("--from", &a.from), ("--to", &a.to)] {
        if let Some(v) = v {
            period_args.push_str(&format!(" {flag} {v}"));
        }
    }
    let config_shown = std::fs::canonicalize(&a.config).unwrap_or_else(|_| a.config.clone()).display().to_string();
    let input = ReportInput {
        config_path: config_shown.clone(),
        config_sha256: format!("{:x}", Sha256::digest(text.as_bytes())),
        config_text: text,
        state_dir: state_dir.display().to_string(),
        from_ms: from,
        to_ms: to,
        generated_ms: std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_millis() as i64),
        models: reports,
        files,
        replay_files,
        manifest: manifest.display().to_string(),
        replay_commands: vec![
            format!("riskbound replay --config {config_shown} --files {} --state NEW_STATE_DIR", manifest.display()),
            format!("riskbound report --config {config_shown} --state NEW_STATE_DIR{period_args} --out again.html"),
        ],
    };
    std::fs::write(&a.out, report::render(&input)).with_context(|| format!("writing {}", a.out.display()))?;
    println!(
        "report: {} ({} files in the period; replay list {})",
        a.out.display(),
        input.files.len(),
        manifest.display()
    );
    Ok(())
}
