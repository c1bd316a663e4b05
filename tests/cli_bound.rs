//! `riskbound bound` driven as a user drives it: the real binary on files in a temp dir.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

use riskbound::estimate::{binomial, Confidence, LossSummary, Method};
use serde_json::Value;

struct Dir(PathBuf);

impl Dir {
    fn new(name: &str) -> Dir {
        let p = std::env::temp_dir().join(format!("riskbound-cli-{}-{}", name, std::process::id()));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(&p).unwrap();
        Dir(p)
    }
    fn file(&self, name: &str, body: &[u8]) -> PathBuf {
        let p = self.0.join(name);
        std::fs::write(&p, body).unwrap();
        p
    }
}

impl Drop for Dir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

fn riskbound(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_riskbound")).args(args).output().unwrap()
}

fn bound_json(file: &Path, extra: &[&str]) -> Value {
    let mut args = vec!["bound", file.to_str().unwrap()];
    args.extend_from_slice(extra);
    args.push("--json");
    let out = riskbound(&args);
    assert!(out.status.success(), "stderr: {}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).expect("one JSON document")
}

/// Runs a command expected to fail on bad input; returns its single stderr line.
fn bad(file: &Path, extra: &[&str]) -> String {
    let mut args = vec!["bound", file.to_str().unwrap()];
    args.extend_from_slice(extra);
    args.push("--json");
    let out = riskbound(&args);
    assert_eq!(out.status.code(), Some(2), "stderr: {}", String::from_utf8_lossy(&out.stderr));
    assert!(out.stdout.is_empty(), "no partial JSON: {}", String::from_utf8_lossy(&out.stdout));
    let err = String::from_utf8(out.stderr).unwrap();
    assert_eq!(err.lines().count(), 1, "one line on stderr: {err}");
    err.trim_end().trim_start_matches("riskbound: ").to_string()
}

const LOSS: &[&str] = &["--loss-column", "loss", "--loss-max", "1"];

#[test]
fn json_shape_and_values_for_zero_one_predictions() {
    let d = Dir::new("shape");
    // 3 errors in 8 rows.
    let f = d.file("b.csv", b"id,predicted,outcome\n1,late,late\n2,late,on-time\n3,on-time,on-time\n4,on-time,late\n5,late,late\n6,on-time,on-time\n7,late,on-time\n8,on-time,on-time\n");
    let v = bound_json(&f, &["--prediction-column", "predicted", "--label-column", "outcome", "--loss", "zero-one"]);
    assert_eq!(v["confidence"], 0.95);
    let groups = v["groups"].as_array().unwrap();
    assert_eq!(groups.len(), 1);
    let g = &groups[0];
    assert_eq!(g["group"], Value::Null);
    assert_eq!(g["n"], 8);
    assert_eq!(g["mean"], 0.375);
    let keys: Vec<_> = g["bounds"].as_object().unwrap().keys().cloned().collect();
    assert_eq!(keys, ["hoeffding", "empirical-bernstein", "clopper-pearson", "kl", "betting"]);
    // Clopper-Pearson for k = 3, n = 8 at delta = 0.05: the binary route of the library, which
    // tests/bounds_reference.rs checks against scipy.
    let cp = binomial::clopper_pearson(3, 8, Confidence::new(0.95).unwrap().delta());
    assert_eq!(g["bounds"]["clopper-pearson"]["upper"].as_f64().unwrap(), cp.upper);
    assert_eq!(g["bounds"]["clopper-pearson"]["lower"].as_f64().unwrap(), cp.lower);
}

#[test]
fn cli_reproduces_the_reference_fixture_through_a_file() {
    let text =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/bounds_fixture.json")).unwrap();
    let fx: Value = serde_json::from_str(&text).unwrap();
    let d = Dir::new("fixture");
    for name in ["A_binary_400", "B_beta16_400", "G_arcsine_5000"] {
        let ds = &fx["datasets"][name];
        let mut body = String::from("loss\n");
        for x in ds["losses"].as_array().unwrap() {
            body.push_str(&format!("{}\n", x.as_f64().unwrap()));
        }
        let f = d.file(&format!("{name}.csv"), body.as_bytes());
        let conf = ds["confidence"].as_f64().unwrap().to_string();
        let v = bound_json(&f, &["--loss-column", "loss", "--loss-max", "1", "--confidence", &conf]);
        let got = &v["groups"][0]["bounds"];
        for (m, want) in ds["bounds"].as_object().unwrap() {
            for side in ["lower", "upper"] {
                let (g, w) = (got[m][side].as_f64().unwrap(), want[side].as_f64().unwrap());
                // Source: tests/reference/make_bounds_fixture.py (scipy, closed forms, numpy bisection).
                assert!((g - w).abs() <= 1e-6 * w.abs() || (g - w).abs() < 1e-9, "{name} {m} {side}: {g} vs {w}");
            }
        }
    }
}

#[test]
fn groups_come_in_order_of_first_appearance() {
    let d = Dir::new("groups");
    let f = d.file("g.csv", b"region,loss\nnorth,0\nsouth,1\nnorth,1\neast,0\nsouth,0\n");
    let v =
        bound_json(&f, &["--loss-column", "loss", "--loss-max", "1", "--group-by", "region", "--method", "hoeffding"]);
    let g = v["groups"].as_array().unwrap();
    let keys: Vec<_> = g.iter().map(|x| x["group"].as_str().unwrap().to_string()).collect();
    assert_eq!(keys, ["north", "south", "east"]);
    assert_eq!(g[0]["n"], 2);
    assert_eq!(g[2]["n"], 1);
    assert_eq!(g[0]["bounds"].as_object().unwrap().len(), 1);
    // Hoeffding closed form (Hoeffding 1963, Thm 2) for n = 2, mean 0.5, delta = 0.05.
    let r = ((1.0f64 / 0.05).ln() / 4.0).sqrt();
    assert_eq!(g[0]["bounds"]["hoeffding"]["upper"].as_f64().unwrap(), (0.5 + r).min(1.0));
    assert_eq!(g[0]["bounds"]["hoeffding"]["lower"].as_f64().unwrap(), (0.5 - r).max(0.0));
}

#[test]
fn jsonl_and_stdin_give_the_same_answer_as_csv() {
    let d = Dir::new("jsonl");
    let csv = d.file("a.csv", b"p,y\n1.5,1.0\n2.0,4.0\n0.0,0.25\n");
    let jsonl = d.file(
        "a.ndjson",
        b"{\"p\": 1.5, \"y\": 1.0}\n{\"p\": 2.0, \"y\": 4.0, \"extra\": [1]}\n\n{\"p\": \"0.0\", \"y\": 0.25}\n",
    );
    let args = ["--prediction-column", "p", "--label-column", "y", "--loss", "absolute", "--loss-max", "1"];
    let a = bound_json(&csv, &args);
    let b = bound_json(&jsonl, &args);
    assert_eq!(a, b);
    // |2 - 4| = 2 is clipped at the maximum 1: losses 0.5, 1, 0.25.
    assert_eq!(a["groups"][0]["mean"].as_f64().unwrap(), (0.5 + 1.0 + 0.25) / 3.0);
    let mut child = Command::new(env!("CARGO_BIN_EXE_riskbound"))
        .args(["bound", "-", "--format", "csv", "--json"])
        .args(args)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .unwrap();
    child.stdin.take().unwrap().write_all(&std::fs::read(&csv).unwrap()).unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success());
    assert_eq!(serde_json::from_slice::<Value>(&out.stdout).unwrap(), a);
}

