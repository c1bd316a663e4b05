//! Crash loop: a generator with a ground-truth oracle writes prediction and label batches while
//! the daemon is killed with SIGKILL at random moments (mid-read, mid-transaction, while files
//! are being renamed into place, during scrapes) and restarted. At the end every window's n,
//! error count and loss sum must equal the oracle's: nothing lost, nothing counted twice.
//!
//! Kills: `RISKBOUND_CRASH_KILLS` (default 100, what CI runs); the long run is
//! `RISKBOUND_CRASH_KILLS=10000 cargo test --release --test crash_loop -- --nocapture`.
//!
//! Two things keep the long run's restarts from growing with it, as a serving stack's own
//! housekeeping would. The files hold at most 1.2 million predictions in all (400 rows a file
//! up to 1,000 kills, fewer rows beyond), since every restart reloads and re-publishes the
//! unbounded `all` window. And, like a spool cleaner, the harness moves files the daemon has
//! logged as taken out of the folder once more than `SPOOL` of them have piled up, since every
//! round stats every file of the folder; the newest `SPOOL` stay, so restarts still resume
//! beside a spool of taken files.

mod common;

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use common::{Daemon, Metrics, TempDir};
use rand::rngs::Xoshiro256PlusPlus;
use rand::{RngExt, SeedableRng};

const T: i64 = 1_790_000_000;
const RECENT: usize = 300;
/// Taken files left in the input folder before the oldest are moved out.
const SPOOL: usize = 500;

fn config(dir: &TempDir, port: u16) -> std::path::PathBuf {
    let windows = format!("[ {{ name: all, last: 100000000 }}, {{ name: recent, last: {RECENT} }} ]");
    common::simple_config(
        dir,
        port,
        "rescan_interval: 100ms\nhistory: { every: 10m, keep: 30d }",
        "crash",
        "    label_wait: 30d",
        &windows,
    )
}

/// Batch files to write, in order: (name, content).
type Files = Vec<(String, String)>;
/// The oracle: every labelled id with its prediction time and loss.
type Oracle = BTreeMap<String, (i64, f64)>;

