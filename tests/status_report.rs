//! The status page and the report with the real binary: the page's numbers equal /metrics at
//! the same moment; names from the data and the spool (slice values, file names) are escaped;
//! the report lists every file with its SHA-256 (checked here with sha2) and its rejects by
//! reason; a replay of the report's file list into a new state writes the report's numbers
//! again, byte for byte; an empty period says so; bad arguments get located errors.
//! (Rendering in a real browser is tests/browser_check.py, run by .ci/run.)

mod common;

use std::process::Command;

use common::{bin, free_port, simple_config, Daemon, TempDir};
use sha2::{Digest, Sha256};

const T: i64 = 1_790_000_000;
const HOSTILE_SEG: &str = "<script>alert(1)</script>";
const HOSTILE_FILE: &str = "pred-<img src=x onerror=alert(2)>.csv";

/// Six hours of predictions (one file an hour) in three segments, the hostile one wrong 40% of
/// the time, labels ten minutes later; one prediction file under a hostile name, with a bad row.
/// Each hour's files are dropped once the daemon has taken the last, in event-time order.
fn scenario(dir: &TempDir, d: &Daemon) -> Vec<String> {
    let mut names = Vec::new();
    let mut k = 0u64;
    for h in 0..6 {
        let mut pred = String::from("id,t,seg,p\n");
        let mut label = String::from("id,t,y\n");
        for i in 0..240 {
            let id = format!("r{k:06}");
            k += 1;
            let t = T + h * 3600 + i * 15;
            let seg = ["a&b", HOSTILE_SEG, "plain"][(i % 3) as usize];
            // Wrong 40% of the time in the hostile segment, 2% elsewhere (deterministic).
            let wrong = if seg == HOSTILE_SEG { i % 5 < 2 } else { i % 50 == 0 };
            pred += &format!("{id},{t},{seg},late\n");
            label += &format!("{id},{},{}\n", t + 600, if wrong { "on-time" } else { "late" });
        }
        let (p, l) = (format!("pred-{h:03}.csv"), format!("label-{h:03}.csv"));
        dir.drop_file(&p, &pred);
        d.wait_files("shop", "prediction", (h + 1) as f64);
        dir.drop_file(&l, &label);
        d.wait_files("shop", "label", (h + 1) as f64);
        names.push(p);
        names.push(l);
    }
    dir.drop_file(HOSTILE_FILE, &format!("id,t,seg,p\nx1,{},plain,late\nx2,not-a-time,plain,late\n", T + 6 * 3600));
    names.push(HOSTILE_FILE.to_string());
    names
}

fn config(dir: &TempDir, port: u16) -> std::path::PathBuf {
    simple_config(
        dir,
        port,
        "rescan_interval: 100ms\nhistory: { every: 1h, keep: 30d }",
        "shop",
        "    label_wait: 1d\n    sla: { max_risk: 0.1 }\n    slices: { categorical: [seg] }",
        "[ { name: recent, last: 600 }, { name: all, last: 100000 } ]",
    )
}

fn riskbound(args: &[&str]) -> std::process::Output {
    Command::new(bin()).args(args).output().unwrap()
}

/// `riskbound replay --config CFG --files LIST --state STATE`.
fn replay(cfg: &std::path::Path, list: &str, state: &std::path::Path) -> std::process::Output {
    riskbound(&["replay", "--config", cfg.to_str().unwrap(), "--files", list, "--state", state.to_str().unwrap()])
}

/// Every `id="b-..." data-v="..."` cell of the page: (id, value).
fn page_bounds(page: &str) -> Vec<(String, f64)> {
    let mut out = Vec::new();
    for part in page.split("<td id=\"b-").skip(1) {
        let id = part.split('"').next().unwrap().to_string();
        let v = part.split("data-v=\"").nth(1).unwrap().split('"').next().unwrap().parse().unwrap();
        out.push((id, v));
    }
    out
}

fn assert_no_markup_from_data(html: &str, what: &str) {
    assert!(!html.contains("<script"), "{what}: an unescaped <script");
    assert!(!html.contains("<img"), "{what}: an unescaped <img");
}

