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
    let out = riskbound(&[
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
    ]);
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
    let again = riskbound(&[
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
    ]);
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
        let out = riskbound(&args);
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        assert!(
            String::from_utf8_lossy(&out.stderr).contains(needle),
            "{args:?}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
}
