//! Files that change under the daemon. Each case: no row lost, none counted twice, and a
//! logged outcome. Outcomes (also in the README):
//! - rewritten in place or truncated after it was taken: read again ("changed after it was
//!   taken"); its new rows are taken, rows seen before are rejected as duplicates; the same
//!   when it was rewritten while the daemon was down;
//! - renamed (twice) or copied: the content is taken once, whatever its names;
//! - a symlink swapped to another file: each target's content is taken once;
//! - the watched folder deleted and re-created: the periodic rescan finds the new files.

mod common;

use common::{Daemon, TempDir};

const T: i64 = 1_790_000_000;

fn setup(tag: &str) -> (TempDir, Daemon) {
    let dir = TempDir::new(tag);
    let port = common::free_port();
    let cfg = common::simple_config(&dir, port, "rescan_interval: 150ms", "fc", "", "[ { name: all, last: 100000 } ]");
    let d = Daemon::start(&cfg, port);
    (dir, d)
}

fn rows(ids: std::ops::Range<u32>) -> String {
    let mut s = String::from("id,t,p\n");
    for i in ids {
        s += &format!("x{i},{},a\n", T + i64::from(i));
    }
    s
}

fn taken(d: &Daemon) -> (f64, f64, f64) {
    let m = d.metrics();
    (
        m.get("riskbound_files_ingested_total", &[("model", "fc"), ("kind", "prediction")]).unwrap(),
        m.get("riskbound_rows_ingested_total", &[("model", "fc"), ("kind", "prediction")]).unwrap(),
        m.get(
            "riskbound_rows_rejected_total",
            &[("model", "fc"), ("kind", "prediction"), ("reason", "duplicate_prediction")],
        )
        .unwrap(),
    )
}

#[test]
fn rewritten_in_place_and_truncated() {
    let (dir, d) = setup("fc-rewrite");
    dir.drop_file("pred-1.csv", &rows(0..10));
    d.wait_files("fc", "prediction", 1.0);
    // Appended in place: the file now holds 0..15.
    std::thread::sleep(std::time::Duration::from_millis(20)); // a new mtime
    std::fs::write(dir.path("in/pred-1.csv"), rows(0..15)).unwrap();
    d.wait_files("fc", "prediction", 2.0);
    assert_eq!(taken(&d), (2.0, 15.0, 10.0));
    // Truncated to 0..3: all three already seen.
    std::thread::sleep(std::time::Duration::from_millis(20));
    std::fs::write(dir.path("in/pred-1.csv"), rows(0..3)).unwrap();
    d.wait_files("fc", "prediction", 3.0);
    assert_eq!(taken(&d), (3.0, 15.0, 13.0));
    assert!(d.log_text().contains("batch file changed after it was taken; reading it again"));
}

#[test]
fn renamed_twice_and_copied() {
    let (dir, d) = setup("fc-rename");
    dir.drop_file("pred-a.csv", &rows(0..10));
    d.wait_files("fc", "prediction", 1.0);
    std::fs::rename(dir.path("in/pred-a.csv"), dir.path("in/pred-b.csv")).unwrap();
    std::fs::rename(dir.path("in/pred-b.csv"), dir.path("in/pred-c.csv")).unwrap();
    std::fs::copy(dir.path("in/pred-c.csv"), dir.path("in/pred-d.csv")).unwrap();
    dir.drop_file("pred-z.csv", &rows(10..11)); // a marker: once taken, the others were seen
    d.wait_files("fc", "prediction", 2.0);
    assert_eq!(taken(&d), (2.0, 11.0, 0.0));
}

