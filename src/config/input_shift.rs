//! A model's label-free input-shift tests: the reference file is read and prepared here, once,
//! so a bad reference is a located config error before the daemon starts.

use std::sync::Arc;

use super::*;
use crate::estimate::kernel::{self, KernelError, Points, Pooled};
use crate::estimate::kernel_betting::BET_AFTER;
use crate::ingest::points::{read_points, subsample, Coder};

/// `every` when none is given.
const DEFAULT_EVERY_MS: i64 = 3_600_000;

impl Checker {
    /// The input-shift section of model `k`; `slice_columns` are the feature columns the slice
    /// search has prediction records carry (the shift columns are laid out after them).
    pub(super) fn input_shift(
        &mut self,
        at: &Spanned<RawInputShift>,
        k: &str,
        model_confidence: Confidence,
        slice_columns: Vec<String>,
    ) -> Option<InputShiftConfig> {
        let r = &at.value;
        let key = format!("{k}.input_shift");
        let start = self.issues.len();
        let mut seen = Vec::new();
        let numeric = self.column_list(&r.columns, &format!("{key}.columns"), &mut seen);
        let categorical = self.column_list(&r.categorical, &format!("{key}.categorical"), &mut seen);
        if numeric.is_empty() && categorical.is_empty() {
            self.push(at, &key, "name at least one feature column: columns (numeric) or categorical");
        }
        let wk = format!("{key}.window");
        let w = &r.window.value;
        if !valid_name(&w.name.value) {
            self.push(&w.name, &format!("{wk}.name"), format!("{:?} must match [a-z0-9_-]+", w.name.value));
        }
        if let Some(m) = &w.mature {
            self.push(m, &format!("{wk}.mature"), "input-shift windows need no labels: drop mature");
        }
        let kind = self.window_kind(w, &wk);
        let every_ms = match &r.every {
            None => DEFAULT_EVERY_MS,
            Some(e) => match self.duration_ms(e, &format!("{key}.every")) {
                Some(ms) if ms >= 1000 => ms,
                Some(_) => {
                    self.push(e, &format!("{key}.every"), "must be at least 1s");
                    DEFAULT_EVERY_MS
                }
                None => DEFAULT_EVERY_MS,
            },
        };
        let max_points = self.ranged(&r.max_points, &key, "max_points", 10, 20_000, 2000);
        let min_points =
            self.ranged(&r.min_points, &key, "min_points", 2, max_points as i64, 100.min(max_points as i64));
        let permutations = self.ranged(&r.permutations, &key, "permutations", 0, 100_000, 1000);
        let bandwidth = r.bandwidth.as_ref().map(|b| {
            if !(b.value > 0.0 && b.value.is_finite()) {
                self.push(b, &format!("{key}.bandwidth"), format!("must be a positive finite number, got {}", b.value));
            }
            b.value
        });
        let confidence = match &r.confidence {
            None => model_confidence,
            Some(c) => Confidence::new(c.value).unwrap_or_else(|e| {
                self.push(c, &format!("{key}.confidence"), e);
                model_confidence
            }),
        };
        let seed = r.seed.as_ref().map_or(1, |s| s.value);
        let alarm = match &r.alarm {
            None => Some(ShiftAlarmConfig { sample_rate: 1.0, memory: 100, calibration: 0 }),
            Some(a) => self.shift_alarm(a, &format!("{key}.alarm")),
        };
        let file = self.path(&r.reference.value.file.value);
        let fkey = format!("{key}.reference.file");
        let file_at = &r.reference.value.file;
        let format =
            self.reference_format(r.reference.value.format.as_ref(), file_at, &format!("{key}.reference"), &file);
        if self.issues.len() > start {
            return None;
        }
        let (kind, format) = (kind?, format?);
        let opened = self.open_reference(file_at, &fkey, &file)?;
        let mut coder = Coder::default();
        let label = file.display().to_string();
        let all = match read_points(std::io::BufReader::new(opened), format, &label, &numeric, &categorical, &mut coder)
        {
            Ok(p) => p,
            Err(e) => {
                self.push(file_at, &fkey, e);
                return None;
            }
        };
        let bad = |e: KernelError, this: &mut Checker| this.push(file_at, &fkey, format!("{label}: {e}"));
        let tested = subsample(&all, max_points, seed);
        let scale = match kernel::standardiser(&tested, &numeric) {
            Ok(s) => s,
            Err(e) => {
                bad(e, self);
                return None;
            }
        };
        let alarm_reference = match &alarm {
            None => None,
            Some(a) => match alarm_reference(&all, a, bandwidth, &numeric, seed) {
                Ok(x) => Some(x),
                Err(why) => {
                    self.push(file_at, &fkey, format!("{label}: {why}"));
                    return None;
                }
            },
        };
        let alarm = alarm.map(|mut a| {
            a.calibration = calibration_rows(all.len(), &a);
            a
        });
        let (_, cells) = feature_layout(slice_columns, &[numeric.as_slice(), &categorical].concat());
        let reference = ShiftReference { rows: all.len(), tested, scale, coder, alarm: alarm_reference };
        Some(InputShiftConfig {
            reference_file: file,
            numeric,
            categorical,
            cells,
            window: WindowConfig { name: w.name.value.clone(), kind, mature: false },
            every_ms,
            min_points,
            max_points,
            permutations,
            bandwidth,
            confidence,
            seed,
            alarm,
            reference: Arc::new(reference),
        })
    }

