//! A deliberately simple model of the label/prediction join, written from the documented rules
//! (README, "The daemon") with plain maps, to check the SQLite implementation against: the
//! proptest in tests/join_model.rs and the cargo-fuzz target `join` drive both with the same
//! operations and compare every counter and the joined losses in order.
#![allow(dead_code)]

use std::collections::{BTreeMap, HashMap};

use riskbound::config::{ModelConfig, SourceConfig, WindowConfig, WindowKind};
use riskbound::estimate::Confidence;
use riskbound::ingest::records::{Record, RejectReason};
use riskbound::loss::LossSpec;
use riskbound::window::{Batch, Kind, Store};

pub const WAIT_MS: i64 = 10_000;

#[derive(Clone, Debug)]
pub struct Op {
    pub kind: Kind,
    pub id: u8,
    pub time_ms: i64,
    pub value: &'static str,
}

#[derive(Clone, Copy, PartialEq, Debug)]
enum State {
    Awaiting,
    Labelled,
    Expired,
}

#[derive(Default, Debug, PartialEq)]
pub struct Outcome {
    pub joined: Vec<f64>,
    pub rejected: BTreeMap<RejectReason, u64>,
    pub expired: u64,
    pub orphaned: u64,
    pub awaiting: u64,
}

#[derive(Default)]
pub struct Model {
    preds: HashMap<String, (i64, String, State, Option<String>)>,
    orphans: HashMap<String, (i64, String)>,
    watermark: Option<i64>,
    out: Outcome,
}

impl Model {
    fn reject(&mut self, r: RejectReason) {
        *self.out.rejected.entry(r).or_default() += 1;
    }

    pub fn file(&mut self, ops: &[Op]) {
        for op in ops {
            let id = format!("i{}", op.id);
            let ok = match op.kind {
                Kind::Prediction => {
                    if self.preds.contains_key(&id) {
                        self.reject(RejectReason::DuplicatePrediction);
                        false
                    } else {
                        match self.orphans.remove(&id) {
                            Some((t_label, label)) if t_label - op.time_ms <= WAIT_MS => {
                                self.out.joined.push(f64::from(u8::from(label != op.value)));
                                self.preds.insert(id, (op.time_ms, op.value.into(), State::Labelled, Some(label)));
                            }
                            held => {
                                if held.is_some() {
                                    self.out.orphaned += 1;
                                }
                                self.preds.insert(id, (op.time_ms, op.value.into(), State::Awaiting, None));
                            }
                        }
                        true
                    }
                }
                Kind::Label => match self.preds.get_mut(&id) {
                    Some((t_pred, value, state @ State::Awaiting, label)) if op.time_ms - *t_pred <= WAIT_MS => {
                        *state = State::Labelled;
                        *label = Some(op.value.into());
                        let l = f64::from(u8::from(value != op.value));
                        self.out.joined.push(l);
                        true
                    }
                    Some((_, _, State::Labelled, Some(old))) => {
                        let r =
                            if old == op.value { RejectReason::DuplicateLabel } else { RejectReason::ConflictingLabel };
                        self.reject(r);
                        false
                    }
                    Some(_) => {
                        self.reject(RejectReason::LateLabel);
                        false
                    }
                    None => match self.orphans.get(&id) {
                        Some((_, old)) => {
                            let r = if old == op.value {
                                RejectReason::DuplicateLabel
                            } else {
                                RejectReason::ConflictingLabel
                            };
                            self.reject(r);
                            false
                        }
                        None => {
                            self.orphans.insert(id, (op.time_ms, op.value.into()));
                            true
                        }
                    },
                },
            };
            if ok {
                self.watermark = Some(self.watermark.map_or(op.time_ms, |w| w.max(op.time_ms)));
            }
        }
        if let Some(w) = self.watermark {
            let cutoff = w - WAIT_MS;
            for (t, _, state, _) in self.preds.values_mut() {
                if *state == State::Awaiting && *t < cutoff {
                    *state = State::Expired;
                    self.out.expired += 1;
                }
            }
            let before = self.orphans.len();
            self.orphans.retain(|_, (t, _)| *t >= cutoff);
            self.out.orphaned += (before - self.orphans.len()) as u64;
            self.preds.retain(|_, (t, _, state, _)| *state == State::Awaiting || *t >= cutoff - WAIT_MS);
        }
        self.out.awaiting = self.preds.values().filter(|p| p.2 == State::Awaiting).count() as u64;
    }

