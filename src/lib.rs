//! riskbound: certified bounds on the true risk of a deployed model.
//!
//! The data path reads in the folder names:
//! - [`ingest`]: batch files (CSV, JSON Lines) → rows of named cells → typed predictions and
//!   labels, every problem located by file, line and column;
//! - [`loss`]: a labelled prediction → a loss in [0, B];
//! - [`window`]: labels joined to predictions in durable state, cut into rolling windows;
//! - [`estimate`]: losses → lower and upper confidence bounds on the mean (pure functions);
//! - [`export`]: the latest snapshot as Prometheus metrics over HTTP.
//!
//! [`fleet`] is the fleet view's own path: every replica's series read back through the
//! Prometheus HTTP API, pooled per model and window, exported again.
//!
//! [`config`] parses and validates the daemon's YAML; [`app`] wires the stages; [`cmd`] holds
//! the command-line modes.

pub mod app;
pub mod cmd;
pub mod config;
pub mod estimate;
pub mod export;
pub mod fleet;
pub mod ingest;
pub mod loss;
pub mod window;