    fn shift_alarm(&mut self, at: &Spanned<RawShiftAlarm>, key: &str) -> Option<ShiftAlarmConfig> {
        let a = &at.value;
        if a.enabled.as_ref().is_some_and(|e| !e.value) {
            return None;
        }
        let sample_rate = match &a.sample_rate {
            None => 1.0,
            Some(s) if s.value > 0.0 && s.value <= 1.0 => s.value,
            Some(s) => {
                self.push(s, &format!("{key}.sample_rate"), format!("must lie in (0, 1], got {}", s.value));
                1.0
            }
        };
        let memory = match &a.memory {
            None => 100,
            Some(m) if (BET_AFTER as i64..=1000).contains(&m.value) => m.value as usize,
            Some(m) => {
                self.push(m, &format!("{key}.memory"), format!("must lie in [{BET_AFTER}, 1000], got {}", m.value));
                100
            }
        };
        let calibration = match &a.calibration {
            None => 0,
            Some(c) if (20..=5000).contains(&c.value) => c.value as usize,
            Some(c) => {
                self.push(c, &format!("{key}.calibration"), format!("must lie in [20, 5000], got {}", c.value));
                0
            }
        };
        Some(ShiftAlarmConfig { sample_rate, memory, calibration })
    }
}

/// The calibration rows: as configured, else a quarter of the reference up to 500 (enough for a
/// stable median distance and standardisation; the rest are pairs the alarm can bet on).
fn calibration_rows(rows: usize, a: &ShiftAlarmConfig) -> usize {
    if a.calibration > 0 {
        a.calibration
    } else {
        (rows / 4).clamp(20, 500)
    }
}

/// Splits the reference in a seeded order: calibration rows for the standardisation and the
/// bandwidth, the rest the pool of points to pair. The alarm's null needs both fixed before any
/// pair and the paired points never reused, so they come from rows that are never paired.
fn alarm_reference(
    all: &Points,
    a: &ShiftAlarmConfig,
    bandwidth: Option<f64>,
    numeric: &[String],
    seed: u64,
) -> Result<AlarmReference, String> {
    let n = all.len();
    let cal = calibration_rows(n, a);
    if n < cal + a.memory {
        return Err(format!(
            "the alarm needs at least {} reference rows ({cal} to calibrate on and {} to pair), got {n}; give more rows or set alarm.enabled: false",
            cal + a.memory,
            a.memory
        ));
    }
    let mut rng = crate::estimate::seeded::Seeded::new(seed.wrapping_add(5));
    let mut order: Vec<usize> = (0..n).collect();
    for i in 0..n - 1 {
        let j = i + rng.below((n - i) as u64) as usize;
        order.swap(i, j);
    }
    let calibration = all.select(&order[..cal]);
    let scale = kernel::standardiser(&calibration, numeric).map_err(|e| format!("calibration rows: {e}"))?;
    let sigma = match bandwidth {
        Some(s) => s,
        None => {
            let half = cal / 2;
            let (x, y) = (
                calibration.select(&(0..half).collect::<Vec<_>>()),
                calibration.select(&(half..cal).collect::<Vec<_>>()),
            );
            Pooled::new(&x, &y, &scale)
                .and_then(|p| p.median_distance())
                .map_err(|e| format!("calibration rows: {e}"))?
        }
    };
    let pool: Vec<_> = order[cal..].iter().map(|&i| all.standardised(i, &scale)).collect();
    // FNV-1a over everything the alarm's bets depend on.
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |x: u64| {
        for b in x.to_le_bytes() {
            h ^= u64::from(b);
            h = h.wrapping_mul(0x0000_0100_0000_01b3);
        }
    };
    eat(sigma.to_bits());
    for (m, s) in &scale {
        eat(m.to_bits());
        eat(s.to_bits());
    }
    for p in &pool {
        p.numeric.iter().for_each(|x| eat(x.to_bits()));
        p.categorical.iter().for_each(|&c| eat(u64::from(c)));
    }
    Ok(AlarmReference { scale, sigma, pool, fingerprint: format!("{h:016x}") })
}
