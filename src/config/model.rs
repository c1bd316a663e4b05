//! One model's section: its name, loss, confidence, label wait and sources; its windows,
//! sla, alerts and slices are checked in their own files.

use super::*;

impl Checker {
    pub(super) fn source(
        &mut self,
        raw: &Spanned<RawSource>,
        key: &str,
        value_key: &str,
        value_col: Option<&Spanned<String>>,
    ) -> Option<SourceConfig> {
        let r = &raw.value;
        let mut ok = true;
        let dir = self.path(&r.dir.value);
        match std::fs::read_dir(&dir) {
            Ok(_) => {}
            Err(_) if !self.check_dirs => {}
            Err(e) => {
                self.push(&r.dir, &format!("{key}.dir"), format!("cannot read directory {}: {e}", dir.display()));
                ok = false;
            }
        }
        let pattern = if r.pattern.value.contains('/') {
            self.push(
                &r.pattern,
                &format!("{key}.pattern"),
                "a file-name pattern, not a path: put the directory in dir",
            );
            None
        } else {
            match glob::Pattern::new(&r.pattern.value) {
                Ok(p) => Some(p),
                Err(e) => {
                    self.push(&r.pattern, &format!("{key}.pattern"), format!("invalid glob pattern: {e}"));
                    None
                }
            }
        };
        let format = match &r.format {
            None => None,
            Some(f) => match Format::parse(&f.value) {
                Some(x) => Some(x),
                None => {
                    self.push(f, &format!("{key}.format"), format!("{:?} is not csv or jsonl", f.value));
                    ok = false;
                    None
                }
            },
        };
        let column = |c: Option<&Spanned<String>>, name: &str, this: &mut Checker| -> Option<String> {
            match c {
                Some(v) if !v.value.trim().is_empty() => Some(v.value.clone()),
                Some(v) => {
                    this.push(v, &format!("{key}.columns.{name}"), "must not be empty");
                    None
                }
                None => {
                    this.push(&r.columns, &format!("{key}.columns.{name}"), "missing: name the column that holds it");
                    None
                }
            }
        };
        let id = column(r.columns.value.id.as_ref(), "id", self);
        let time = column(r.columns.value.time.as_ref(), "time", self);
        let value = column(value_col, value_key, self);
        match (ok, pattern, id, time, value) {
            (true, Some(pattern), Some(id_column), Some(time_column), Some(value_column)) => {
                Some(SourceConfig { dir, pattern, format, id_column, time_column, value_column })
            }
            _ => None,
        }
    }