    pub fn outcome(&self) -> &Outcome {
        &self.out
    }
}

pub fn model_config() -> ModelConfig {
    let src = SourceConfig {
        dir: "/nonexistent".into(),
        pattern: glob::Pattern::new("*").unwrap(),
        format: None,
        id_column: "id".into(),
        time_column: "t".into(),
        value_column: "v".into(),
    };
    ModelConfig {
        name: "m".into(),
        predictions: src.clone(),
        labels: src,
        loss: LossSpec::ZeroOne,
        confidence: Confidence::new(0.95).unwrap(),
        label_wait_ms: WAIT_MS,
        future_tolerance_ms: i64::MAX / 4,
        windows: vec![WindowConfig { name: "all".into(), kind: WindowKind::Last(u64::MAX / 4), mature: false }],
        window_guarantee: riskbound::config::WindowGuarantee::PerWindow,
        sla: None,
        alerts: Default::default(),
        slices: None,
        max_samples: riskbound::config::DEFAULT_MAX_SAMPLES,
        input_shift: None,
    }
}

/// The same files through the real store.
pub fn store_outcome(store: &mut Store, cfg: &ModelConfig, file_no: usize, ops: &[Op]) -> Outcome {
    // One file holds one kind; mixed op lists are split in order, like two files.
    let mut i = 0;
    let mut part = 0;
    while i < ops.len() {
        let kind = ops[i].kind;
        let mut records = Vec::new();
        while i < ops.len() && ops[i].kind == kind {
            let op = &ops[i];
            records.push(Record {
                line: (i + 2) as u64,
                id: format!("i{}", op.id),
                time_ms: op.time_ms,
                value: op.value.into(),
                features: Vec::new(),
            });
            i += 1;
        }
        let hash = format!("{file_no}-{part}");
        part += 1;
        let batch = Batch { kind, name: "f", hash: &hash, records: &records, rejects: &[], size: None, mtime_ns: None };
        store.ingest_file(cfg, &batch, 0).unwrap();
    }
    let c = store.counters("m").unwrap();
    let mut rejected = BTreeMap::new();
    for ((_, r), n) in c.rejected {
        if n > 0 {
            *rejected.entry(r).or_default() += n;
        }
    }
    Outcome {
        joined: store.window_losses("m", WindowKind::Last(u64::MAX / 4)).unwrap(),
        rejected,
        expired: c.expired,
        orphaned: c.orphaned,
        awaiting: store.awaiting("m").unwrap(),
    }
}

/// Splits a mixed op list into the per-kind files `store_outcome` makes, for the model.
pub fn split_like_store(ops: &[Op]) -> Vec<Vec<Op>> {
    let mut out: Vec<Vec<Op>> = Vec::new();
    for op in ops {
        match out.last_mut() {
            Some(f) if f[0].kind == op.kind => f.push(op.clone()),
            _ => out.push(vec![op.clone()]),
        }
    }
    out
}

/// Decodes fuzz bytes into files of ops (4 bytes an op, a 0xFF byte ends a file).
pub fn ops_from_bytes(data: &[u8]) -> Vec<Vec<Op>> {
    let mut files = vec![Vec::new()];
    let mut it = data.iter();
    while let Some(&b) = it.next() {
        if b == 0xFF {
            files.push(Vec::new());
            continue;
        }
        let (Some(&id), Some(&t), Some(&v)) = (it.next(), it.next(), it.next()) else { break };
        let kind = if b & 1 == 0 { Kind::Prediction } else { Kind::Label };
        files.last_mut().unwrap().push(Op {
            kind,
            id: id % 12,
            time_ms: i64::from(t) * 500,
            value: if v & 1 == 0 { "a" } else { "b" },
        });
    }
    files
}
