//! The registry's own checks: escaping of awkward label values (and of the same names on the
//! status page).

use super::*;
use crate::window::{ModelSnapshot, WindowSnapshot};

/// Config validation keeps names to [a-z0-9_-], but label values with quotes, backslashes
/// and newlines must still come out escaped as the text format requires (Prometheus
/// exposition formats: `\\`, `\"`, `\n`).
#[test]
fn awkward_label_values_are_escaped() {
    let model = ModelSnapshot {
        name: "a\"b\\c\nd<script>x</script>".into(),
        confidence: 0.95,
        loss_max: 1.0,
        loss_name: "zero-one",
        sla: None,
        windows: vec![WindowSnapshot {
            name: "w\"1".into(),
            n: 3,
            mean: 0.5,
            loss_sum: 1.5,
            loss_squares: 1.5,
            bounds: vec![],
            used: vec![],
            state: None,
            slices: None,
            slice_samples: None,
            cohort: None,
        }],
        window_guarantee: crate::config::WindowGuarantee::PerWindow,
        window_confidence: 0.95,
        anytime: crate::window::AnytimeSnapshot {
            n: 0,
            labelled: 0,
            mean: 0.0,
            loss_sum: 0.0,
            bounds: vec![],
            alarms: vec![],
            reset_ms: None,
            resets: 0,
        },
        counters: Default::default(),
        awaiting: 0,
        label_coverage: None,
        last_commit_ms: None,
        delay_dependence: crate::estimate::delay_dependence::test(&[], 1.0, true, 0.05),
        input_shift: None,
        history: Default::default(),
        event_clock_ms: None,
    };
    // The status page escapes the same hostile names (config validation is not its guard).
    let page = super::super::page::render(&Snapshot { models: vec![model.clone()] }, 0);
    assert!(!page.contains("<script>x") && page.contains("&lt;script&gt;x&lt;/script&gt;"), "{page}");
    assert!(page.contains("w&quot;1") && !page.contains("w\"1"));
    let snap: SharedSnapshot = Arc::new(RwLock::new(Arc::new(Snapshot { models: vec![model] })));
    let text = render(&registry(snap, Arc::new(Health::default()), 64));
    assert!(
        text.contains(r#"riskbound_window_samples{model="a\"b\\c\nd<script>x</script>",window="w\"1"} 3"#),
        "{text}"
    );
    assert!(!text.lines().any(|l| l == "d<script>x</script>\",window=\"w\\\"1\"} 3"), "no raw newline inside a label");
    // tests/exposition_check.sh runs promtool on this file too.
    let out = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("target/awkward-labels.prom");
    std::fs::write(out, &text).unwrap();
}