#[test]
fn squared_loss_and_method_selection() {
    let d = Dir::new("squared");
    let f = d.file("s.csv", b"p,y\n0.5,0\n0.1,0.3\n");
    let v = bound_json(
        &f,
        &[
            "--prediction-column",
            "p",
            "--label-column",
            "y",
            "--loss",
            "squared",
            "--loss-max",
            "0.5",
            "--method",
            "kl",
            "--method",
            "betting",
        ],
    );
    let g = &v["groups"][0];
    assert!((g["mean"].as_f64().unwrap() - (0.25 + 0.04) / 2.0).abs() < 1e-15);
    let keys: Vec<_> = g["bounds"].as_object().unwrap().keys().cloned().collect();
    assert_eq!(keys, ["kl", "betting"]);
    // Bounds are in the loss's own units: at most B = 0.5.
    assert!(g["bounds"]["kl"]["upper"].as_f64().unwrap() <= 0.5);
}

#[test]
fn bounds_from_library_and_cli_agree_for_betting() {
    let d = Dir::new("betting");
    let losses = [0.1, 0.0, 0.7, 0.2, 0.05, 0.3, 0.0, 0.9, 0.15, 0.4];
    let mut body = String::from("loss\n");
    let mut s = LossSummary::keeping_losses(1.0);
    for x in losses {
        body.push_str(&format!("{x}\n"));
        s.push(x);
    }
    let f = d.file("l.csv", body.as_bytes());
    let v = bound_json(&f, &["--loss-column", "loss", "--loss-max", "1", "--method", "betting", "--confidence", "0.9"]);
    let b = riskbound::estimate::bounds(Method::Betting, &s, Confidence::new(0.9).unwrap()).unwrap();
    assert_eq!(v["groups"][0]["bounds"]["betting"]["upper"].as_f64().unwrap(), b.upper);
}

#[test]
fn table_output_is_aligned_and_states_its_assumptions() {
    let d = Dir::new("table");
    let f = d.file("t.csv", b"loss,g\n0,a\n1,a\n0,b\n");
    let out = riskbound(&["bound", f.to_str().unwrap(), "--loss-column", "loss", "--loss-max", "1", "--group-by", "g"]);
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.contains("clopper-pearson"));
    assert!(text.contains("assumes: losses are i.i.d."));
    let header = text.lines().nth(1).unwrap();
    let row = text.lines().nth(2).unwrap();
    assert_eq!(header.find("method"), row.find("hoeffding"), "columns line up:\n{text}");
}

