use super::*;

/// A config folder with the two input directories the examples name.
fn setup() -> PathBuf {
    let d = std::env::temp_dir().join(format!("riskbound-config-test-{}", std::process::id()));
    std::fs::create_dir_all(d.join("in")).unwrap();
    d
}

const GOOD: &str = "listen: \"127.0.0.1:9417\"
state_dir: state
models:
  - name: parcel-late
    predictions: { dir: in, pattern: \"pred-*.csv\", columns: { id: request_id, time: ts, prediction: predicted } }
    labels: { dir: in, pattern: \"label-*.csv\", columns: { id: request_id, time: observed, label: outcome } }
    loss: zero-one
    confidence: 0.95
    label_wait: 7d
    windows:
      - { name: recent, last: 500 }
      - { name: day, span: 24h }
    sla: { max_risk: 0.10 }
";

fn issues(text: &str) -> Vec<(u64, u64, String, String)> {
    let dir = setup();
    match parse(text, &dir.join("c.yaml")) {
        Ok(_) => vec![],
        Err(e) => e.issues.into_iter().map(|i| (i.line, i.column, i.key, i.reason)).collect(),
    }
}

fn one(text: &str) -> (u64, u64, String, String) {
    let v = issues(text);
    assert_eq!(v.len(), 1, "{v:?}");
    v.into_iter().next().unwrap()
}

#[test]
fn the_documented_example_is_valid_and_resolved() {
    let dir = setup();
    let c = parse(GOOD, &dir.join("c.yaml")).unwrap();
    assert_eq!(c.listen.to_string(), "127.0.0.1:9417");
    assert_eq!(c.state_dir, dir.join("state"));
    let m = &c.models[0];
    assert_eq!(m.label_wait_ms, 7 * 86_400_000);
    assert_eq!(m.windows[1].kind, WindowKind::SpanMs(86_400_000));
    assert_eq!(m.sla.as_ref().unwrap().method, Method::ClopperPearson);
    assert_eq!(m.predictions.dir, dir.join("in"));
}

#[test]
fn shipped_configs_are_valid() {
    for f in ["config/example.yaml", "config/minimal.yaml"] {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join(f);
        let text = std::fs::read_to_string(&path).unwrap();
        // Point their relative directories at a folder that exists.
        let dir = setup();
        std::fs::create_dir_all(dir.join("spool")).unwrap();
        parse(&text, &dir.join("x.yaml")).unwrap_or_else(|e| panic!("{f}: {e}"));
    }
}

#[test]
fn parser_errors_carry_line_and_column() {
    let (l, c, k, r) = one(&GOOD.replace("state_dir: state", "state_dir: state\nretention: 5"));
    assert_eq!((l, c, k.as_str()), (3, 1, "retention"), "{r}");
    assert!(r.starts_with("unknown field"));
    let (l, c, _, r) = one(&GOOD.replace("confidence: 0.95", "confidence: high"));
    assert_eq!((l, c), (8, 17), "{r}");
    let (l, _, _, r) = one("listen: [\n");
    assert_eq!(l, 1, "{r}");
    let (_, _, k, _) = one("listen: \"127.0.0.1:1\"\n");
    assert_eq!(k, "models");
}

#[test]
fn every_semantic_problem_is_reported_at_once() {
    let bad = GOOD
        .replace("confidence: 0.95", "confidence: 1.5")
        .replace("last: 500", "last: 0")
        .replace("max_risk: 0.10", "max_risk: 1.5")
        .replace("name: day", "name: recent");
    let v = issues(&bad);
    let keys: Vec<_> = v.iter().map(|(l, c, k, _)| (*l, *c, k.as_str())).collect();
    assert_eq!(
        keys,
        [
            (8, 17, "models[0].confidence"),
            // Columns counted by hand: `      - { name: recent, last: 0 }` has its 0 at column 31.
            (11, 31, "models[0].windows[0].last"),
            (12, 17, "models[0].windows[1].name"),
            (13, 22, "models[0].sla.max_risk")
        ]
    );
}

#[test]
fn specific_rules() {
    let cases: Vec<(String, &str, &str)> = vec![
        (GOOD.replace("parcel-late", "Parcel Late"), "models[0].name", "must match"),
        (GOOD.replace("dir: in, pattern: \"pred", "dir: nowhere, pattern: \"pred"), "models[0].predictions.dir", "cannot read directory"),
        (GOOD.replace("\"pred-*.csv\"", "\"sub/pred-*.csv\""), "models[0].predictions.pattern", "not a path"),
        (GOOD.replace("\"pred-*.csv\"", "\"pred-[.csv\""), "models[0].predictions.pattern", "invalid glob"),
        (GOOD.replace("prediction: predicted ", ""), "models[0].predictions.columns.prediction", "missing"),
        (GOOD.replace("loss: zero-one", "loss: absolute"), "models[0].loss_max", "needs loss_max"),
        (GOOD.replace("loss: zero-one", "loss: hinge"), "models[0].loss", "not one of"),
        (GOOD.replace("loss: zero-one", "loss: zero-one\n    loss_max: 2"), "models[0].loss_max", "maximum 1"),
        (GOOD.replace("label_wait: 7d", "label_wait: 7 weeks"), "models[0].label_wait", "unknown unit"),
        (GOOD.replace("label_wait: 7d", "label_wait: 0s"), "models[0].label_wait", "positive"),
        (GOOD.replace("span: 24h", "span: 24h, last: 3"), "models[0].windows[1]", "not both"),
        (GOOD.replace("{ name: day, span: 24h }", "{ name: day }"), "models[0].windows[1]", "give last"),
        (GOOD.replace("max_risk: 0.10", "max_risk: 0.10, method: wilson"), "models[0].sla.method", "unknown method"),
        (GOOD.replace("max_risk: 0.10", "max_risk: 0.10, min_samples: 0"), "models[0].sla.min_samples", "at least 1"),
        (GOOD.replace("max_risk: 0.10", "max_risk: 0.10, min_label_coverage: 2"), "models[0].sla.min_label_coverage", "[0, 1]"),
        (GOOD.replace("127.0.0.1:9417", "localhost"), "listen", "not an address"),
        (format!("{GOOD}  - name: parcel-late\n    predictions: {{ dir: in, pattern: \"p*\", columns: {{ id: a, time: b, prediction: c }} }}\n    labels: {{ dir: in, pattern: \"l*\", columns: {{ id: a, time: b, label: c }} }}\n    windows: [ {{ name: w, last: 5 }} ]\n"), "models[1].name", "duplicate model name"),
    ];
    for (text, key, needle) in cases {
        let v = issues(&text);
        assert!(v.iter().any(|(l, c, k, r)| *l > 0 && *c > 0 && k == key && r.contains(needle)), "{key}: {v:?}");
    }
}

#[test]
fn the_message_format_is_file_line_column_key_reason() {
    let path = setup().join("rb.yaml");
    let e = parse(&GOOD.replace("confidence: 0.95", "confidence: 0"), &path).unwrap_err();
    let want =
        format!("{}:8:17: models[0].confidence: confidence must be strictly between 0 and 1, got 0", path.display());
    assert_eq!(e.to_string(), want);
}

#[test]
fn durations() {
    assert_eq!(parse_duration("500ms").unwrap(), Duration::from_millis(500));
    assert_eq!(parse_duration("1.5h").unwrap(), Duration::from_secs(5400));
    assert!(parse_duration("10").is_err());
    // Found by the config fuzz target: a finite number of seconds no Duration can hold.
    assert!(parse_duration("99999999999999999999999999d").unwrap_err().contains("too long"));
    assert!(parse_duration("-3s").is_err());
}

#[test]
fn r_fuzz_config_an_empty_key_is_named() {
    // fuzz/artifacts/config crash-2107d4…: `'': ...` at the top level.
    let (_, _, key, reason) = one("'':\t\u{0}\u{0}''\n");
    assert_eq!(key, "\"\"", "{reason}");
}

#[test]
fn byte_sizes() {
    // Binary and decimal units as Kubernetes resource quantities write them.
    assert_eq!(parse_bytes("256Mi").unwrap(), 256 << 20);
    assert_eq!(parse_bytes("1GiB").unwrap(), 1 << 30);
    assert_eq!(parse_bytes("512 MB").unwrap(), 512_000_000);
    assert_eq!(parse_bytes("4096").unwrap(), 4096);
    assert!(parse_bytes("0").is_err());
    assert!(parse_bytes("2 lots").unwrap_err().contains("unknown unit"));
    assert!(parse_bytes("99999999999999999999Gi").is_err());
    assert!(parse_bytes("-1Mi").is_err());
}