    /// Reads the reference file and bounds its risk; problems are reported at `key`.
    pub(super) fn model(&mut self, raw: &RawModel, i: usize) -> Option<ModelConfig> {
        let k = format!("models[{i}]");
        let start = self.issues.len();
        if !valid_name(&raw.name.value) {
            self.push(&raw.name, &format!("{k}.name"), format!("{:?} must match [a-z0-9_-]+", raw.name.value));
        }
        let loss_name = raw.loss.as_ref().map_or("zero-one", |l| l.value.as_str());
        let loss_max = raw.loss_max.as_ref().map(|m| m.value);
        if let Some(m) = &raw.loss_max {
            if !(m.value > 0.0 && m.value.is_finite()) {
                self.push(m, &format!("{k}.loss_max"), format!("must be a positive finite number, got {}", m.value));
            }
        }
        let need_max = |this: &mut Checker| -> f64 {
            match loss_max {
                Some(v) => v,
                None => {
                    let at = raw.loss.as_ref().expect("only named losses need a maximum");
                    this.push(at, &format!("{k}.loss_max"), format!("loss {loss_name} needs loss_max: the bounds hold only for losses bounded by a declared maximum"));
                    1.0
                }
            }
        };
        let loss = match loss_name {
            "zero-one" => {
                if let (Some(m), Some(v)) = (&raw.loss_max, loss_max) {
                    if v != 1.0 {
                        self.push(m, &format!("{k}.loss_max"), "zero-one loss has maximum 1; drop loss_max");
                    }
                }
                LossSpec::ZeroOne
            }
            "absolute" => LossSpec::Absolute { max: need_max(self) },
            "squared" => LossSpec::Squared { max: need_max(self) },
            "column" => LossSpec::Column { max: need_max(self) },
            other => {
                let at = raw.loss.as_ref().expect("a non-default name was written");
                self.push(
                    at,
                    &format!("{k}.loss"),
                    format!("{other:?} is not one of zero-one, absolute, squared, column"),
                );
                LossSpec::ZeroOne
            }
        };
        let confidence = match &raw.confidence {
            None => Confidence::new(0.95).expect("valid default"),
            Some(c) => Confidence::new(c.value).unwrap_or_else(|e| {
                self.push(c, &format!("{k}.confidence"), e);
                Confidence::new(0.95).expect("valid default")
            }),
        };
        let label_wait_ms = match &raw.label_wait {
            None => 7 * 86_400_000,
            Some(w) => self.duration_ms(w, &format!("{k}.label_wait")).unwrap_or(1),
        };
        let predictions = self.source(
            &raw.predictions,
            &format!("{k}.predictions"),
            "prediction",
            raw.predictions.value.columns.value.prediction.as_ref(),
        );
        let (label_key, label_col) = if loss_name == "column" {
            ("loss", raw.labels.value.columns.value.loss.as_ref())
        } else {
            ("label", raw.labels.value.columns.value.label.as_ref())
        };
        let labels = self.source(&raw.labels, &format!("{k}.labels"), label_key, label_col);

        let windows = self.windows(raw, &k);

        let sla = raw.sla.as_ref().map(|s| self.sla(&s.value, &k, loss, confidence));
        let alerts = self.alerts(raw.alerts.as_ref(), &k);
        let slices = raw.slices.as_ref().map(|sl| self.slices(sl, raw.sla.is_some(), &k));
        let window_guarantee = match &raw.window_guarantee {
            None => WindowGuarantee::PerWindow,
            Some(g) => match g.value.as_str() {
                "per-window" => WindowGuarantee::PerWindow,
                "spent" => WindowGuarantee::Spent,
                other => {
                    self.push(g, &format!("{k}.window_guarantee"), format!("{other:?} is not per-window or spent"));
                    WindowGuarantee::PerWindow
                }
            },
        };

        let max_samples = self.max_samples(raw.max_samples.as_ref(), slices.is_some(), &k);
        let slice_columns = slices.as_ref().map(SlicesConfig::columns).unwrap_or_default();
        let input_shift = raw.input_shift.as_ref().and_then(|s| self.input_shift(s, &k, confidence, slice_columns));

        if self.issues.len() > start {
            return None;
        }
        Some(ModelConfig {
            name: raw.name.value.clone(),
            predictions: predictions?,
            labels: labels?,
            loss,
            confidence,
            label_wait_ms,
            future_tolerance_ms: 86_400_000,
            windows,
            window_guarantee,
            sla,
            alerts,
            slices,
            max_samples,
            input_shift,
        })
    }
}

impl Checker {
    /// `max_samples` of model `k`: at least the slice search's minimum when it has one.
    fn max_samples(&mut self, v: Option<&Spanned<i64>>, has_slices: bool, k: &str) -> u64 {
        let least = if has_slices { MIN_SLICE_SAMPLES } else { MIN_MAX_SAMPLES };
        match v {
            None => DEFAULT_MAX_SAMPLES,
            Some(v) if v.value >= least as i64 => v.value as u64,
            Some(v) => {
                let why = if has_slices {
                    format!("must be at least {least} with a slice search (it discovers on half the samples and confirms on the other half), got {}", v.value)
                } else {
                    format!("must be at least {least}, got {}", v.value)
                };
                self.push(v, &format!("{k}.max_samples"), why);
                DEFAULT_MAX_SAMPLES
            }
        }
    }
}
