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

use crate::estimate::anytime::evidence::ChangeDetector;
use crate::estimate::anytime::sequence::HoeffdingBoundary;
use crate::estimate::anytime::{TrackerSpec, DEFAULT_GRID};
use crate::estimate::{Confidence, Method};
use crate::ingest::losses::{for_each_loss_with, Input, LossSource};
use crate::ingest::Format;
use crate::loss::LossSpec;

mod alerts;
mod check;
mod describe;
mod history;
mod http;
mod input_shift;
mod model;
mod raw;
mod settings;
mod sla;
mod slices;
pub mod web;
mod windows;

use check::*;
pub use check::{parse_bytes, parse_duration};
pub use http::HttpLimits;
use http::*;
use raw::*;
pub use settings::*;

/// The window name of the anytime sequences in metrics; no configured window may take it.
pub const SINCE_RESET: &str = "since-reset";

/// The change detector's horizon when none is configured: 10^5 labels.
pub const DEFAULT_CHANGE_HORIZON: u64 = 100_000;

/// How long SIGTERM waits for the current file by default: well under Kubernetes' 30 s.
pub const DEFAULT_SHUTDOWN_GRACE: Duration = Duration::from_secs(20);

/// Default listen address: loopback, so nothing is exposed unless asked for.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:9417";

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
    parse(&read(path)?, path)
}

fn read(path: &Path) -> Result<String, ConfigError> {
    std::fs::read_to_string(path).map_err(|e| ConfigError {
        file: path.display().to_string(),
        issues: vec![ConfigIssue { line: 1, column: 1, key: "(file)".into(), reason: format!("cannot read: {e}") }],
    })
}

/// Reads and validates a config file and, when given, the web config beside it: the one
/// trusted settings value the daemon runs on.
pub fn load_with_web(path: &Path, web_config: Option<&Path>) -> Result<Config, ConfigError> {
    let mut config = load(path)?;
    if let Some(w) = web_config {
        config.web = web::load(w)?;
    }
    Ok(config)
}

/// Reads and validates a replica's config where the replica does not run (the fleet view):
/// everything is checked but that its input directories can be listed here.
pub fn load_elsewhere(path: &Path) -> Result<Config, ConfigError> {
    parse_elsewhere(&read(path)?, path)
}

/// Validates config text as [`load_elsewhere`] does.
pub fn parse_elsewhere(text: &str, path: &Path) -> Result<Config, ConfigError> {
    parse_checked(text, path, false)
}

/// Validates config text as if it were read from `path`.
pub fn parse(text: &str, path: &Path) -> Result<Config, ConfigError> {
    parse_checked(text, path, true)
}

fn parse_checked(text: &str, path: &Path, check_dirs: bool) -> Result<Config, ConfigError> {
    let file = path.display().to_string();
    let raw: RawConfig =
        serde_saphyr::from_str(text).map_err(|e| ConfigError { file: file.clone(), issues: vec![parse_issue(&e)] })?;
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let base = if base.as_os_str().is_empty() { PathBuf::from(".") } else { base };
    let mut c = Checker { base, issues: Vec::new(), check_dirs };

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
    // Below Kubernetes' default terminationGracePeriodSeconds (30 s), so that the daemon, not
    // the kubelet's SIGKILL, decides how it stops.
    let shutdown_grace_period = match &raw.shutdown_grace_period {
        None => DEFAULT_SHUTDOWN_GRACE,
        Some(g) => match parse_duration(&g.value) {
            Ok(d) if d >= Duration::from_millis(100) && d <= Duration::from_secs(600) => d,
            Ok(_) => {
                c.push(g, "shutdown_grace_period", "must lie in [100ms, 10m]");
                DEFAULT_SHUTDOWN_GRACE
            }
            Err(e) => {
                c.push(g, "shutdown_grace_period", e);
                DEFAULT_SHUTDOWN_GRACE
            }
        },
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
    let state_max_bytes = raw
        .state_max_size
        .as_ref()
        .and_then(|m| parse_bytes(&m.value).map_err(|e| c.push(m, "state_max_size", e)).ok())
        .and_then(|b| {
            if b < MIN_STATE_BYTES {
                let m = raw.state_max_size.as_ref().expect("parsed above");
                c.push(m, "state_max_size", format!("must be at least {} MiB, got {b} bytes", MIN_STATE_BYTES >> 20));
                None
            } else {
                Some(b)
            }
        });
    let future_tolerance_ms = match &raw.future_tolerance {
        None => 86_400_000,
        Some(f) => c.duration_ms(f, "future_tolerance").unwrap_or(86_400_000),
    };
    let history = c.history(raw.history.as_ref());
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
        shutdown_grace_period,
        http,
        memory_limit_bytes,
        state_max_bytes,
        history,
        models,
        web: web::WebConfig::plain(),
    })
}

#[cfg(test)]
mod tests;
