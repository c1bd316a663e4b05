//! `riskbound track` driven as a user drives it: the real binary on files in a temp dir, its
//! numbers checked against the confseq values in tests/reference/anytime_fixture.json.

mod common;

use std::process::{Command, Output};

use common::TempDir;
use serde_json::Value;

fn riskbound(args: &[&str]) -> Output {
    Command::new(common::bin()).args(args).output().unwrap()
}

fn lines(out: &Output) -> Vec<Value> {
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8_lossy(&out.stdout).lines().map(|l| serde_json::from_str(l).unwrap()).collect()
}

fn fixture() -> Value {
    let text =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/anytime_fixture.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

#[test]
fn replay_matches_confseq_at_every_checkpoint() {
    let fx = fixture();
    let stream = &fx["streams"][1]; // Beta(2, 5): a continuous loss
    let x: Vec<f64> = stream["x"].as_array().unwrap().iter().map(|v| v.as_f64().unwrap()).collect();
    let dir = TempDir::new("track-ref");
    // Losses scaled by B = 4 in the file: the command divides by --loss-max and scales back.
    let mut csv = String::from("loss\n");
    for v in &x {
        csv += &format!("{:?}\n", v * 4.0);
    }
    std::fs::write(dir.path("l.csv"), csv).unwrap();
    let out = riskbound(&[
        "track",
        dir.path("l.csv").to_str().unwrap(),
        "--loss-column",
        "loss",
        "--loss-max",
        "4",
        "--every",
        "50",
        "--json",
    ]);
    let got = lines(&out);
    assert_eq!(got.len(), x.len() / 50, "a line every 50 rows; the last row is a multiple");
    let checks: Vec<u64> = stream["checkpoints"].as_array().unwrap().iter().map(|c| c.as_u64().unwrap()).collect();
    for (i, &t) in checks.iter().enumerate() {
        let Some(line) = got.iter().find(|l| l["n"] == t) else { continue };
        let want = |k: &str| 4.0 * stream[k][i].as_f64().unwrap();
        let b = &line["bounds"];
        let near = |a: &Value, w: f64| (a.as_f64().unwrap() - w).abs() <= 1e-11;
        // Sources: confseq.predmix.predmix_empbern_lower_cs, confseq.betting.betting_cs,
        // confseq.boundaries.poly_stitching_bound (see the fixture script).
        assert!(near(&b["empirical-bernstein-cs"]["lower"], want("empirical_bernstein_lower")), "t={t} {b}");
        assert!(near(&b["empirical-bernstein-cs"]["upper"], want("empirical_bernstein_upper")), "t={t} {b}");
        assert!(near(&b["betting-cs"]["lower"], want("betting_lower")), "t={t} {b}");
        assert!(near(&b["betting-cs"]["upper"], want("betting_upper")), "t={t} {b}");
        assert!(near(&b["hoeffding-cs"]["lower"], want("hoeffding_stitched_lower")), "t={t} {b}");
        assert!(near(&b["hoeffding-cs"]["upper"], want("hoeffding_stitched_upper")), "t={t} {b}");
        assert!(line["group"].is_null() && line.get("sla").is_none());
    }
}

#[test]
fn groups_alarms_and_the_last_line() {
    let dir = TempDir::new("track-groups");
    // Group a: 30% wrong throughout; group b: never wrong. 1234 rows each, interleaved.
    let mut csv = String::from("id,p,y,g\n");
    for i in 0..2468 {
        let (g, wrong) = if i % 2 == 0 { ("a", (i / 2) % 10 < 3) } else { ("b", false) };
        csv += &format!("{i},1,{},{g}\n", if wrong { 0 } else { 1 });
    }
    std::fs::write(dir.path("x.csv"), csv).unwrap();
    let file = dir.path("x.csv");
    let args =
        ["track", file.to_str().unwrap(), "--prediction-column", "p", "--label-column", "y", "--loss", "zero-one"];
    let mut a = args.to_vec();
    a.extend(["--group-by", "g", "--every", "500", "--sla-max-risk", "0.1", "--json"]);
    let got = lines(&riskbound(&a));
    let ns: Vec<(String, u64)> =
        got.iter().map(|l| (l["group"].as_str().unwrap().to_string(), l["n"].as_u64().unwrap())).collect();
    // Every 500 rows of a group, as the rows stream, then each group's end.
    let want: Vec<(String, u64)> = [("a", 500), ("b", 500), ("a", 1000), ("b", 1000), ("a", 1234), ("b", 1234)]
        .iter()
        .map(|(g, n)| (g.to_string(), *n))
        .collect();
    assert_eq!(ns, want);
    let last_a = &got[4];
    assert_eq!(last_a["sla"]["exceeded_since_reset"], true, "0.3 against 0.1 over 1234 rows");
    assert_eq!(last_a["sla"]["change_detected"], true);
    assert_eq!(got[5]["sla"]["exceeded_since_reset"], false);
    assert_eq!(got[5]["mean"], 0.0);
    // Group a's row j is wrong when j mod 10 < 3: 3 in each of 123 full tens, plus rows
    // 1230..1232, so 372 of 1234.
    assert!((last_a["mean"].as_f64().unwrap() - 372.0 / 1234.0).abs() < 1e-12, "{last_a}");

    // Table mode states the guarantee and the assumptions.
    let mut t = args.to_vec();
    t.extend(["--sla-max-risk", "0.1"]);
    let out = riskbound(&t);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.lines().next().unwrap().contains("betting-cs") && text.contains("exceeded"), "{text}");
    assert!(text.contains("at every line at once") && text.contains("order does not depend on the losses"), "{text}");
}

