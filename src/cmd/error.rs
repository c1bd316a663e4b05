//! The command line's errors and their exit codes: 0 success, 2 the user's to fix (usage,
//! bad input, a bad config, an address already taken, a Prometheus the fleet view cannot read),
//! 1 anything else.

/// An error that is the user's to fix, with the message to print.
#[derive(Debug, thiserror::Error)]
pub enum CliError {
    #[error("{0}")]
    Usage(String),
}

/// The exit code for an error a mode returned, by its type.
pub fn exit_code(e: &anyhow::Error) -> u8 {
    let users = e.downcast_ref::<CliError>().is_some()
        || e.downcast_ref::<crate::config::ConfigError>().is_some()
        || e.downcast_ref::<super::bound::BoundError>().is_some()
        || e.downcast_ref::<crate::ingest::DecodeError>().is_some()
        || matches!(e.downcast_ref::<super::track::TrackError>(), Some(super::track::TrackError::Input(_)))
        || e.downcast_ref::<crate::app::BindError>().is_some()
        // Prometheus unreachable, refusing, or answering nonsense: the fleet view's setup or
        // its metrics stack is the user's to fix.
        || e.downcast_ref::<crate::fleet::PromError>().is_some()
        || e.downcast_ref::<super::input_shift::ShiftError>().is_some();
    if users {
        2
    } else {
        1
    }
}

/// The message to print: the user's errors as they are, others with their chain of causes.
pub fn message(e: &anyhow::Error) -> String {
    if e.downcast_ref::<CliError>().is_some() || e.downcast_ref::<crate::config::ConfigError>().is_some() {
        e.to_string()
    } else {
        format!("riskbound: {e:#}")
    }
}
