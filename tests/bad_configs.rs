//! A corpus of bad configs, each run through the real binary (`riskbound run --config`): exit
//! status 2 before anything is bound or created, and every problem on its own line as
//! `FILE:LINE:COL: key: reason`, at the line of the offending value.

mod common;

use std::process::Command;

const BASE: &str = "listen: \"127.0.0.1:PORT\"
state_dir: state
rescan_interval: 30s
max_row_bytes: 1048576
future_tolerance: 1d
models:
  - name: parcel-late
    predictions:
      dir: in
      pattern: \"pred-*.csv\"
      columns: { id: request_id, time: ts, prediction: predicted }
    labels:
      dir: in
      pattern: \"label-*.csv\"
      columns: { id: request_id, time: observed, label: outcome }
    loss: zero-one
    confidence: 0.95
    label_wait: 7d
    windows:
      - { name: recent, last: 500 }
      - { name: day, span: 24h }
    sla: { max_risk: 0.10, min_samples: 30 }
";

/// (what, from, to, expected line, expected key)
const CASES: &[(&str, &str, &str, u64, &str)] = &[
    (
        "yaml: unclosed flow mapping",
        "{ id: request_id, time: ts, prediction: predicted }",
        "{ id: request_id, time: ts",
        12,
        "(yaml)",
    ),
    ("yaml: bad indentation", "    labels:\n", "   labels:\n", 8, "labels"),
    ("yaml: tab indentation", "    loss: zero-one", "\tloss: zero-one", 16, "(yaml)"),
    ("yaml: duplicate key", "    loss: zero-one\n", "    loss: zero-one\n    loss: absolute\n", 17, "loss"),
    ("yaml: unterminated string", "\"pred-*.csv\"", "\"pred-*.csv", 14, "(yaml)"),
    ("unknown top-level key", "state_dir: state\n", "state_dir: state\nretention: 30d\n", 3, "retention"),
    ("unknown model key", "    loss: zero-one\n", "    loss: zero-one\n    threshold: 0.5\n", 17, "threshold"),
    ("unknown window key", "{ name: recent, last: 500 }", "{ name: recent, last: 500, step: 10 }", 20, "step"),
    ("unknown sla key", "min_samples: 30 }", "min_samples: 30, page: true }", 22, "page"),
    ("unknown column key", "prediction: predicted }", "prediction: predicted, score: s }", 11, "score"),
    ("missing models", "models:\n", "modelz:\n", 6, "modelz"),
    ("wrong type: confidence", "confidence: 0.95", "confidence: high", 17, "(yaml)"),
    ("wrong type: last", "last: 500", "last: many", 20, "(yaml)"),
    ("wrong type: max_row_bytes", "max_row_bytes: 1048576", "max_row_bytes: big", 4, "(yaml)"),
    (
        "wrong type: windows not a list",
        "    windows:\n      - { name: recent, last: 500 }\n      - { name: day, span: 24h }\n",
        "    windows: recent\n",
        19,
        "(yaml)",
    ),
    ("confidence 0", "confidence: 0.95", "confidence: 0", 17, "models[0].confidence"),
    ("history every below 1s", "future_tolerance: 1d\n", "future_tolerance: 1d\nhistory: { every: 500ms }\n", 6, "history.every"),
    ("history keep below every", "future_tolerance: 1d\n", "future_tolerance: 1d\nhistory: { every: 1h, keep: 30m }\n", 6, "history.keep"),
    ("history of too many points", "future_tolerance: 1d\n", "future_tolerance: 1d\nhistory: { every: 1s, keep: 30d }\n", 6, "history.keep"),
    ("history unknown key", "future_tolerance: 1d\n", "future_tolerance: 1d\nhistory: { every: 1h, size: 5 }\n", 6, "size"),
    ("confidence 1", "confidence: 0.95", "confidence: 1", 17, "models[0].confidence"),
    ("confidence above 1", "confidence: 0.95", "confidence: 1.5", 17, "models[0].confidence"),
    ("confidence negative", "confidence: 0.95", "confidence: -0.2", 17, "models[0].confidence"),
    ("max_risk above the loss range", "max_risk: 0.10", "max_risk: 1.5", 22, "models[0].sla.max_risk"),
    ("max_risk negative", "max_risk: 0.10", "max_risk: -0.1", 22, "models[0].sla.max_risk"),
    (
        "max_risk above loss_max",
        "    loss: zero-one\n",
        "    loss: absolute\n    loss_max: 0.05\n",
        0,
        "models[0].sla.max_risk",
    ),
    ("window of 0", "last: 500", "last: 0", 20, "models[0].windows[0].last"),
    ("window negative", "last: 500", "last: -5", 20, "models[0].windows[0].last"),
    ("span of 0", "span: 24h", "span: 0s", 21, "models[0].windows[1].span"),
    ("span without unit", "span: 24h", "span: 24", 21, "models[0].windows[1].span"),
    ("duplicate window name", "name: day", "name: recent", 21, "models[0].windows[1].name"),
    ("bad window name", "name: day", "name: Day One", 21, "models[0].windows[1].name"),
    (
        "no windows",
        "    windows:\n      - { name: recent, last: 500 }\n      - { name: day, span: 24h }\n",
        "    windows: []\n",
        19,
        "models[0].windows",
    ),
    ("bad model name", "name: parcel-late", "name: Parcel_Late!", 7, "models[0].name"),
    (
        "unreadable predictions dir",
        "      dir: in\n      pattern: \"pred",
        "      dir: missing-dir\n      pattern: \"pred",
        9,
        "models[0].predictions.dir",
    ),
    (
        "unreadable labels dir",
        "      dir: in\n      pattern: \"label",
        "      dir: /proc/nonexistent\n      pattern: \"label",
        13,
        "models[0].labels.dir",
    ),
    ("pattern with a path", "\"pred-*.csv\"", "\"in/pred-*.csv\"", 10, "models[0].predictions.pattern"),
    (
        "bad format",
        "      pattern: \"label-*.csv\"\n",
        "      pattern: \"label-*.csv\"\n      format: parquet\n",
        15,
        "models[0].labels.format",
    ),
    (
        "missing id column",
        "{ id: request_id, time: observed, label: outcome }",
        "{ time: observed, label: outcome }",
        15,
        "models[0].labels.columns.id",
    ),
    ("empty column name", "time: ts,", "time: \"\",", 11, "models[0].predictions.columns.time"),
    ("unknown loss", "loss: zero-one", "loss: hinge", 16, "models[0].loss"),
    ("regression loss without max", "loss: zero-one", "loss: squared", 16, "models[0].loss_max"),
    (
        "zero-one with loss_max",
        "    loss: zero-one\n",
        "    loss: zero-one\n    loss_max: 3\n",
        17,
        "models[0].loss_max",
    ),
    ("label_wait unit", "label_wait: 7d", "label_wait: 7 days", 18, "models[0].label_wait"),
    ("unknown sla method", "max_risk: 0.10,", "max_risk: 0.10, method: wilson,", 22, "models[0].sla.method"),
    (
        "clopper-pearson on regression",
        "    loss: zero-one\n    confidence: 0.95\n",
        "    loss: absolute\n    loss_max: 1\n    confidence: 0.95\n",
        0,
        "models[0].sla.method",
    ),
    ("min_samples 0", "min_samples: 30", "min_samples: 0", 22, "models[0].sla.min_samples"),
    ("listen not an address", "listen: \"127.0.0.1:", "listen: \"localhost:", 1, "listen"),
    ("rescan without unit", "rescan_interval: 30s", "rescan_interval: 30", 3, "rescan_interval"),
    ("max_row_bytes too small", "max_row_bytes: 1048576", "max_row_bytes: 10", 4, "max_row_bytes"),
    ("state_max_size too small", "state_dir: state\n", "state_dir: state\nstate_max_size: 1MiB\n", 3, "state_max_size"),
    ("state_max_size not a size", "state_dir: state\n", "state_dir: state\nstate_max_size: lots\n", 3, "state_max_size"),
    ("max_samples too small", "    label_wait: 7d\n", "    label_wait: 7d\n    max_samples: 50\n", 19, "models[0].max_samples"),
    (
        "max_samples below the slice search's minimum",
        "    label_wait: 7d\n",
        "    label_wait: 7d\n    max_samples: 500\n    slices: { categorical: [region] }\n",
        19,
        "models[0].max_samples",
    ),
    ("future_tolerance negative", "future_tolerance: 1d", "future_tolerance: -1d", 5, "future_tolerance"),
    ("max_header_bytes too small", "max_row_bytes: 1048576\n", "max_row_bytes: 1048576\nmax_header_bytes: 100\n", 5, "max_header_bytes"),
    ("keep_alive_idle without unit", "max_row_bytes: 1048576\n", "max_row_bytes: 1048576\nkeep_alive_idle: 30\n", 5, "keep_alive_idle"),
    (
        "max_requests_per_connection 0",
        "max_row_bytes: 1048576\n",
        "max_row_bytes: 1048576\nmax_requests_per_connection: 0\n",
        5,
        "max_requests_per_connection",
    ),
    ("memory_limit unknown unit", "max_row_bytes: 1048576\n", "max_row_bytes: 1048576\nmemory_limit: 2 lots\n", 5, "memory_limit"),
    (
        "reserved window name",
        "{ name: day, span: 24h }",
        "{ name: since-reset, span: 24h }",
        21,
        "models[0].windows[1].name",
    ),
    (
        "unknown window guarantee",
        "    label_wait: 7d\n",
        "    label_wait: 7d\n    window_guarantee: sometimes\n",
        19,
        "models[0].window_guarantee",
    ),
    (
        "change_horizon 0",
        "min_samples: 30 }",
        "min_samples: 30, change_horizon: 0 }",
        22,
        "models[0].sla.change_horizon",
    ),
    (
        "stalled_after below a minute",
        "    label_wait: 7d\n",
        "    label_wait: 7d\n    alerts: { stalled_after: 30s }\n",
        19,
        "models[0].alerts.stalled_after",
    ),
    (
        "max_reject_ratio 0",
        "    label_wait: 7d\n",
        "    label_wait: 7d\n    alerts: { max_reject_ratio: 0 }\n",
        19,
        "models[0].alerts.max_reject_ratio",
    ),
    (
        "unknown alerts key",
        "    label_wait: 7d\n",
        "    label_wait: 7d\n    alerts: { page_on: violated }\n",
        19,
        "page_on",
    ),
    (
        "reference file missing",
        "min_samples: 30 }",
        "min_samples: 30, reference: { file: nope.csv, columns: { prediction: p, label: y }, tolerance: 0.02 } }",
        22,
        "models[0].sla.reference.file",
    ),
    (
        "reference is a directory",
        "min_samples: 30 }",
        "min_samples: 30, reference: { file: in, format: csv, columns: { prediction: p, label: y }, tolerance: 0.02 } }",
        22,
        "models[0].sla.reference.file",
    ),
    (
        "reference tolerance negative",
        "min_samples: 30 }",
        "min_samples: 30, reference: { file: nope.csv, columns: { prediction: p, label: y }, tolerance: -0.02 } }",
        22,
        "models[0].sla.reference.tolerance",
    ),
    (
        "reference without a label column",
        "min_samples: 30 }",
        "min_samples: 30, reference: { file: nope.csv, columns: { prediction: p }, tolerance: 0.02 } }",
        22,
        "models[0].sla.reference.columns",
    ),
];

