//! The resolved settings, as `check-config` prints them.

use super::*;

impl Config {
    /// The resolved settings, as `check-config` prints them.
    pub fn describe(&self) -> String {
        let mut s = format!(
            "config: {}\nlisten: {}\nstate_dir: {}\nrescan_interval: {:?}\nmax_row_bytes: {}\nfuture_tolerance: {}s\nshutdown_grace_period: {:?}\n",
            self.file.display(),
            self.listen,
            self.state_dir.display(),
            self.rescan_interval,
            self.max_row_bytes,
            self.models.first().map_or(86_400, |m| m.future_tolerance_ms / 1000),
            self.shutdown_grace_period,
        );
        let h = &self.http;
        s += &format!(
            "http: max_connections {}, header_read_timeout {:?}, keep_alive_idle {:?}, max_requests_per_connection {}, connection_lifetime {:?}, max_header_bytes {}\n",
            h.max_connections, h.header_read_timeout, h.keep_alive_idle, h.max_requests_per_connection, h.connection_lifetime, h.max_header_bytes
        );
        s += &match self.memory_limit_bytes {
            Some(b) => format!("memory_limit: {b} bytes\n"),
            None => "memory_limit: from the cgroup at start-up, if any\n".to_string(),
        };
        s += &match self.state_max_bytes {
            Some(b) => format!("state_max_size: {b} bytes (ingest pauses beyond it)\n"),
            None => "state_max_size: none (the volume's size is the limit)\n".to_string(),
        };
        s += &format!(
            "history: a point per model every {}s of event time, kept {}s (the status page at / and `riskbound report` read it)\n",
            self.history.every_ms / 1000,
            self.history.keep_ms / 1000
        );
        s += &format!(
            "web: {}, basic auth {}\n",
            if self.web.tls.is_some() { "TLS" } else { "plain HTTP" },
            if self.web.users.is_empty() { "off".to_string() } else { format!("for {} user(s)", self.web.users.len()) }
        );
        for m in &self.models {
            s += &format!(
                "model {}:\n  loss: {}\n  confidence: {}\n  label_wait: {}s\n",
                m.name,
                m.loss,
                m.confidence.level(),
                m.label_wait_ms / 1000
            );
            for (kind, src) in [("predictions", &m.predictions), ("labels", &m.labels)] {
                s += &format!(
                    "  {kind}: {}/{} (format: {}; id: {}, time: {}, value: {})\n",
                    src.dir.display(),
                    src.pattern,
                    src.format.map_or("by extension", |f| if f == Format::Csv { "csv" } else { "jsonl" }),
                    src.id_column,
                    src.time_column,
                    src.value_column
                );
            }
            for w in &m.windows {
                let what = match (w.kind, w.mature) {
                    (WindowKind::Last(n), false) => {
                        format!("newest {n} labelled samples; cohort: the newest {n} predictions, labelled or not")
                    }
                    (WindowKind::SpanMs(ms), false) => {
                        format!("prediction time within {}s of the newest prediction", ms / 1000)
                    }
                    (WindowKind::Last(n), true) => format!("the newest {n} predictions whose label_wait is over"),
                    (WindowKind::SpanMs(ms), true) => {
                        format!("prediction time within {}s, ending label_wait before the newest prediction", ms / 1000)
                    }
                };
                s += &format!("  window {}: {what}\n", w.name);
            }
            match &m.sla {
                Some(sla) => {
                    s += &format!(
                        "  sla: max_risk {} decided by {} on the {} bounds (min_samples {}, min_label_coverage {})\n",
                        sla.max_risk,
                        sla.method,
                        sla.decide_on.as_str(),
                        sla.min_samples,
                        sla.min_label_coverage
                    );
                    if sla.decide_on == DecideOn::LabelledOnly {
                        s += &format!("  caution: {LABELLED_ONLY_CAUTION}\n");
                    }
                }
                None => s += "  sla: none\n",
            }
            s += &format!("  window bounds: {}\n", m.window_guarantee.as_str());
            s += &format!(
                "  max_samples: {} (betting and the slice search read a seeded subsample of at most this many; the other methods every sample)\n",
                m.max_samples
            );
            if let Some(sla) = &m.sla {
                let delta = m.confidence.delta();
                s += &format!(
                    "  alarms (anytime, each false with probability <= {delta:.3e}): exceeded since reset (risk > {}); \
                     change (rise above {}; P(false alarm in the first {} labels) <= {delta:.3e})\n",
                    sla.max_risk, sla.max_risk, sla.change_horizon
                );
                if let Some(r) = &sla.reference {
                    s += &format!(
                        "  shift: reference {} (n {}, mean {:.6}, upper {:.6} at confidence {}) + tolerance {} = {:.6}; \
                         false alarm probability <= {:.3e}\n",
                        r.file.display(),
                        r.n,
                        r.mean,
                        r.upper,
                        r.confidence.level(),
                        r.tolerance,
                        r.max_risk(),
                        r.confidence.delta() + delta
                    );
                }
            }
            if let Some(sh) = &m.input_shift {
                s += &input_shift_lines(sh);
            }
        }
        s
    }
}

/// The input-shift section in words, with its cautions.
fn input_shift_lines(sh: &InputShiftConfig) -> String {
    let window = match sh.window.kind {
        WindowKind::Last(n) => format!("the newest {n} predictions"),
        WindowKind::SpanMs(ms) => format!("the predictions within {} s of the newest", ms / 1000),
    };
    let r = &sh.reference;
    let mut s = format!(
        "  input shift: window {} ({window}) against reference {} ({} rows, {} tested; columns {}{}{}), a look every {} s of event time; \
         permutation test ({} permutations, exact level) and spectral test (asymptotic level) at level {:.3e}; \
         at least {} points, at most {} per side\n",
        sh.window.name,
        sh.reference_file.display(),
        r.rows,
        r.tested.len(),
        sh.numeric.join(","),
        if sh.categorical.is_empty() { "" } else { "; categorical " },
        sh.categorical.join(","),
        sh.every_ms / 1000,
        sh.permutations,
        sh.confidence.delta(),
        sh.min_points,
        sh.max_points,
    );
    match (&sh.alarm, &r.alarm) {
        (Some(a), Some(ar)) => {
            s += &format!(
            "  input-shift alarm (anytime, false with probability <= {:.3e}): {} calibration rows, bandwidth {:.6}, \
                 {} reference points to pair (each once), sample rate {}, witness from {} past pairs\n",
            sh.confidence.delta(),
            a.calibration,
            ar.sigma,
            ar.pool.len(),
            a.sample_rate,
            a.memory
        )
        }
        _ => s += "  input-shift alarm: off\n",
    }
    s += "  caution: a shift of the inputs is not a rise of the risk; the reference must share no rows with the window\n";
    s
}
