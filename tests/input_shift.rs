//! The label-free input-shift tests against outside references: MMD², the median bandwidth, the
//! centred spectrum and the spectral p-value against numpy (tests/reference/
//! make_input_shift_fixture.py), KS against scipy's ks_2samp, permutation p-values against a
//! numpy permutation test on the same shifted pairs, the level of both tests on seeded null
//! pairs, and the command's output and its errors on bad input.

mod common;

use std::collections::HashMap;
use std::process::Command;

use common::{bin, fails_with, TempDir};
use riskbound::estimate::kernel::{self, Points, Pooled};
use riskbound::estimate::ks;
use riskbound::estimate::seeded::Seeded;
use serde_json::Value;

fn fixture() -> Value {
    let text =
        std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/input_shift_fixture.json"))
            .unwrap();
    serde_json::from_str(&text).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

fn sample(v: &Value, codes: &mut HashMap<String, u32>) -> Points {
    let numeric: Vec<f64> = v["numeric"].as_array().unwrap().iter().flat_map(floats).collect();
    let categorical = v["categorical"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| {
            let next = codes.len() as u32;
            *codes.entry(c.as_str().unwrap().to_string()).or_insert(next)
        })
        .collect();
    Points { numeric, dims: 3, categorical, cats: 1 }
}

fn one_column(xs: &[f64]) -> Points {
    Points { numeric: xs.to_vec(), dims: 1, ..Points::default() }
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

#[test]
fn mmd_bandwidth_and_spectrum_match_numpy() {
    let fx = fixture();
    let mut codes = HashMap::new();
    let r = sample(&fx["reference"], &mut codes);
    let c = sample(&fx["current"], &mut codes);
    let names = ["a".to_string(), "b".to_string(), "c".to_string()];
    let pooled = Pooled::new(&r, &c, &kernel::standardiser(&r, &names).unwrap()).unwrap();
    let median = pooled.median_distance().unwrap();
    let cases = fx["mmd"].as_array().unwrap();
    assert!(rel(median, cases[1]["sigma"].as_f64().unwrap()) < 1e-12, "median {median}");
    for case in cases {
        let sigma = case["sigma"].as_f64().unwrap();
        let g = pooled.gram(sigma).unwrap();
        let mmd = g.mmd();
        // numpy: the Gram matrix's block sums (fixture script).
        assert!(rel(mmd.unbiased, case["mmd2_unbiased"].as_f64().unwrap()) < 1e-9, "σ {sigma}: {mmd:?}");
        assert!(rel(mmd.biased, case["mmd2_biased"].as_f64().unwrap()) < 1e-9, "σ {sigma}: {mmd:?}");
        // numpy.linalg.eigvalsh of HKH/(m+n).
        let spectrum = g.centred_spectrum().unwrap();
        let ev = &spectrum.top;
        let want = floats(&case["eigenvalues_top10"]);
        for (a, b) in ev.iter().zip(&want) {
            assert!((a - b).abs() < 1e-10 * want[0], "σ {sigma}: {a} vs {b}");
        }
        assert!(rel(spectrum.trace, case["eigenvalue_sum"].as_f64().unwrap()) < 1e-9);
        // The spectral p-value from our null draws against numpy's 200 000: within 4 standard
        // errors of the two simulations.
        let draws = 100_000;
        let sp = kernel::spectral_test(&spectrum, 40, 50, mmd.unbiased, draws, 7);
        assert!(rel(sp.statistic, case["spectral_statistic"].as_f64().unwrap()) < 1e-9);
        let p = case["spectral_p_value"].as_f64().unwrap();
        let se = (p * (1.0 - p) * (1.0 / draws as f64 + 1.0 / 200_000.0)).sqrt();
        assert!((sp.p_value - p).abs() < 4.0 * se, "σ {sigma}: p {} vs numpy {p} (se {se})", sp.p_value);
        assert!(sp.eigenvalues >= 1 && sp.eigenvalues <= ev.len());
    }
}

#[test]
fn ks_matches_scipy_on_the_fixture_columns() {
    let fx = fixture();
    let col = |side: &str, j: usize| -> Vec<f64> {
        fx[side]["numeric"].as_array().unwrap().iter().map(|row| row[j].as_f64().unwrap()).collect()
    };
    for case in fx["ks"].as_array().unwrap() {
        let j = case["column"].as_u64().unwrap() as usize;
        let r = ks::two_sample(&col("reference", j), &col("current", j));
        assert!((r.statistic - case["statistic"].as_f64().unwrap()).abs() < 1e-15, "column {j}");
        assert!(
            rel(r.p_value, case["p_value"].as_f64().unwrap()) < 1e-9,
            "column {j}: {} vs {}",
            r.p_value,
            case["p_value"]
        );
    }
}

/// On the same shifted pairs, our permutation p-values agree with numpy's within the two
/// simulations' error (different permutations), and so does the power at level 0.05.
#[test]
fn permutation_p_values_match_a_numpy_permutation_test() {
    let fx = fixture();
    let (mut ours_reject, mut numpy_reject) = (0, 0);
    for pair in fx["shifted"].as_array().unwrap() {
        let (a, b) = (floats(&pair["reference"]), floats(&pair["current"]));
        let (ra, rb) = (one_column(&a), one_column(&b));
        let pooled = Pooled::new(&ra, &rb, &kernel::standardiser(&ra, &["x".into()]).unwrap()).unwrap();
        let g = pooled.gram(pooled.median_distance().unwrap()).unwrap();
        let t = g.mmd().unbiased;
        assert!(rel(t, pair["mmd2_unbiased"].as_f64().unwrap()) < 1e-9);
        let p = g.permutation_p(t, 4999, 11);
        let want = pair["permutation_p_value"].as_f64().unwrap();
        let se = (want.max(1e-3) * (1.0 - want) * 2.0 / 4999.0).sqrt();
        assert!((p - want).abs() <= 4.0 * se + 2.0 / 5000.0, "p {p} vs numpy {want}");
        ours_reject += usize::from(p <= 0.05);
        numpy_reject += usize::from(want <= 0.05);
    }
    assert!(ours_reject.abs_diff(numpy_reject) <= 1, "power: {ours_reject} vs numpy {numpy_reject} of 20");
}

fn normal(rng: &mut Seeded) -> f64 {
    let u = 1.0 - rng.uniform();
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * rng.uniform()).cos()
}

/// Under the null (both samples from one distribution) each test rejects at most δ of the
/// time: on 200 seeded pairs, the rejections stay within 200·δ + 3 standard deviations.
#[test]
fn both_tests_hold_their_level_on_null_pairs() {
    let mut rng = Seeded::new(2026);
    let (pairs, delta) = (200, 0.05);
    let (mut perm, mut spec) = (0, 0);
    for k in 0..pairs {
        let a: Vec<f64> = (0..2 * 30).map(|_| normal(&mut rng)).collect();
        let b: Vec<f64> = (0..2 * 40).map(|_| normal(&mut rng)).collect();
        let (ra, rb) =
            (Points { numeric: a, dims: 2, ..Points::default() }, Points { numeric: b, dims: 2, ..Points::default() });
        let pooled = Pooled::new(&ra, &rb, &kernel::standardiser(&ra, &["x".into(), "y".into()]).unwrap()).unwrap();
        let g = pooled.gram(pooled.median_distance().unwrap()).unwrap();
        let t = g.mmd().unbiased;
        perm += usize::from(g.permutation_p(t, 199, k) <= delta);
        let sp = kernel::spectral_test(&g.centred_spectrum().unwrap(), 30, 40, t, 2000, k);
        spec += usize::from(sp.p_value <= delta);
    }
    let limit = pairs as f64 * delta + 3.0 * (pairs as f64 * delta * (1.0 - delta)).sqrt();
    println!("null pairs rejected: permutation {perm}, spectral {spec} of {pairs} (limit {limit:.1})");
    assert!((perm as f64) <= limit, "permutation test rejected {perm} of {pairs} null pairs (limit {limit:.1})");
    assert!((spec as f64) <= limit, "spectral test rejected {spec} of {pairs} null pairs (limit {limit:.1})");
}

fn write_csv(dir: &TempDir, name: &str, side: &Value) -> String {
    let mut text = String::from("a,b,c,region\n");
    for (row, cat) in side["numeric"].as_array().unwrap().iter().zip(side["categorical"].as_array().unwrap()) {
        let r = floats(row);
        text += &format!("{},{},{},{}\n", r[0], r[1], r[2], cat.as_str().unwrap());
    }
    let p = dir.path(name);
    std::fs::write(&p, text).unwrap();
    p.display().to_string()
}

#[test]
fn the_command_reports_what_numpy_and_scipy_compute() {
    let fx = fixture();
    let dir = TempDir::new("input-shift");
    let r = write_csv(&dir, "ref.csv", &fx["reference"]);
    let c = write_csv(&dir, "cur.csv", &fx["current"]);
    let run = |extra: &[&str]| -> Value {
        let out = Command::new(bin())
            .args(["input-shift", "--reference", &r, "--current", &c, "--columns", "a,b,c", "--categorical", "region"])
            .args(extra)
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        serde_json::from_slice(&out.stdout).unwrap()
    };
    let doc = run(&["--json", "--bandwidth", "1.3", "--permutations", "0"]);
    let case = &fx["mmd"][0];
    assert!(rel(doc["mmd2_unbiased"].as_f64().unwrap(), case["mmd2_unbiased"].as_f64().unwrap()) < 1e-9);
    assert!(rel(doc["mmd2_biased"].as_f64().unwrap(), case["mmd2_biased"].as_f64().unwrap()) < 1e-9);
    assert_eq!((doc["n_reference"].as_u64(), doc["n_current"].as_u64()), (Some(40), Some(50)));
    assert!(doc["tests"]["permutation"].is_null());
    assert_eq!(doc["tests"]["spectral"]["level"], "asymptotic");
    assert_eq!(doc["bandwidth"].as_f64(), Some(1.3));
    for (u, k) in doc["univariate"].as_array().unwrap().iter().zip(fx["ks"].as_array().unwrap()) {
        assert!(rel(u["ks_p_value"].as_f64().unwrap(), k["p_value"].as_f64().unwrap()) < 1e-9);
    }
    // The median bandwidth and a permutation test, reproducible by seed.
    let doc = run(&["--json"]);
    assert!(rel(doc["bandwidth"].as_f64().unwrap(), fx["mmd"][1]["sigma"].as_f64().unwrap()) < 1e-12);
    let p = doc["tests"]["permutation"]["p_value"].as_f64().unwrap();
    assert_eq!(run(&["--json"])["tests"]["permutation"]["p_value"].as_f64(), Some(p));
    assert_eq!(doc["tests"]["permutation"]["shifted"].as_bool(), Some(p <= 0.05));
    // A subsample above --max-points, reported.
    let doc = run(&["--json", "--max-points", "30", "--permutations", "99"]);
    assert_eq!((doc["n_reference"].as_u64(), doc["rows_reference"].as_u64()), (Some(30), Some(40)));
    // The table says what a shift does and does not mean.
    let out = Command::new(bin())
        .args(["input-shift", "--reference", &r, "--current", &c, "--columns", "a,b", "--permutations", "99"])
        .output()
        .unwrap();
    let table = String::from_utf8(out.stdout).unwrap();
    assert!(table.contains("spectral test:") && table.contains("is not a rise of the risk"), "{table}");
}

#[test]
fn bad_input_gets_a_located_error_and_exit_2() {
    let dir = TempDir::new("input-shift-bad");
    let good = dir.path("good.csv");
    std::fs::write(&good, "x,k\n1,a\n2,b\n3,a\n4,b\n").unwrap();
    let good = good.display().to_string();
    let file = |name: &str, body: &str| {
        let p = dir.path(name);
        std::fs::write(&p, body).unwrap();
        p.display().to_string()
    };
    let run = |reference: &str, current: &str, cols: &str, needle: &str| {
        fails_with(&["input-shift", "--reference", reference, "--current", current, "--columns", cols], needle);
    };
    run(&good, &good, "y", "good.csv:1: column y: not in the header (columns: x, k)");
    let text = file("text.csv", "x,k\n1,a\nabc,b\n");
    run(&good, &text, "x", "text.csv:3: column x: \"abc\" is not a number");
    let nan = file("nan.csv", "x,k\n1,a\nNaN,b\n");
    run(&good, &nan, "x", "nan.csv:3: column x: NaN is not a finite number");
    let blank = file("blank.csv", "x,k\n1,a\n,b\n");
    run(&good, &blank, "x", "blank.csv:3: column x: missing value");
    let empty = file("empty.csv", "x,k\n");
    run(&good, &empty, "x", "empty.csv: no data rows");
    let constant = file("constant.csv", "x,k\n5,a\n5,b\n5,a\n");
    run(&constant, &good, "x", "constant.csv: column x is constant in the reference");
    fails_with(&["input-shift", "--reference", &good, "--current", &good], "give the columns to compare");
}
