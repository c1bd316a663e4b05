//! A model's SLA and its reference set.

use super::*;

impl Checker {
    /// The SLA of model `k`: its limit, deciding method, gates and optional reference.
    pub(super) fn sla(&mut self, s: &RawSla, k: &str, loss: LossSpec, confidence: Confidence) -> SlaConfig {
        let b = loss.max();
        if !(s.max_risk.value >= 0.0 && s.max_risk.value <= b) {
            self.push(
                &s.max_risk,
                &format!("{k}.sla.max_risk"),
                format!("must lie in the loss range [0, {b}], got {}", s.max_risk.value),
            );
        }
        let default_method = if loss.is_binary() { Method::ClopperPearson } else { Method::Betting };
        let method = match &s.method {
            None => default_method,
            Some(m) => match Method::parse(&m.value) {
                Some(Method::ClopperPearson) if !loss.is_binary() => {
                    self.push(m, &format!("{k}.sla.method"), "clopper-pearson needs zero-one loss");
                    default_method
                }
                Some(x) => x,
                None => {
                    self.push(m, &format!("{k}.sla.method"), format!("unknown method {:?}", m.value));
                    default_method
                }
            },
        };
        let min_samples = match &s.min_samples {
            None => 30,
            Some(n) if n.value >= 1 => n.value as u64,
            Some(n) => {
                self.push(n, &format!("{k}.sla.min_samples"), format!("must be at least 1, got {}", n.value));
                1
            }
        };
        let min_label_coverage = match &s.min_label_coverage {
            None => 0.5,
            Some(c) if (0.0..=1.0).contains(&c.value) => c.value,
            Some(c) => {
                self.push(c, &format!("{k}.sla.min_label_coverage"), format!("must lie in [0, 1], got {}", c.value));
                0.0
            }
        };
        let change_horizon = match &s.change_horizon {
            None => DEFAULT_CHANGE_HORIZON,
            Some(n) if n.value >= 1 => n.value as u64,
            Some(n) => {
                self.push(n, &format!("{k}.sla.change_horizon"), format!("must be at least 1 label, got {}", n.value));
                1
            }
        };
        let reference = s
            .reference
            .as_ref()
            .and_then(|r| self.reference(r, &format!("{k}.sla.reference"), loss, method, confidence));
        let decide_on = match s.decide_on.as_ref().map(|d| d.value.as_str()) {
            None | Some("delay-robust") => DecideOn::DelayRobust,
            Some("labelled-only") => DecideOn::LabelledOnly,
            Some(other) => {
                let d = s.decide_on.as_ref().expect("matched Some");
                self.push(d, &format!("{k}.sla.decide_on"), format!("{other:?} is not delay-robust or labelled-only"));
                DecideOn::DelayRobust
            }
        };
        SlaConfig {
            max_risk: s.max_risk.value,
            method,
            min_samples,
            min_label_coverage,
            change_horizon,
            reference,
            decide_on,
        }
    }

    pub(super) fn reference(
        &mut self,
        raw: &Spanned<RawReference>,
        key: &str,
        loss: LossSpec,
        method: Method,
        model_confidence: Confidence,
    ) -> Option<ReferenceConfig> {
        let r = &raw.value;
        let start = self.issues.len();
        if !(r.tolerance.value >= 0.0 && r.tolerance.value <= loss.max()) {
            self.push(
                &r.tolerance,
                &format!("{key}.tolerance"),
                format!("must lie in [0, {}], got {}", loss.max(), r.tolerance.value),
            );
        }
        let confidence = match &r.confidence {
            None => model_confidence,
            Some(c) => Confidence::new(c.value).unwrap_or_else(|e| {
                self.push(c, &format!("{key}.confidence"), e);
                model_confidence
            }),
        };
        let file = self.path(&r.file.value);
        let cols = &r.columns.value;
        let source = match (loss, &cols.loss, &cols.prediction, &cols.label) {
            (LossSpec::Column { .. }, Some(l), None, None) => Some(LossSource::Column(l.value.clone())),
            (LossSpec::Column { .. }, _, _, _) => {
                self.push(&r.columns, &format!("{key}.columns"), "with loss: column, give columns.loss only");
                None
            }
            (_, None, Some(p), Some(l)) => {
                Some(LossSource::Compare { prediction: p.value.clone(), label: l.value.clone() })
            }
            _ => {
                self.push(&r.columns, &format!("{key}.columns"), "give columns.prediction and columns.label");
                None
            }
        };
        let format = self.reference_format(r.format.as_ref(), &r.file, key, &file)?;
        if self.issues.len() > start {
            return None;
        }
        let source = source?;
        let opened = self.open_reference(&r.file, &format!("{key}.file"), &file)?;
        let input = Input { file_label: file.display().to_string(), format, source, loss, group_by: None };
        let mut summary = if method.needs_losses() {
            crate::estimate::LossSummary::keeping_losses(loss.max())
        } else {
            crate::estimate::LossSummary::new(loss.max())
        };
        let read = for_each_loss_with(&input, &[], std::io::BufReader::new(opened), |row, _| {
            summary.push(row.loss.expect("for_each_loss_with refuses unlabelled rows"));
            Ok(())
        });
        let bounds = match read {
            Ok(_) if summary.n() == 0 => Err(format!("{}: no data rows", file.display())),
            Ok(_) => {
                crate::estimate::bounds(method, &summary, confidence).map_err(|e| format!("{}: {e}", file.display()))
            }
            Err(e) => Err(e.to_string()),
        };
        match bounds {
            Ok(b) => Some(ReferenceConfig {
                file,
                n: summary.n(),
                mean: summary.mean(),
                upper: b.upper,
                confidence,
                tolerance: r.tolerance.value,
            }),
            Err(e) => {
                self.push(&r.file, &format!("{key}.file"), e);
                None
            }
        }
    }
}
