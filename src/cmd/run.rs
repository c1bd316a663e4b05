//! `riskbound run`: the daemon, with its logs set up and its assumptions stated at start-up.

use std::io;

use super::cli::{LogFormat, RunArgs};

/// Logs go to standard error, human-readable or one JSON object a line; RUST_LOG filters.
pub fn init_logs(format: LogFormat) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into());
    // Colour only on a terminal: logs piped to files or collectors stay plain text.
    let ansi = std::io::IsTerminal::is_terminal(&io::stderr());
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(io::stderr).with_ansi(ansi);
    match format {
        LogFormat::Json => builder.json().init(),
        LogFormat::Human => builder.init(),
    }
}

pub fn main(a: &RunArgs) -> anyhow::Result<()> {
    let config = crate::config::load_with_web(&a.config, a.web_config.as_deref())?;
    init_logs(a.log_format);
    tracing::info!(
        models = config.models.len(),
        "riskbound {}: bounds assume i.i.d. predictions within a window and bounded losses; the delay-robust bounds \
         (which decide the SLA state by default) and the anytime sequences and alarms (fed in prediction-time order \
         once label_wait is over) hold whatever the label delays depend on; the labelled-only bounds also assume \
         labels are not delayed or missing because of the outcome",
        env!("CARGO_PKG_VERSION")
    );
    for m in &config.models {
        if m.sla.as_ref().is_some_and(|s| s.decide_on == crate::config::DecideOn::LabelledOnly) {
            tracing::warn!(model = %m.name, "{}", crate::config::LABELLED_ONLY_CAUTION);
        }
    }
    let running = crate::app::start(config)?;
    running.run_until_signal()
}