#[test]
fn page_equals_metrics_and_report_replays_to_the_same_numbers() {
    let dir = TempDir::new("status-report");
    let port = free_port();
    let cfg = config(&dir, port);
    let d = Daemon::start(&cfg, port);
    let names = scenario(&dir, &d);
    d.wait_files("shop", "prediction", 7.0);
    // Every file is in: the snapshot no longer changes, so / and /metrics show the same one.
    std::thread::sleep(std::time::Duration::from_millis(500));
    let metrics = d.metrics();
    let (status, page) = d.get("/").unwrap();
    assert_eq!(status, 200);
    assert!(page.starts_with("<!doctype html>"), "{}", &page[..page.len().min(200)]);
    assert_no_markup_from_data(&page, "status page");
    assert!(page.contains("&lt;script&gt;alert(1)&lt;/script&gt;"), "the hostile segment, escaped, in the slice table");
    // Nothing is fetched from elsewhere.
    assert!(!page.contains("http://") && !page.contains("https://"), "the page links nowhere else");
    let bounds = page_bounds(&page);
    assert!(bounds.len() >= 16, "bounds on the page: {bounds:?}");
    for (id, v) in &bounds {
        // b-MODEL-WINDOW-SET-METHOD-EDGE; model and window names hold no '-' here.
        let parts: Vec<&str> = id.splitn(4, '-').collect();
        let (model, window, rest) = (parts[0], parts[1], format!("{}-{}", parts[2], parts[3]));
        let (set, rest) = rest.split_once('-').unwrap();
        let (method, edge) = rest.rsplit_once('-').unwrap();
        let guarantee = if set == "labelled" { "per-window" } else { "delay-robust" };
        let name = if edge == "upper" { "riskbound_risk_upper_bound" } else { "riskbound_risk_lower_bound" };
        let m =
            metrics.get(name, &[("model", model), ("window", window), ("method", method), ("guarantee", guarantee)]);
        assert_eq!(m, Some(*v), "{id}: the page says {v}, /metrics {m:?}");
    }
    // A chart per window, each drawn from the history.
    assert_eq!(page.matches("<svg role=\"img\"").count(), 2, "one chart per window");
    assert!(!page.contains("no evaluation recorded yet"));
    let status = d.terminate();
    assert!(status.success());

    // The report of everything.
    let out = dir.path("report.html");
    let r = riskbound(&["report", "--config", cfg.to_str().unwrap(), "--out", out.to_str().unwrap()]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let report = std::fs::read_to_string(&out).unwrap();
    assert_no_markup_from_data(&report, "report");
    assert!(report.contains("&lt;img src=x onerror=alert(2)&gt;"), "the hostile file name, escaped");
    for name in &names {
        let sha = format!("{:x}", Sha256::digest(std::fs::read(dir.path("in").join(name)).unwrap()));
        assert!(report.contains(&sha), "{name}'s SHA-256 is listed");
    }
    assert!(
        report.contains("bad_timestamp 1"),
        "rejects by reason: {}",
        &report[report.find("files taken").unwrap()..][..400]
    );
    let config_sha = format!("{:x}", Sha256::digest(std::fs::read(&cfg).unwrap()));
    assert!(report.contains(&config_sha), "the config's SHA-256");
    let section = common::report_numbers(&report);
    assert!(
        section.contains("Daily summary") && section.contains("&lt;script&gt;alert(1)&lt;/script&gt;"),
        "{section}"
    );
    assert!(section.contains("Slices certified over max_risk"), "the hostile segment is certified over the SLA");

    // The replay writes the same numbers.
    let list = format!("{}.replay.tsv", out.display());
    let again_state = dir.path("replayed");
    let r = replay(&cfg, &list, &again_state);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let again = dir.path("again.html");
    let r = riskbound(&[
        "report",
        "--config",
        cfg.to_str().unwrap(),
        "--state",
        again_state.to_str().unwrap(),
        "--out",
        again.to_str().unwrap(),
    ]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let replayed = std::fs::read_to_string(&again).unwrap();
    assert_eq!(common::report_numbers(&replayed), section, "the replay's numbers equal the report's");

    // A replay into a folder that holds a state, or of a file changed since, is refused.
    let r = replay(&cfg, &list, &again_state);
    assert_eq!(r.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&r.stderr).contains("already holds a riskbound state"));
    std::fs::write(dir.path("in").join("label-002.csv"), "id,t,y\n").unwrap();
    let r = replay(&cfg, &list, &dir.path("x"));
    assert_eq!(r.status.code(), Some(2));
    let err = String::from_utf8_lossy(&r.stderr);
    assert!(err.contains(".replay.tsv:") && err.contains("label-002.csv: SHA-256 is"), "{err}");

    // A period with no evaluation says so.
    let empty = dir.path("empty.html");
    let r = riskbound(&[
        "report",
        "--config",
        cfg.to_str().unwrap(),
        "--from",
        "2001-01-01",
        "--to",
        "2001-01-02",
        "--out",
        empty.to_str().unwrap(),
    ]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let empty = std::fs::read_to_string(&empty).unwrap();
    assert!(empty.contains(riskbound::export::report::EMPTY_PERIOD));
    assert!(empty.contains("<p>0 files, 0 rows accepted, 0 rejected.</p>"));

    // A period the report cannot read is the user's to fix.
    let r = riskbound(&["report", "--config", cfg.to_str().unwrap(), "--from", "soon", "--out", "x.html"]);
    assert_eq!(r.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&r.stderr).contains("\"soon\" is not a time"));
}
