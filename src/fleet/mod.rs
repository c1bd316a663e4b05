//! The fleet view: a model served by many replicas has one riskbound beside each, each seeing a
//! share of the traffic. The fleet view reads every replica's per-window statistics back from
//! the metrics stack that scrapes them (the Prometheus HTTP API), pools them per model and
//! window at one query instant, and publishes fleet-wide bounds, SLA states and alarms.
//!
//! Its own data path: `prom` (the HTTP API client) → `pool` (pure: series to pooled numbers) →
//! export/fleet.rs (the `riskbound_fleet_*` series). `cmd/fleet.rs` wires them.

pub mod pool;
pub mod prom;

use std::collections::BTreeSet;

pub use pool::{FleetReport, Observed};
pub use prom::{BasicAuth, Client, PromError};

/// What one round reads: the three queries of [`pool::queries`], at one instant.
pub async fn observe(client: &Client, job: Option<&str>, time: f64) -> Result<Observed, PromError> {
    let [series, scraped, up] = pool::queries(job);
    let (series, scraped, up) =
        tokio::try_join!(client.query(&series, time), client.query(&scraped, time), client.query(&up, time))?;
    Ok(Observed { time, up, series, scraped })
}

/// The served fleet view's state between rounds.
#[derive(Debug, Default)]
pub struct FleetState {
    /// The last good report (kept, marked stale, while Prometheus fails).
    pub report: Option<FleetReport>,
    /// True when the last round failed, so `report` is older than one interval.
    pub stale: bool,
    /// Unix seconds of the last good round.
    pub last_success: Option<f64>,
    /// Failed rounds by [`PromError::kind`].
    pub failures: std::collections::BTreeMap<&'static str, u64>,
    /// Models whose fleet alarm fired at some look since the fleet view started.
    pub latched: BTreeSet<String>,
}

impl FleetState {
    /// Takes a round's outcome.
    pub fn record(&mut self, outcome: Result<FleetReport, PromError>, now: f64) {
        match outcome {
            Ok(r) => {
                for a in &r.alarms {
                    if a.firing {
                        self.latched.insert(a.model.clone());
                    }
                }
                self.report = Some(r);
                self.stale = false;
                self.last_success = Some(now);
            }
            Err(e) => {
                *self.failures.entry(e.kind()).or_insert(0) += 1;
                self.stale = true;
            }
        }
    }
}

impl PromError {
    /// The `reason` label of the failure counter.
    pub fn kind(&self) -> &'static str {
        match self {
            PromError::Url { .. } | PromError::File { .. } | PromError::TlsSetup(_) => "setup",
            PromError::Connect { .. } | PromError::Timeout { .. } | PromError::Http { .. } => "unreachable",
            PromError::Tls { .. } => "tls",
            PromError::Status { .. } => "http_status",
            PromError::Api { .. } => "rejected",
            PromError::Malformed { .. } => "malformed",
        }
    }
}
