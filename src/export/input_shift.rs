//! The input-shift series: each model's latest look and its alarm's pairs (the alarm's evidence
//! is encoded with the other alarms, under `riskbound_alarm_*{test="input-shift"}`). Names are
//! in the registry's `names` module.

use prometheus_client::encoding::DescriptorEncoder;

use super::registry::{counters, gauges, model, mw, names, Labels};
use crate::window::Snapshot;

/// The `test` label of the input-shift alarm.
pub const TEST: &str = "input-shift";

/// The latest input-shift look of each model and its alarm's pairs.
pub(super) fn encode(snap: &Snapshot, e: &mut DescriptorEncoder) -> Result<(), std::fmt::Error> {
    let (mut p, mut shifted, mut mmd2, mut bw, mut points, mut eig, mut ks, mut inconclusive, mut at, mut conf) = (
        Vec::new(),
        Vec::new(),
        Vec::new(),
        Vec::new(),
        Vec::new(),
        Vec::new(),
        Vec::new(),
        Vec::new(),
        Vec::new(),
        Vec::new(),
    );
    let (mut pairs, mut left, mut unpaired) = (Vec::new(), Vec::new(), Vec::new());
    let with = |l: &Labels, k: &'static str, v: String| -> Labels {
        let mut l = l.clone();
        l.push((k, v));
        l
    };
    for m in &snap.models {
        let Some(s) = &m.input_shift else { continue };
        let l = mw(&m.name, &s.window);
        conf.push((l.clone(), s.confidence));
        points.push((with(&l, "sample", "reference".into()), s.reference_tested as f64));
        if let Some(look) = &s.look {
            at.push((l.clone(), look.at_ms as f64 / 1000.0));
            points.push((with(&l, "sample", "window".into()), look.in_window as f64));
            points.push((with(&l, "sample", "current".into()), look.n_current as f64));
            inconclusive.push((l.clone(), f64::from(u8::from(look.outcome.is_err()))));
            if let Ok(t) = &look.outcome {
                let delta = 1.0 - s.confidence;
                let mut test = |name: &str, pv: f64| {
                    p.push((with(&l, "test", name.into()), pv));
                    shifted.push((with(&l, "test", name.into()), f64::from(u8::from(pv <= delta))));
                };
                if let Some(pv) = t.permutation_p {
                    test("permutation", pv);
                }
                test("spectral", t.spectral.p_value);
                mmd2.push((with(&l, "estimate", "unbiased".into()), t.mmd.unbiased));
                mmd2.push((with(&l, "estimate", "biased".into()), t.mmd.biased));
                bw.push((l.clone(), t.bandwidth));
                eig.push((l.clone(), t.spectral.eigenvalues as f64));
                let columns = s.columns.iter();
                for (c, r) in columns.zip(&t.ks) {
                    ks.push((with(&l, "column", c.clone()), r.p_value));
                }
            }
        }
        if let Some(a) = &s.alarm {
            pairs.push((model(&m.name), a.pairs as f64));
            left.push((model(&m.name), a.pool_left as f64));
            unpaired.push((model(&m.name), a.unpaired));
        }
    }
    gauges(e, names::SHIFT_P, "p-value of the latest look's two-sample test of the input-shift window against the reference (test=permutation: exact level; test=spectral: asymptotic level). A per-look test: repeated looks add up their false alarms", p)?;
    gauges(e, names::SHIFT_SHIFTED, "1 when the latest look's test rejects \"same distribution as the reference\" at level 1 - confidence, else 0. A shift of the inputs is not a rise of the risk", shifted)?;
    gauges(e, names::SHIFT_MMD2, "The latest look's squared maximum mean discrepancy between reference and window (Gaussian kernel), unbiased and biased estimates", mmd2)?;
    gauges(
        e,
        names::SHIFT_BANDWIDTH,
        "The Gaussian kernel's bandwidth at the latest look (given, or the pooled median distance)",
        bw,
    )?;
    gauges(e, names::SHIFT_POINTS, "Points behind the latest look: sample=reference (tested reference rows), window (held in the window), current (tested, after the subsample)", points)?;
    gauges(
        e,
        names::SHIFT_EIGENVALUES,
        "Eigenvalues of the centred Gram matrix the spectral test's null used at the latest look",
        eig,
    )?;
    gauges(e, names::SHIFT_KS_P, "p-value of the latest look's two-sample Kolmogorov-Smirnov test per numeric column (a per-look, per-column test)", ks)?;
    gauges(e, names::SHIFT_INCONCLUSIVE, "1 when the latest look could not test (fewer than min_points points in the window, or data the kernel cannot take), else 0", inconclusive)?;
    gauges(e, names::SHIFT_LOOK_TIME, "Event time (Unix seconds) of the newest prediction at the latest look", at)?;
    gauges(e, names::SHIFT_CONFIDENCE, "Confidence of the input-shift tests: a look says shifted at p <= 1 - confidence; the alarm's false-alarm probability over the whole stream is at most 1 - confidence", conf)?;
    gauges(
        e,
        names::SHIFT_ALARM_PAIRS,
        "Predictions the input-shift alarm has paired with a reference point since the reset",
        pairs,
    )?;
    gauges(e, names::SHIFT_ALARM_POOL_LEFT, "Reference points the input-shift alarm has not yet paired; at 0 it can gather no more evidence (each reference point is used once)", left)?;
    counters(
        e,
        names::SHIFT_ALARM_UNPAIRED,
        "Sampled predictions that came after the input-shift alarm's reference pool ran out",
        unpaired,
    )?;
    Ok(())
}