#[test]
fn bad_input_is_located_and_exits_2() {
    let dir = TempDir::new("track-bad");
    std::fs::write(dir.path("bad.csv"), "loss\n0.1\n0.2\nabc\n0.3\n").unwrap();
    let out = riskbound(&[
        "track",
        dir.path("bad.csv").to_str().unwrap(),
        "--loss-column",
        "loss",
        "--loss-max",
        "1",
        "--every",
        "1",
        "--json",
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("bad.csv:4: column loss"), "{err}");
    // The lines before the bad row were printed and hold for those rows.
    assert_eq!(String::from_utf8_lossy(&out.stdout).lines().count(), 2);

    let f = dir.path("bad.csv");
    let f = f.to_str().unwrap();
    for (args, needle) in [
        (vec!["track", f, "--loss-column", "loss", "--loss-max", "1", "--sla-max-risk", "2"], "outside the loss range"),
        (
            vec!["track", f, "--loss-column", "loss", "--loss-max", "1", "--change-horizon", "10"],
            "needs --sla-max-risk",
        ),
        (vec!["track", f, "--loss-column", "loss", "--loss-max", "1", "--every", "0"], "--every"),
        (vec!["track", f, "--loss-column", "loss", "--loss-max", "1", "--confidence", "1"], "confidence"),
    ] {
        common::fails_with(&args, needle);
    }
    std::fs::write(dir.path("empty.csv"), "loss\n").unwrap();
    let out =
        riskbound(&["track", dir.path("empty.csv").to_str().unwrap(), "--loss-column", "loss", "--loss-max", "1"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("no data rows"));
}

/// Regression: a drifting file pins the running intersection of betting-cs while the mean moves
/// on (it collapses, or crosses: lower above upper). That is said, in the table and the JSON.
#[test]
fn a_crossed_sequence_is_said_in_words() {
    let dir = TempDir::new("track-crossed");
    // 1 wrong in 20 for 2000 rows, then 3 in 5: the risk is not constant.
    let mut csv = String::from("id,p,y\n");
    for i in 0..4000 {
        let wrong = if i < 2000 { i % 20 == 0 } else { i % 5 < 3 };
        csv += &format!("{i},1,{}\n", if wrong { 0 } else { 1 });
    }
    std::fs::write(dir.path("d.csv"), csv).unwrap();
    let file = dir.path("d.csv");
    let args =
        ["track", file.to_str().unwrap(), "--prediction-column", "p", "--label-column", "y", "--loss", "zero-one"];
    let mut a = args.to_vec();
    a.push("--json");
    let last = lines(&riskbound(&a)).pop().unwrap();
    let b = &last["bounds"]["betting-cs"];
    let mean = last["mean"].as_f64().unwrap();
    assert!(mean > b["upper"].as_f64().unwrap(), "{last}");
    assert!(b["note"].as_str().unwrap().contains("the mean left the sequence"), "{last}");
    // An interval that still holds the mean carries no such note.
    let first = lines(&riskbound(&a)).remove(0);
    assert!(first["bounds"]["betting-cs"].get("note").is_none(), "{first}");
    let table = String::from_utf8(riskbound(&args).stdout).unwrap();
    assert!(table.lines().any(|l| l.contains("betting-cs") && l.contains("the mean left the sequence")), "{table}");
}
