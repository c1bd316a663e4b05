//! `riskbound replay`: feeds the files a report lists, in the order they were taken, into a new
//! state, exactly as the daemon takes them, so that `riskbound report` on that state writes the
//! report's numbers again.

use std::path::PathBuf;

use anyhow::Context;
use sha2::{Digest, Sha256};

use super::error::CliError;
use crate::window::Kind;

/// Options of `riskbound replay`.
#[derive(clap::Args, Debug)]
pub struct ReplayArgs {
    /// The daemon's YAML config file (the one the report names)
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
    /// The report's file list (REPORT.html.replay.tsv)
    #[arg(long, value_name = "FILE")]
    pub files: PathBuf,
    /// A new, empty state folder to write
    #[arg(long, value_name = "DIR")]
    pub state: PathBuf,
}

/// One line of the list, checked.
struct Entry {
    model: usize,
    kind: Kind,
    path: PathBuf,
}

fn read_list(a: &ReplayArgs, config: &crate::config::Config) -> anyhow::Result<Vec<Entry>> {
    let text = std::fs::read_to_string(&a.files).with_context(|| format!("reading {}", a.files.display()))?;
    let mut out = Vec::new();
    for (n, line) in (1u64..).zip(text.lines()) {
        if line.starts_with('#') || line.trim().is_empty() {
            continue;
        }
        let at = |why: String| CliError::Usage(format!("{}:{n}: {why}", a.files.display()));
        let cells: Vec<&str> = line.splitn(4, '\t').collect();
        let [model, kind, hash, path] = cells[..] else {
            return Err(at("expected model, kind, SHA-256 and path separated by tabs".into()).into());
        };
        let Some(i) = config.models.iter().position(|m| m.name == model) else {
            return Err(at(format!("model {model:?} is not in {}", a.config.display())).into());
        };
        let kind = match kind {
            "prediction" => Kind::Prediction,
            "label" => Kind::Label,
            k => return Err(at(format!("kind {k:?} is neither prediction nor label")).into()),
        };
        let bytes = std::fs::read(path).map_err(|e| at(format!("{path}: {e}")))?;
        let got = format!("{:x}", Sha256::digest(&bytes));
        if got != hash {
            return Err(
                at(format!("{path}: SHA-256 is {got}, the report recorded {hash}: the file changed since")).into()
            );
        }
        out.push(Entry { model: i, kind, path: PathBuf::from(path) });
    }
    Ok(out)
}

pub fn main(a: &ReplayArgs) -> anyhow::Result<()> {
    super::run::init_logs(super::cli::LogFormat::Human);
    let mut config = crate::config::load_elsewhere(&a.config)?;
    if a.state.join("riskbound.sqlite").exists() {
        return Err(CliError::Usage(format!(
            "{} already holds a riskbound state: replay into a new folder",
            a.state.display()
        ))
        .into());
    }
    let entries = read_list(a, &config)?;
    config.state_dir = a.state.clone();
    let files: Vec<(usize, Kind, PathBuf)> = entries.into_iter().map(|e| (e.model, e.kind, e.path)).collect();
    let taken = crate::app::replay(config, &files)?;
    println!("replayed {taken} of {} files into {}", files.len(), a.state.display());
    Ok(())
}
