//! The malformed-input matrix: one case each. For every case the rejected-rows counter rises by
//! exactly the number of bad rows, for the right reason; every valid row of the same file is
//! counted; and one log line names the file, the line and the reason.

mod common;

use common::{Daemon, Metrics, TempDir};

const T: i64 = 1_790_000_000;

fn config(dir: &TempDir, port: u16) -> std::path::PathBuf {
    let text = format!(
        "listen: \"127.0.0.1:{port}\"
state_dir: state
rescan_interval: 200ms
max_row_bytes: 4096
models:
  - name: cls
    predictions: {{ dir: in, pattern: \"cls-pred-*\", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: in, pattern: \"cls-label-*\", columns: {{ id: id, time: t, label: y }} }}
    label_wait: 1d
    windows: [ {{ name: all, last: 100000 }} ]
  - name: reg
    predictions: {{ dir: in, pattern: \"reg-pred-*\", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: in, pattern: \"reg-label-*\", columns: {{ id: id, time: t, label: y }} }}
    loss: absolute
    loss_max: 10
    windows: [ {{ name: all, last: 100000 }} ]
  - name: col
    predictions: {{ dir: in, pattern: \"col-pred-*\", columns: {{ id: id, time: t, prediction: p }} }}
    labels: {{ dir: in, pattern: \"col-label-*\", columns: {{ id: id, time: t, loss: brier }} }}
    loss: column
    loss_max: 1
    windows: [ {{ name: all, last: 100000 }} ]
"
    );
    let p = dir.path("riskbound.yaml");
    std::fs::write(&p, text).unwrap();
    p
}

struct Harness {
    dir: TempDir,
    d: Daemon,
    files: std::collections::HashMap<(String, String), f64>,
}

impl Harness {
    fn new(tag: &str) -> Harness {
        let dir = TempDir::new(tag);
        let port = common::free_port();
        let d = Daemon::start(&config(&dir, port), port);
        Harness { dir, d, files: Default::default() }
    }

    /// Drops a file for (model, kind) and waits until it is taken.
    fn drop(&mut self, model: &str, kind: &str, name: &str, body: &[u8]) -> Metrics {
        let tmp = self.dir.path(&format!("in/.{name}.tmp"));
        std::fs::write(&tmp, body).unwrap();
        std::fs::rename(&tmp, self.dir.path(&format!("in/{name}"))).unwrap();
        let n = self.files.entry((model.into(), kind.into())).or_insert(0.0);
        *n += 1.0;
        let want = *n;
        self.d.wait_files(model, kind, want);
        self.d.metrics()
    }

    // One call per case reads as a table; a struct per case would only add noise.
    #[allow(clippy::too_many_arguments)]
    /// Drops a file and checks: `reason` rose by `bad`, valid rows by `good`, and the log names
    /// the file, the first bad line and the reason.
    fn case(
        &mut self,
        model: &str,
        kind: &str,
        name: &str,
        body: &[u8],
        reason: &str,
        bad: f64,
        good: f64,
        first_line: u64,
    ) {
        let before = self.d.metrics();
        let after = self.drop(model, kind, name, body);
        let rej = |m: &Metrics| {
            m.get("riskbound_rows_rejected_total", &[("model", model), ("kind", kind), ("reason", reason)]).unwrap()
        };
        let rows = |m: &Metrics| m.get("riskbound_rows_ingested_total", &[("model", model), ("kind", kind)]).unwrap();
        assert_eq!(rej(&after) - rej(&before), bad, "{name}: rejected {reason}");
        assert_eq!(rows(&after) - rows(&before), good, "{name}: valid rows");
        let total_rej = |m: &Metrics| -> f64 {
            m.0.iter()
                .filter(|((n, l), _)| n == "riskbound_rows_rejected_total" && l["model"] == model && l["kind"] == kind)
                .map(|(_, v)| v)
                .sum()
        };
        assert_eq!(total_rej(&after) - total_rej(&before), bad, "{name}: no other reason rose");
        if bad > 0.0 {
            let log = self.d.log_text();
            let line = log
                .lines()
                .find(|l| l.contains("first rejected row") && l.contains(name))
                .unwrap_or_else(|| panic!("no log line for {name}:\n{log}"));
            assert!(line.contains(&format!("{name}:{first_line}:")), "{name}: {line}");
            assert!(line.contains(&format!("reason=\"{reason}\"")), "{name}: {line}");
        }
    }
}

#[test]
fn malformed_csv_rows() {
    let mut h = Harness::new("malformed-csv");
    let ok = |i: u32| format!("a{i},{T},x\n");
    // A truncated last line, as a crashed writer leaves it.
    h.case(
        "cls",
        "prediction",
        "cls-pred-01.csv",
        format!("id,t,p\n{}{}a3,{T}", ok(1), ok(2)).as_bytes(),
        "malformed_row",
        1.0,
        2.0,
        4,
    );
    // Missing and extra fields.
    h.case(
        "cls",
        "prediction",
        "cls-pred-02.csv",
        format!("id,t,p\nb1,{T}\n{}b2,{T},x,extra\n", ok(4)).as_bytes(),
        "malformed_row",
        2.0,
        1.0,
        2,
    );
    // A header without a configured column: every data row is unusable.
    h.case(
        "cls",
        "prediction",
        "cls-pred-03.csv",
        format!("id,time,p\nc1,{T},x\nc2,{T},x\n").as_bytes(),
        "missing_column",
        2.0,
        0.0,
        1,
    );
    // Wrong types: a time that is not a time.
    h.case(
        "cls",
        "prediction",
        "cls-pred-04.csv",
        format!("id,t,p\nd1,noon,x\n{}", ok(5)).as_bytes(),
        "bad_timestamp",
        1.0,
        1.0,
        2,
    );
    // Non-UTF-8 bytes in a cell.
    h.case(
        "cls",
        "prediction",
        "cls-pred-05.csv",
        [b"id,t,p\n".as_slice(), format!("e1,{T},").as_bytes(), b"\xff\xfe\n", ok(6).as_bytes()].concat().as_slice(),
        "malformed_row",
        1.0,
        1.0,
        2,
    );
    // A UTF-8 byte-order mark and CRLF line ends are fine.
    h.case(
        "cls",
        "prediction",
        "cls-pred-06.csv",
        format!("\u{feff}id,t,p\r\nf1,{T},x\r\nf2,{T},x\r\n").as_bytes(),
        "malformed_row",
        0.0,
        2.0,
        0,
    );
    // An empty file and a header-only file: no rows, nothing rejected.
    h.case("cls", "prediction", "cls-pred-07.csv", b"", "malformed_row", 0.0, 0.0, 0);
    h.case("cls", "prediction", "cls-pred-08.csv", b"id,t,p\n", "malformed_row", 0.0, 0.0, 0);
    // Duplicate ids inside one file.
    h.case(
        "cls",
        "prediction",
        "cls-pred-09.csv",
        format!("id,t,p\ng1,{T},x\ng1,{T},y\n").as_bytes(),
        "duplicate_prediction",
        1.0,
        1.0,
        3,
    );
    // Timestamps out of order are fine; far in the future they are not.
    h.case(
        "cls",
        "prediction",
        "cls-pred-10.csv",
        format!("id,t,p\nh1,{},x\nh2,{T},x\n", T + 50).as_bytes(),
        "future_timestamp",
        0.0,
        2.0,
        0,
    );
    h.case(
        "cls",
        "prediction",
        "cls-pred-11.csv",
        format!("id,t,p\ni1,4102444800,x\n{}", ok(7)).as_bytes(),
        "future_timestamp",
        1.0,
        1.0,
        2,
    );
    // A missing value.
    h.case(
        "cls",
        "prediction",
        "cls-pred-12.csv",
        format!("id,t,p\nj1,{T},\n{}", ok(8)).as_bytes(),
        "missing_value",
        1.0,
        1.0,
        2,
    );
}

#[test]
fn malformed_json_lines() {
    let mut h = Harness::new("malformed-jsonl");
    let ok = |i: u32| format!("{{\"id\": \"k{i}\", \"t\": {T}, \"p\": \"x\"}}\n");
    h.case(
        "cls",
        "prediction",
        "cls-pred-01.jsonl",
        format!("{}{{\"id\": \"k9\", \"t\": {T}\n{}", ok(1), ok(2)).as_bytes(),
        "malformed_row",
        1.0,
        2.0,
        2,
    );
    h.case(
        "cls",
        "prediction",
        "cls-pred-02.jsonl",
        format!("{}{{\"id\": {{\"nested\": 1}}, \"t\": {T}, \"p\": \"x\"}}\n", ok(3)).as_bytes(),
        "malformed_row",
        1.0,
        1.0,
        2,
    );
    h.case(
        "cls",
        "prediction",
        "cls-pred-03.jsonl",
        format!("{}{{\"id\": \"k8\", \"p\": \"x\"}}\n", ok(4)).as_bytes(),
        "missing_value",
        1.0,
        1.0,
        2,
    );
    h.case(
        "cls",
        "prediction",
        "cls-pred-04.jsonl",
        format!("{}[1, 2]\n", ok(5)).as_bytes(),
        "malformed_row",
        1.0,
        1.0,
        2,
    );
}

#[test]
fn numbers_nan_infinity_and_ranges() {
    let mut h = Harness::new("malformed-numbers");
    h.case(
        "reg",
        "prediction",
        "reg-pred-01.csv",
        format!("id,t,p\nr1,{T},2.5\nr2,{T},NaN\nr3,{T},inf\nr4,{T},-inf\nr5,{T},abc\n").as_bytes(),
        "bad_number",
        4.0,
        1.0,
        3,
    );
    h.case(
        "reg",
        "label",
        "reg-label-01.csv",
        format!("id,t,y\nr1,{},NaN\nr1,{},3.0\n", T + 5, T + 6).as_bytes(),
        "bad_number",
        1.0,
        1.0,
        2,
    );
    // |2.5 - 3.0| = 0.5 in a window of one.
    assert_eq!(h.d.metrics().get("riskbound_risk_observed", &[("model", "reg"), ("window", "all")]), Some(0.5));
    h.drop("col", "prediction", "col-pred-01.csv", format!("id,t,p\nc1,{T},0.7\nc2,{T},0.2\n").as_bytes());
    // A precomputed loss (a probability's Brier score) outside [0, 1].
    h.case(
        "col",
        "label",
        "col-label-01.csv",
        format!("id,t,brier\nc1,{},1.5\nc2,{},0.04\n", T + 1, T + 1).as_bytes(),
        "out_of_range",
        1.0,
        1.0,
        2,
    );
}

#[test]
fn label_cases() {
    let mut h = Harness::new("malformed-labels");
    h.drop("cls", "prediction", "cls-pred-01.csv", format!("id,t,p\nl1,{T},x\nl2,{T},x\n").as_bytes());
    h.case(
        "cls",
        "label",
        "cls-label-01.csv",
        format!("id,t,y\nl1,{},x\n", T + 10).as_bytes(),
        "conflicting_label",
        0.0,
        1.0,
        0,
    );
    h.case(
        "cls",
        "label",
        "cls-label-02.csv",
        format!("id,t,y\nl1,{},z\nl2,{},x\n", T + 11, T + 11).as_bytes(),
        "conflicting_label",
        1.0,
        1.0,
        2,
    );
    // A label for an id never predicted is held (a valid row), then dropped as orphaned once
    // event time passes label_wait.
    h.case(
        "cls",
        "label",
        "cls-label-03.csv",
        format!("id,t,y\nnever,{},x\n", T + 20).as_bytes(),
        "late_label",
        0.0,
        1.0,
        0,
    );
    assert_eq!(h.d.metrics().get("riskbound_labels_orphaned_total", &[("model", "cls")]), Some(0.0));
    h.drop("cls", "prediction", "cls-pred-02.csv", format!("id,t,p\nlater,{},x\n", T + 2 * 86_400).as_bytes());
    assert_eq!(h.d.metrics().get("riskbound_labels_orphaned_total", &[("model", "cls")]), Some(1.0));
}

#[test]
fn a_one_gib_line_costs_one_row_and_bounded_memory() {
    let mut h = Harness::new("malformed-huge");
    let path = h.dir.path("in/.cls-pred-huge.csv.tmp");
    {
        use std::io::Write;
        let mut f = std::io::BufWriter::new(std::fs::File::create(&path).unwrap());
        write!(f, "id,t,p\nm1,{T},x\nm2,{T},").unwrap();
        let chunk = vec![b'z'; 1 << 20];
        for _ in 0..1024 {
            f.write_all(&chunk).unwrap();
        }
        write!(f, "\nm3,{T},x\n").unwrap();
    }
    std::fs::rename(&path, h.dir.path("in/cls-pred-huge.csv")).unwrap();
    h.files.insert(("cls".into(), "prediction".into()), 1.0);
    h.d.wait_files("cls", "prediction", 1.0);
    let m = h.d.metrics();
    assert_eq!(
        m.get("riskbound_rows_rejected_total", &[("model", "cls"), ("kind", "prediction"), ("reason", "row_too_long")]),
        Some(1.0)
    );
    assert_eq!(m.get("riskbound_rows_ingested_total", &[("model", "cls"), ("kind", "prediction")]), Some(2.0));
    let rss = h.d.peak_rss_kib();
    assert!(rss < 100 * 1024, "peak RSS {rss} KiB on a 1 GiB line");
    let _ = std::fs::remove_file(h.dir.path("in/cls-pred-huge.csv"));
}