#[test]
fn every_bad_config_is_refused_with_its_location() {
    assert!(CASES.len() >= 40);
    let dir = common::TempDir::new("badcfg");
    let port = common::free_port();
    let base = BASE.replace("PORT", &port.to_string());
    // The base is valid.
    let good = dir.path("good.yaml");
    std::fs::write(&good, &base).unwrap();
    let out = Command::new(common::bin()).args(["check-config", good.to_str().unwrap()]).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let mut wrong_line = Vec::new();
    let method_case = base.replace("max_risk: 0.10,", "max_risk: 0.10, method: clopper-pearson,");
    for (i, (what, from, to, line, key)) in CASES.iter().enumerate() {
        let src = if *key == "models[0].sla.method" && *line == 0 { &method_case } else { &base };
        assert!(src.contains(from), "case {what}: pattern not in base");
        let text = src.replacen(from, to, 1);
        let path = dir.path(&format!("bad-{i:02}.yaml"));
        std::fs::write(&path, &text).unwrap();
        // `timeout` guards the test: a config wrongly accepted would start a daemon that never exits.
        let out = Command::new("timeout")
            .args(["5", common::bin(), "run", "--config", path.to_str().unwrap()])
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "case {what}: {err}");
        assert!(out.stdout.is_empty(), "case {what}");
        let prefix = format!("{}:", path.display());
        let Some(hit) = err.lines().find(|l| l.starts_with(&prefix) && l.contains(&format!(": {key}: "))) else {
            wrong_line.push(format!("case {what}: expected key {key}: {err}"));
            continue;
        };
        let mut parts = hit[prefix.len()..].splitn(3, ':');
        let (l, c): (u64, u64) = (parts.next().unwrap().parse().unwrap(), parts.next().unwrap().parse().unwrap());
        assert!(c >= 1, "case {what}: {hit}");
        if *line > 0 && l != *line {
            wrong_line.push(format!("case {what}: expected line {line}: {hit}"));
        }
        for l in err.lines() {
            assert!(l.starts_with(&prefix), "case {what}: every line located: {l}");
        }
        // Nothing was bound or created.
        assert!(std::net::TcpListener::bind(("127.0.0.1", port)).is_ok(), "case {what}: port left bound");
        assert!(!dir.path("state").exists(), "case {what}: state_dir created");
    }
    assert!(wrong_line.is_empty(), "{}", wrong_line.join("\n"));
}