// === bad input: exit 2, one located line, nothing on stdout ===

#[test]
fn missing_column_names_the_column_and_the_header() {
    let d = Dir::new("missing");
    let f = d.file("m.csv", b"a,b\n1,2\n");
    let e = bad(&f, LOSS);
    assert!(e.starts_with(&format!("{}:1: column loss: not in the header", f.display())), "{e}");
}

#[test]
fn non_numeric_nan_and_infinite_losses_are_rejected_with_line_and_column() {
    let d = Dir::new("nonnum");
    for (body, line, needle) in [
        (&b"loss\n0.1\nabc\n"[..], 3, "is not a number"),
        (b"loss\n0.1\n0.2\nNaN\n", 4, "not a finite number"),
        (b"loss\ninf\n", 2, "not a finite number"),
        (b"loss\n-0.5\n", 2, "below 0"),
        (b"loss\n0.2\n1.5\n", 3, "above the declared maximum 1"),
        (b"loss\n\n0.2\n\"\"\n", 4, "empty value"),
    ] {
        let f = d.file("n.csv", body);
        let e = bad(&f, LOSS);
        assert!(e.starts_with(&format!("{}:{line}: column loss: ", f.display())) && e.contains(needle), "{e}");
    }
}

#[test]
fn ragged_rows_and_invalid_json_are_located() {
    let d = Dir::new("ragged");
    let f = d.file("r.csv", b"loss,x\n0,1\n1\n");
    let e = bad(&f, LOSS);
    assert!(e.starts_with(&format!("{}:3: row: has 1 fields, the header has 2", f.display())), "{e}");
    let f = d.file("r.jsonl", b"{\"loss\": 0}\n{\"loss\": 1\n");
    let e = bad(&f, LOSS);
    assert!(e.starts_with(&format!("{}:2: row: invalid JSON", f.display())), "{e}");
    let f = d.file("k.jsonl", b"{\"loss\": 0}\n{\"other\": 1}\n");
    let e = bad(&f, LOSS);
    assert!(e.starts_with(&format!("{}:2: column loss: missing value", f.display())), "{e}");
}

#[test]
fn empty_and_header_only_inputs_are_errors_not_zeros() {
    let d = Dir::new("empty");
    let f = d.file("e.csv", b"");
    assert!(bad(&f, LOSS).contains("empty input"));
    let f = d.file("h.csv", b"loss\n");
    assert!(bad(&f, LOSS).contains("no data rows"));
    let f = d.file("e.jsonl", b"\n\n");
    assert!(bad(&f, LOSS).contains("no data rows"));
}

#[test]
fn confidence_outside_the_open_unit_interval_is_a_usage_error() {
    let d = Dir::new("conf");
    let f = d.file("c.csv", b"loss\n0\n");
    for c in ["0", "1", "1.5", "-0.1", "nan", "x"] {
        let out = riskbound(&[
            "bound",
            f.to_str().unwrap(),
            "--loss-column",
            "loss",
            "--loss-max",
            "1",
            "--confidence",
            c,
            "--json",
        ]);
        assert_eq!(out.status.code(), Some(2), "--confidence {c}");
        assert!(out.stdout.is_empty());
        assert!(String::from_utf8_lossy(&out.stderr).contains("--confidence"), "--confidence {c}");
    }
}

#[test]
fn clopper_pearson_on_non_binary_losses_is_refused_when_asked_for() {
    let d = Dir::new("cp");
    let f = d.file("c.csv", b"loss\n0.5\n1\n");
    let e = bad(&f, &["--loss-column", "loss", "--loss-max", "1", "--method", "clopper-pearson"]);
    assert!(e.contains("clopper-pearson needs every loss to be exactly 0 or the loss maximum"), "{e}");
    // Without --method it is simply left out.
    let v = bound_json(&f, LOSS);
    assert!(v["groups"][0]["bounds"].get("clopper-pearson").is_none());
}

#[test]
fn regression_losses_need_a_declared_maximum() {
    let d = Dir::new("max");
    let f = d.file("c.csv", b"p,y\n1,2\n");
    let out = riskbound(&[
        "bound",
        f.to_str().unwrap(),
        "--prediction-column",
        "p",
        "--label-column",
        "y",
        "--loss",
        "absolute",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("needs --loss-max"));
}

#[test]
fn bom_and_crlf_are_accepted() {
    let d = Dir::new("bom");
    let f = d.file("b.csv", b"\xEF\xBB\xBFloss\r\n0\r\n1\r\n");
    let v = bound_json(&f, LOSS);
    assert_eq!(v["groups"][0]["n"], 2);
}