/// The batches to write, in order, and the oracle's (t_pred, loss) of every labelled id.
fn scenario(seed: u64, batches: usize, rows: usize) -> (Files, Oracle) {
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(seed);
    let mut files = Vec::new();
    let mut oracle = BTreeMap::new();
    let mut waiting: Vec<(String, i64, &'static str)> = Vec::new();
    let mut next = 0usize;
    for b in 0..batches {
        let mut pred = String::from("id,t,p\n");
        for _ in 0..rows {
            let id = format!("q{next:07}");
            let t = T + next as i64; // unique prediction times: the recent window is exact
            next += 1;
            let p = if rng.random::<f64>() < 0.3 { "late" } else { "on-time" };
            pred += &format!("{id},{t},{p}\n");
            waiting.push((id, t, p));
        }
        files.push((format!("pred-{b:05}.csv"), pred));
        // Label a random part of what waits; labels come in shuffled order.
        let mut label = String::from("id,t,y\n");
        let mut keep = Vec::new();
        for (id, t, p) in waiting.drain(..) {
            if rng.random::<f64>() < 0.6 {
                let wrong = rng.random::<f64>() < 0.12;
                let y = if wrong {
                    if p == "late" {
                        "on-time"
                    } else {
                        "late"
                    }
                } else {
                    p
                };
                label += &format!("{id},{},{y}\n", t + 3600);
                oracle.insert(id, (t, f64::from(u8::from(wrong))));
            } else {
                keep.push((id, t, p));
            }
        }
        waiting = keep;
        files.push((format!("label-{b:05}.csv"), label));
    }
    (files, oracle)
}

fn check_against_oracle(m: &Metrics, oracle: &Oracle) {
    let all_n = oracle.len() as f64;
    let all_err: f64 = oracle.values().map(|v| v.1).sum();
    let mut by_time: Vec<(i64, f64)> = oracle.values().copied().collect();
    by_time.sort_by_key(|v| std::cmp::Reverse(v.0));
    let recent: Vec<f64> = by_time.iter().take(RECENT).map(|v| v.1).collect();
    let w = |name: &str, win: &str| m.get(name, &[("model", "crash"), ("window", win)]).unwrap();
    assert_eq!(w("riskbound_window_samples", "all"), all_n, "n of window all");
    assert_eq!((w("riskbound_risk_observed", "all") * all_n).round(), all_err, "errors (= loss sum) of window all");
    assert_eq!(w("riskbound_window_total_loss", "all"), all_err, "the exported loss sum, exactly");
    assert_eq!(w("riskbound_window_samples", "recent"), recent.len() as f64, "n of window recent");
    let recent_err: f64 = recent.iter().sum();
    assert_eq!(w("riskbound_window_total_loss", "recent"), recent_err, "the exported loss sum of window recent");
    assert_eq!(
        (w("riskbound_risk_observed", "recent") * recent.len() as f64).round(),
        recent_err,
        "errors of window recent"
    );
    assert_eq!(m.get("riskbound_samples_labelled_total", &[("model", "crash")]), Some(all_n));
    let rejected: f64 = m.0.iter().filter(|((n, _), _)| n == "riskbound_rows_rejected_total").map(|(_, v)| v).sum();
    assert_eq!(rejected, 0.0, "a re-read file would show up as duplicate rows");
}

/// The history the kills left equals the one a replay of the same files writes, in the order
/// they were taken: a point written twice (a kill between it and its file's commit) or lost
/// would show. Returns how many points the report holds.
fn history_replays_exactly(dir: &TempDir, cfg: &std::path::Path, archive: &std::path::Path) -> usize {
    let run = |args: &[&str]| {
        let out = std::process::Command::new(common::bin()).args(args).output().unwrap();
        assert!(out.status.success(), "{args:?}: {}", String::from_utf8_lossy(&out.stderr));
    };
    let (first, second) = (dir.path("report.html"), dir.path("again.html"));
    run(&["report", "--config", cfg.to_str().unwrap(), "--out", first.to_str().unwrap()]);
    // The spool cleaner moved the older files into the archive: the list points there for them.
    let list = dir.path("report.html.replay.tsv");
    let text = std::fs::read_to_string(&list).unwrap();
    let moved: String = text
        .lines()
        .map(|l| match l.rsplit_once('\t') {
            Some((head, path)) if !l.starts_with('#') && !std::path::Path::new(path).exists() => {
                let name = std::path::Path::new(path).file_name().unwrap();
                format!("{head}\t{}\n", archive.join(name).display())
            }
            _ => format!("{l}\n"),
        })
        .collect();
    std::fs::write(&list, moved).unwrap();
    let state = dir.path("replayed");
    run(&[
        "replay",
        "--config",
        cfg.to_str().unwrap(),
        "--files",
        list.to_str().unwrap(),
        "--state",
        state.to_str().unwrap(),
    ]);
    run(&[
        "report",
        "--config",
        cfg.to_str().unwrap(),
        "--state",
        state.to_str().unwrap(),
        "--out",
        second.to_str().unwrap(),
    ]);
    let numbers = |p: &std::path::Path| common::report_numbers(&std::fs::read_to_string(p).unwrap()).to_string();
    let (a, b) = (numbers(&first), numbers(&second));
    assert!(a == b, "the history after the kills differs from the replay's");
    let points = a.split(" history points.").next().and_then(|h| h.rsplit(' ').next()).and_then(|n| n.parse().ok());
    let points = points.expect("the report counts its points");
    assert!(points > 10, "{points} history points");
    points
}

#[test]
fn sigkill_at_random_moments_loses_and_duplicates_nothing() {
    let kills: usize = std::env::var("RISKBOUND_CRASH_KILLS").ok().and_then(|v| v.parse().ok()).unwrap_or(100);
    let dir = TempDir::new("crash");
    let port = common::free_port();
    let cfg = config(&dir, port);
    // Enough files that every kill has some left to land between, each large enough that
    // kills often fall inside a read or a transaction.
    let batches = (kills * 3 / 2).max(40);
    let rows = (1_200_000 / batches).clamp(40, 400);
    let (files, oracle) = scenario(7, batches, rows);
    let archive = dir.path("archive");
    std::fs::create_dir_all(&archive).unwrap();
    let mut taken_files = std::collections::VecDeque::new();
    let mut rng = Xoshiro256PlusPlus::seed_from_u64(99);
    let mut written = 0usize;
    let mut written_rows = 0usize;
    let mut behind = 0usize; // ready restarts that found written rows not yet taken: the kill cut work
    for k in 0..kills {
        // Where the kill falls: at a random moment after the files land (0), just after the
        // daemon committed a file, inside the read, transaction or publish that follows (1), or
        // while it is still resuming, before it is ready (2).
        let moment = rng.random_range(0..3u8);
        let d = if moment == 2 {
            Daemon::spawn(&cfg, port)
        } else {
            let d = Daemon::start(&cfg, port);
            // After a restart nothing may exceed what was written: no double counting, ever.
            let m = d.metrics();
            let taken = m.get("riskbound_rows_ingested_total", &[("model", "crash"), ("kind", "prediction")]).unwrap()
                + m.get("riskbound_rows_ingested_total", &[("model", "crash"), ("kind", "label")]).unwrap();
            assert!(taken <= written_rows as f64, "kill {k}: {taken} rows taken of {written_rows} written");
            behind += usize::from(taken < written_rows as f64);
            d
        };
        // A scraper during the whole life of this process.
        let stop = Arc::new(AtomicBool::new(false));
        let scraper = {
            let stop = stop.clone();
            std::thread::spawn(move || {
                while !stop.load(Ordering::SeqCst) {
                    let _ = common::http(port, "GET", "/metrics");
                }
            })
        };
        let burst = rng.random_range(1..4usize);
        for _ in 0..burst {
            if written < files.len() {
                let (name, body) = &files[written];
                written += 1;
                written_rows += body.lines().count() - 1;
                dir.drop_file(name, body);
            }
        }
        match moment {
            0 => std::thread::sleep(Duration::from_micros(rng.random_range(0..40_000u64))),
            1 => {
                let deadline = std::time::Instant::now() + Duration::from_secs(2);
                while !d.log_text().contains("batch file taken") && std::time::Instant::now() < deadline {
                    std::thread::sleep(Duration::from_micros(200));
                }
                std::thread::sleep(Duration::from_micros(rng.random_range(0..3_000u64)));
            }
            _ => std::thread::sleep(Duration::from_micros(rng.random_range(0..10_000u64))),
        }
        let log = d.log.clone();
        d.kill9();
        stop.store(true, Ordering::SeqCst);
        scraper.join().unwrap();
        // A file is logged as taken only after its transaction committed: moving it away is safe.
        let text = std::fs::read_to_string(&log).unwrap();
        std::fs::remove_file(&log).unwrap();
        for line in text.lines().filter(|l| l.contains("batch file taken")) {
            let path = line.split(" file=").nth(1).and_then(|r| r.split(' ').next()).unwrap();
            taken_files.push_back(std::path::PathBuf::from(path));
        }
        while taken_files.len() > SPOOL {
            let path = taken_files.pop_front().unwrap();
            std::fs::rename(&path, archive.join(path.file_name().unwrap())).unwrap();
        }
    }
    for (name, body) in &files[written..] {
        dir.drop_file(name, body);
    }
    let d = Daemon::start(&cfg, port);
    // What the kills left behind is taken in one go at the end: allow for its size.
    let rows_total: usize = files.iter().map(|(_, b)| b.lines().count() - 1).sum();
    d.wait_until(Duration::from_secs(60 + (rows_total / 20_000 + files.len() / 100) as u64), |d| {
        d.metrics().get("riskbound_files_ingested_total", &[("model", "crash"), ("kind", "label")])
            == Some(batches as f64)
    });
    d.wait_files("crash", "prediction", batches as f64);
    check_against_oracle(&d.metrics(), &oracle);
    let points = history_replays_exactly(&dir, &cfg, &archive);
    eprintln!(
        "crash loop: {kills} kills ({behind} cut work in progress), {} files of {rows} predictions, {} labelled samples, all counts equal to the oracle; the report's {points} history points equal a replay's",
        files.len(),
        oracle.len()
    );
}
