//! The raw types: the YAML as written, every value with its location.

use super::*;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawConfig {
    pub(super) listen: Option<Spanned<String>>,
    pub(super) state_dir: Option<Spanned<String>>,
    pub(super) rescan_interval: Option<Spanned<String>>,
    pub(super) max_row_bytes: Option<Spanned<u64>>,
    pub(super) shutdown_grace_period: Option<Spanned<String>>,
    pub(super) future_tolerance: Option<Spanned<String>>,
    pub(super) max_connections: Option<Spanned<i64>>,
    pub(super) header_read_timeout: Option<Spanned<String>>,
    pub(super) keep_alive_idle: Option<Spanned<String>>,
    pub(super) max_requests_per_connection: Option<Spanned<i64>>,
    pub(super) connection_lifetime: Option<Spanned<String>>,
    pub(super) max_header_bytes: Option<Spanned<i64>>,
    pub(super) memory_limit: Option<Spanned<String>>,
    pub(super) state_max_size: Option<Spanned<String>>,
    pub(super) history: Option<Spanned<RawHistory>>,
    pub(super) models: Spanned<Vec<RawModel>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawHistory {
    pub(super) every: Option<Spanned<String>>,
    pub(super) keep: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawModel {
    pub(super) name: Spanned<String>,
    pub(super) predictions: Spanned<RawSource>,
    pub(super) labels: Spanned<RawSource>,
    pub(super) loss: Option<Spanned<String>>,
    pub(super) loss_max: Option<Spanned<f64>>,
    pub(super) confidence: Option<Spanned<f64>>,
    pub(super) label_wait: Option<Spanned<String>>,
    pub(super) windows: Spanned<Vec<RawWindow>>,
    pub(super) window_guarantee: Option<Spanned<String>>,
    pub(super) sla: Option<Spanned<RawSla>>,
    pub(super) alerts: Option<Spanned<RawAlerts>>,
    pub(super) slices: Option<Spanned<RawSlices>>,
    pub(super) max_samples: Option<Spanned<i64>>,
    pub(super) input_shift: Option<Spanned<RawInputShift>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawInputShift {
    pub(super) reference: Spanned<RawShiftReference>,
    pub(super) columns: Option<Vec<Spanned<String>>>,
    pub(super) categorical: Option<Vec<Spanned<String>>>,
    pub(super) window: Spanned<RawWindow>,
    pub(super) every: Option<Spanned<String>>,
    pub(super) min_points: Option<Spanned<i64>>,
    pub(super) max_points: Option<Spanned<i64>>,
    pub(super) permutations: Option<Spanned<i64>>,
    pub(super) bandwidth: Option<Spanned<f64>>,
    pub(super) confidence: Option<Spanned<f64>>,
    pub(super) seed: Option<Spanned<u64>>,
    pub(super) alarm: Option<Spanned<RawShiftAlarm>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawShiftReference {
    pub(super) file: Spanned<String>,
    pub(super) format: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawShiftAlarm {
    pub(super) enabled: Option<Spanned<bool>>,
    pub(super) sample_rate: Option<Spanned<f64>>,
    pub(super) memory: Option<Spanned<i64>>,
    pub(super) calibration: Option<Spanned<i64>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawSlices {
    pub(super) categorical: Option<Vec<Spanned<String>>>,
    pub(super) numeric: Option<Vec<Spanned<String>>>,
    pub(super) depth: Option<Spanned<i64>>,
    pub(super) registered: Option<Vec<Spanned<String>>>,
    pub(super) top: Option<Spanned<i64>>,
    pub(super) sign_draws: Option<Spanned<i64>>,
    pub(super) decide_state: Option<Spanned<bool>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawAlerts {
    pub(super) stalled_after: Option<Spanned<String>>,
    pub(super) max_reject_ratio: Option<Spanned<f64>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawSource {
    pub(super) dir: Spanned<String>,
    pub(super) pattern: Spanned<String>,
    pub(super) format: Option<Spanned<String>>,
    pub(super) columns: Spanned<RawColumns>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawColumns {
    pub(super) id: Option<Spanned<String>>,
    pub(super) time: Option<Spanned<String>>,
    pub(super) prediction: Option<Spanned<String>>,
    pub(super) label: Option<Spanned<String>>,
    pub(super) loss: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawWindow {
    pub(super) name: Spanned<String>,
    pub(super) last: Option<Spanned<i64>>,
    pub(super) span: Option<Spanned<String>>,
    pub(super) mature: Option<Spanned<bool>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawSla {
    pub(super) max_risk: Spanned<f64>,
    pub(super) method: Option<Spanned<String>>,
    pub(super) min_samples: Option<Spanned<i64>>,
    pub(super) min_label_coverage: Option<Spanned<f64>>,
    pub(super) change_horizon: Option<Spanned<i64>>,
    pub(super) reference: Option<Spanned<RawReference>>,
    pub(super) decide_on: Option<Spanned<String>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawReference {
    pub(super) file: Spanned<String>,
    pub(super) format: Option<Spanned<String>>,
    pub(super) columns: Spanned<RawColumns>,
    pub(super) tolerance: Spanned<f64>,
    pub(super) confidence: Option<Spanned<f64>>,
}