#[test]
fn a_swapped_symlink_takes_each_target_once() {
    let (dir, d) = setup("fc-symlink");
    let a = dir.path("a.csv");
    let b = dir.path("b.csv");
    std::fs::write(&a, rows(0..5)).unwrap();
    std::fs::write(&b, rows(5..12)).unwrap();
    std::os::unix::fs::symlink(&a, dir.path("in/pred-link.csv")).unwrap();
    d.wait_files("fc", "prediction", 1.0);
    let tmp = dir.path("in/.pred-link.tmp");
    std::os::unix::fs::symlink(&b, &tmp).unwrap();
    std::fs::rename(&tmp, dir.path("in/pred-link.csv")).unwrap();
    d.wait_files("fc", "prediction", 2.0);
    assert_eq!(taken(&d), (2.0, 12.0, 0.0));
    // Swapped back to a: nothing new.
    let tmp = dir.path("in/.pred-link2.tmp");
    std::os::unix::fs::symlink(&a, &tmp).unwrap();
    std::fs::rename(&tmp, dir.path("in/pred-link.csv")).unwrap();
    dir.drop_file("pred-z.csv", &rows(12..13));
    d.wait_files("fc", "prediction", 3.0);
    assert_eq!(taken(&d), (3.0, 13.0, 0.0));
}

#[test]
fn the_watched_folder_deleted_and_recreated() {
    let (dir, d) = setup("fc-rmdir");
    dir.drop_file("pred-1.csv", &rows(0..4));
    d.wait_files("fc", "prediction", 1.0);
    std::fs::remove_dir_all(dir.path("in")).unwrap();
    std::fs::create_dir(dir.path("in")).unwrap();
    dir.drop_file("pred-2.csv", &rows(4..9));
    d.wait_files("fc", "prediction", 2.0);
    assert_eq!(taken(&d), (2.0, 9.0, 0.0));
    // The first file comes back (restored from a backup): its content was taken already.
    dir.drop_file("pred-1.csv", &rows(0..4));
    dir.drop_file("pred-3.csv", &rows(9..10));
    d.wait_files("fc", "prediction", 3.0);
    assert_eq!(taken(&d), (3.0, 10.0, 0.0));
}

/// Rewritten while the daemon was down: the restart reads it again, exactly as a running daemon
/// would, and leaves the unchanged files it took alone.
#[test]
fn rewritten_while_the_daemon_was_down() {
    let dir = TempDir::new("fc-down");
    let port = common::free_port();
    let cfg = common::simple_config(&dir, port, "rescan_interval: 150ms", "fc", "", "[ { name: all, last: 100000 } ]");
    let d = Daemon::start(&cfg, port);
    dir.drop_file("pred-0.csv", &rows(100..110));
    dir.drop_file("pred-1.csv", &rows(0..10));
    d.wait_files("fc", "prediction", 2.0);
    assert!(d.terminate().success());
    std::thread::sleep(std::time::Duration::from_millis(20)); // a new mtime
    std::fs::write(dir.path("in/pred-1.csv"), rows(0..15)).unwrap();
    let d = Daemon::start(&cfg, port);
    d.wait_files("fc", "prediction", 3.0);
    assert_eq!(taken(&d), (3.0, 25.0, 10.0));
    let log = d.log_text();
    assert!(log.contains("batch file changed after it was taken; reading it again"), "{log}");
    assert!(!log.contains("pred-0.csv"), "an unchanged taken file was looked at again:\n{log}");
}

/// Moved out of the folder and back, unchanged: taken once. The daemon drops files that left
/// its folders from memory after a round (so memory holds what the folders hold, not every file
/// of a long run); on its return this one is recognised from the state.
#[test]
fn moved_away_and_back_unchanged() {
    let (dir, d) = setup("fc-away");
    dir.drop_file("pred-1.csv", &rows(0..10));
    d.wait_files("fc", "prediction", 1.0);
    std::fs::rename(dir.path("in/pred-1.csv"), dir.path("pred-1.csv")).unwrap();
    dir.drop_file("pred-2.csv", &rows(10..20));
    d.wait_files("fc", "prediction", 2.0); // a round listed the folder without pred-1.csv
    std::thread::sleep(std::time::Duration::from_millis(400)); // and rescans since
    std::fs::rename(dir.path("pred-1.csv"), dir.path("in/pred-1.csv")).unwrap();
    dir.drop_file("pred-3.csv", &rows(20..30));
    d.wait_files("fc", "prediction", 3.0);
    assert_eq!(taken(&d), (3.0, 30.0, 0.0));
    let log = d.log_text();
    assert!(!log.contains("changed after it was taken"), "{log}");
    assert_eq!(log.matches("pred-1.csv").count(), 1, "taken once, never looked at again:\n{log}");
}
