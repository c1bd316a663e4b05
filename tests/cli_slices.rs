//! `riskbound slices` driven as a user drives it.

mod common;

use std::process::Command;

use common::TempDir;
use serde_json::Value;

fn riskbound(args: &[&str]) -> std::process::Output {
    Command::new(common::bin()).args(args).output().unwrap()
}

/// 4000 rows: region "ne" with carrier "slow" is bad (risk 0.5), everything else 0.05.
fn planted(dir: &TempDir) -> String {
    let mut s = 5u64;
    let mut u = || {
        s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    };
    let mut csv = String::from("id,region,carrier,weight,p,y\n");
    for i in 0..4000 {
        let region = ["ne", "nw", "se", "sw"][(u() * 4.0) as usize];
        let carrier = ["slow", "fast"][(u() * 2.0) as usize];
        let weight = (u() * 30.0 * 10.0).round() / 10.0;
        let bad = region == "ne" && carrier == "slow";
        let wrong = u() < if bad { 0.5 } else { 0.05 };
        csv += &format!("{i},{region},{carrier},{weight},1,{}\n", if wrong { 0 } else { 1 });
    }
    let p = dir.path("w.csv");
    std::fs::write(&p, csv).unwrap();
    p.to_str().unwrap().to_string()
}

#[test]
fn finds_and_certifies_a_planted_conjunction() {
    let dir = TempDir::new("slices-cli");
    let f = planted(&dir);
    let args = [
        "slices",
        &f,
        "--prediction-column",
        "p",
        "--label-column",
        "y",
        "--loss",
        "zero-one",
        "--categorical",
        "region,carrier",
        "--numeric",
        "weight",
        "--depth",
        "2",
        "--sla-max-risk",
        "0.15",
        "--top",
        "5",
        "--seed",
        "7",
        "--json",
    ];
    let out = riskbound(&args);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let doc: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(doc["n"], 4000);
    assert_eq!(doc["seed"], 7);
    assert_eq!(doc["sla_max_risk"], 0.15);
    assert_eq!(doc["uniform"]["sign_draws"], 100);
    assert!(doc["uniform"]["rademacher"].as_f64().unwrap() > 0.0);
    assert!(doc["localized"]["fixed_point"].as_f64().unwrap() > 0.0 && doc["localized"]["diagnostic_only"] == true);
    let slices = doc["slices"].as_array().unwrap();
    let top = &slices[0];
    assert_eq!(top["kind"], "conjunction", "{top}");
    let parts: Vec<(String, String)> = top["parts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| (p["feature"].as_str().unwrap().to_string(), p["value"].as_str().unwrap().to_string()))
        .collect();
    assert_eq!(parts, vec![("region".into(), "ne".into()), ("carrier".into(), "slow".into())]);
    assert_eq!(top["violates_sla"], true);
    assert!(top["lower"].as_f64().unwrap() > 0.15 && top["upper"].as_f64().unwrap() >= top["mean"].as_f64().unwrap());
    assert!(["split-confirm", "uniform"].contains(&top["certified_by"].as_str().unwrap()));
    // Worst first, and violates_sla exactly when the certified lower bound exceeds θ.
    for w in slices.windows(2) {
        assert!(w[0]["lower"].as_f64() >= w[1]["lower"].as_f64());
    }
    for s in slices {
        assert_eq!(s["violates_sla"].as_bool().unwrap(), s["lower"].as_f64().unwrap() > 0.15, "{s}");
        match s["kind"].as_str().unwrap() {
            "interval" => assert!(s["low"].is_number() && s["high"].is_number()),
            "threshold" => assert!(s["low"].is_null() != s["high"].is_null()),
            "category" => assert!(s["value"].is_string()),
            _ => assert!(s["parts"].is_array()),
        }
    }
    // The same seed gives the same document.
    let again = riskbound(&args);
    assert_eq!(out.stdout, again.stdout);
}

#[test]
fn bad_input_is_located() {
    let dir = TempDir::new("slices-bad");
    std::fs::write(dir.path("b.csv"), "loss,w,r\n0.1,1.5,a\n0.2,heavy,b\n").unwrap();
    let f = dir.path("b.csv");
    let f = f.to_str().unwrap();
    let out = riskbound(&[
        "slices",
        f,
        "--loss-column",
        "loss",
        "--loss-max",
        "1",
        "--numeric",
        "w",
        "--sla-max-risk",
        "0.1",
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("b.csv:3: column w"), "{err}");
    assert!(out.stdout.is_empty());
    for (args, needle) in [
        (
            vec!["slices", f, "--loss-column", "loss", "--loss-max", "1", "--sla-max-risk", "0.1"],
            "--categorical or --numeric",
        ),
        (
            vec!["slices", f, "--loss-column", "loss", "--loss-max", "1", "--numeric", "w", "--sla-max-risk", "3"],
            "outside the loss range",
        ),
        (
            vec!["slices", f, "--loss-column", "loss", "--loss-max", "1", "--numeric", "nope", "--sla-max-risk", "0.1"],
            "nope",
        ),
        (
            vec![
                "slices",
                f,
                "--loss-column",
                "loss",
                "--loss-max",
                "1",
                "--categorical",
                "r",
                "--depth",
                "4",
                "--sla-max-risk",
                "0.1",
            ],
            "--depth",
        ),
    ] {
        common::fails_with(&args, needle);
    }
}

#[test]
fn a_retuned_threshold_gets_a_uniform_bound() {
    let dir = TempDir::new("slices-thr");
    // y = 1 with probability score; the window's best threshold is near 0.5.
    let mut s = 9u64;
    let mut u = || {
        s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    };
    let mut csv = String::from("score,p,y,region\n");
    let mut rows = Vec::new();
    for _ in 0..3000 {
        let score = (u() * 100.0).round() / 100.0;
        let y = u() < score;
        rows.push((score, y));
        csv += &format!("{score},1,{},r{}\n", u8::from(y), (u() * 3.0) as u8);
    }
    std::fs::write(dir.path("t.csv"), csv).unwrap();
    let args = |file: &str| -> Vec<String> {
        [
            "slices",
            file,
            "--prediction-column",
            "p",
            "--label-column",
            "y",
            "--loss",
            "zero-one",
            "--categorical",
            "region",
            "--sla-max-risk",
            "0.5",
            "--score-column",
            "score",
        ]
        .map(String::from)
        .to_vec()
    };
    let t_csv = dir.path("t.csv");
    let mut good = args(t_csv.to_str().unwrap());
    good.push("--json".into());
    let out = riskbound(&good.iter().map(String::as_str).collect::<Vec<_>>());
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let doc: Value = serde_json::from_slice(&out.stdout).unwrap();
    let r = &doc["recalibrated_threshold"];
    let t = r["best_threshold"].as_f64().unwrap();
    // The window error at the reported threshold, counted here from the rows written.
    let errors = rows.iter().filter(|(sc, y)| (*sc > t) != *y).count() as f64 / 3000.0;
    assert!((r["empirical_risk"].as_f64().unwrap() - errors).abs() < 1e-12, "{r}");
    // No other threshold on the grid does better.
    for k in 0..=100 {
        let tk = k as f64 / 100.0;
        let e = rows.iter().filter(|(sc, y)| (*sc > tk) != *y).count() as f64 / 3000.0;
        assert!(e >= errors - 1e-12, "threshold {tk} beats {t}");
    }
    assert!((0.3..=0.7).contains(&t), "{t}");
    let upper = r["upper"].as_f64().unwrap();
    assert!(upper > errors && (upper - errors - r["deviation"].as_f64().unwrap()).abs() < 1e-12);
    // Labels other than 0/1 are a located error.
    std::fs::write(dir.path("bad.csv"), "score,p,y,region\n0.5,1,1,a\n0.4,1,yes,a\n").unwrap();
    let bad_csv = dir.path("bad.csv");
    let bad = args(bad_csv.to_str().unwrap());
    common::fails_with(&bad.iter().map(String::as_str).collect::<Vec<_>>(), "bad.csv:3: column y");
}

#[test]
fn registered_slices_get_fixed_predictor_bounds_at_delta_over_m() {
    let dir = TempDir::new("slices-reg");
    // Region ne: 100 rows, 12 wrong; the fixture has scipy's Clopper-Pearson for (100, 12).
    let mut csv = String::from("loss,region,w\n");
    for i in 0..100 {
        csv += &format!("{},ne,{}\n", u8::from([3, 8, 15, 22, 41, 47, 56, 60, 71, 77, 85, 98].contains(&i)), i);
    }
    for i in 0..300 {
        csv += &format!("{},sw,{}\n", u8::from(i % 10 == 0), i);
    }
    std::fs::write(dir.path("r.csv"), csv).unwrap();
    let f = dir.path("r.csv");
    let run = |extra: &[&str]| -> Value {
        let mut args = vec![
            "slices",
            f.to_str().unwrap(),
            "--loss-column",
            "loss",
            "--loss-max",
            "1",
            "--categorical",
            "region",
            "--numeric",
            "w",
            "--sla-max-risk",
            "0.1",
            "--json",
        ];
        args.extend_from_slice(extra);
        let out = riskbound(&args);
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        serde_json::from_slice(&out.stdout).unwrap()
    };
    let doc = run(&["--registered", "region=ne"]);
    let r = &doc["registered"][0];
    assert_eq!(r["n"], 100);
    // Source: scipy.stats.beta.ppf via tests/reference/bounds_fixture.json, (n, k) = (100, 12), M = 1.
    let (lo, up) = common::fixture_cp(100, 12, 0.95);
    assert!((r["lower"].as_f64().unwrap() - lo).abs() < 1e-10 * lo, "{r}");
    assert!((r["upper"].as_f64().unwrap() - up).abs() < 1e-10 * up, "{r}");
    assert_eq!(r["method"], "clopper-pearson");
    // Two registered slices: δ/2 each.
    let doc = run(&["--registered", "region=ne", "--registered", "10<w<=20"]);
    assert_eq!(doc["registered"].as_array().unwrap().len(), 2);
    assert!((doc["registered"][0]["delta"].as_f64().unwrap() - (1.0 - 0.95) / 2.0).abs() < 1e-15);
    assert_eq!(doc["registered"][1]["kind"], "interval");
    assert_eq!(doc["registered"][1]["n"], 20, "10 < w <= 20 holds w = 11..20 of each region");
    common::fails_with(
        &[
            "slices",
            f.to_str().unwrap(),
            "--loss-column",
            "loss",
            "--loss-max",
            "1",
            "--categorical",
            "region",
            "--sla-max-risk",
            "0.1",
            "--registered",
            "colour=red",
        ],
        "\"colour\" is not one of the categorical features",
    );
}

#[test]
fn without_json_a_table_for_people_and_no_group_by_flag() {
    let dir = TempDir::new("slices-table");
    let f = planted(&dir);
    let base = [
        "slices",
        &f,
        "--prediction-column",
        "p",
        "--label-column",
        "y",
        "--loss",
        "zero-one",
        "--categorical",
        "region,carrier",
        "--sla-max-risk",
        "0.15",
        "--seed",
        "7",
    ];
    let out = riskbound(&base);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(serde_json::from_str::<Value>(&text).is_err(), "the default output is not JSON");
    assert!(text.contains("uniform certificate: deviation") && text.contains("rank"), "{text}");
    // The table names the same first slice as the JSON document.
    let mut with_json = base.to_vec();
    with_json.push("--json");
    let doc: Value = serde_json::from_slice(&riskbound(&with_json).stdout).unwrap();
    let first = doc["slices"][0]["description"].as_str().unwrap();
    assert!(text.lines().any(|l| l.starts_with("1 ") && l.contains(first)), "{first} not first in\n{text}");
    // --group-by is not offered: slices searches the groups itself.
    let help = String::from_utf8(riskbound(&["slices", "--help"]).stdout).unwrap();
    assert!(!help.contains("--group-by"), "{help}");
    let mut grouped = base.to_vec();
    grouped.extend(["--group-by", "region"]);
    assert_eq!(riskbound(&grouped).status.code(), Some(2));
}
