//! riskbound: certified bounds on the true risk of a deployed model.
//!
//! The data path reads in the folder names:
//! - [`ingest`]: batch files (CSV, JSON Lines) → rows of named cells, every problem located;
//! - [`loss`]: a row → a loss in [0, B];
//! - [`estimate`]: losses → lower and upper confidence bounds on the mean (pure functions);
//! - [`cmd`]: the command-line modes that wire these together.

pub mod cmd;
pub mod estimate;
pub mod ingest;
pub mod loss;
