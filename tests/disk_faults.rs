//! The state volume full (ENOSPC) or read-only: the daemon turns not ready, counts it in
//! `riskbound_state_write_failures_total`, logs one clear line, keeps its committed state, and
//! resumes by itself once it can write again, with no loss. The volume is a small tmpfs mounted
//! for the test (CI runs as root).
//!
//! The read-only case is a volume that is read-only when the daemon starts (a restart onto a
//! volume the kernel or an operator made read-only), remounted writable later. A volume
//! turning read-only under the running daemon cannot be produced from a test: Linux refuses to
//! remount a filesystem read-only while the database file is open for writing (EBUSY). SQLite
//! then reports SQLITE_READONLY, which takes the same path as SQLITE_FULL
//! (`StoreError::is_disk`) and also reopens the database (`StoreError::needs_reopen`).

mod common;

use std::process::Command;
use std::time::Duration;

use common::{Daemon, TempDir};

const T: i64 = 1_790_000_000;

struct Mount(std::path::PathBuf);

impl Mount {
    fn tmpfs(at: &std::path::Path, size: &str) -> Mount {
        std::fs::create_dir_all(at).unwrap();
        let ok = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs", at.to_str().unwrap()])
            .status()
            .unwrap();
        assert!(ok.success(), "mounting a tmpfs needs root (CI runs as root)");
        Mount(at.to_path_buf())
    }
}

impl Mount {
    fn remount(&self, how: &str) {
        let ok =
            Command::new("mount").args(["-o", &format!("remount,{how}"), self.0.to_str().unwrap()]).status().unwrap();
        assert!(ok.success(), "remount {how}");
    }
}

impl Drop for Mount {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg("-l").arg(&self.0).status();
    }
}

fn config(dir: &TempDir, port: u16) -> std::path::PathBuf {
    common::simple_config(dir, port, "rescan_interval: 200ms", "disk", "", "[ { name: all, last: 1000000 } ]")
}

fn batch(from: u32, to: u32) -> String {
    let mut s = String::from("id,t,p\n");
    for i in from..to {
        s += &format!("id-{i:08}-padding-to-make-rows-longer,{},late\n", T + i64::from(i));
    }
    s
}

fn ready(d: &Daemon) -> u16 {
    d.get("/readyz").map(|r| r.0).unwrap_or(0)
}

fn rows(d: &Daemon) -> f64 {
    d.metrics().get("riskbound_rows_ingested_total", &[("model", "disk"), ("kind", "prediction")]).unwrap()
}

#[test]
fn a_full_volume_makes_the_daemon_not_ready_until_space_is_back() {
    let dir = TempDir::new("enospc");
    let mount = Mount::tmpfs(&dir.path("state"), "3m");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    dir.drop_file("pred-0001.csv", &batch(0, 100));
    d.wait_files("disk", "prediction", 1.0);
    // Fill what is left of the volume.
    let filler = dir.path("state/filler");
    let _ = Command::new("dd").args(["if=/dev/zero", &format!("of={}", filler.display()), "bs=64k"]).output();
    dir.drop_file("pred-0002.csv", &batch(100, 20_100));
    d.wait_until(Duration::from_secs(20), |d| ready(d) == 503);
    let m = d.metrics();
    assert!(m.get("riskbound_state_write_failures_total", &[]).unwrap() >= 1.0);
    assert_eq!(m.get("riskbound_state_unwritable", &[]), Some(1.0));
    assert_eq!(rows(&d), 100.0, "committed state kept, nothing half-written");
    let log = d.log_text();
    assert_eq!(log.matches("state volume refuses writes").count(), 1, "one clear line, not one per retry:\n{log}");
    // Space is back: the daemon resumes by itself.
    std::fs::remove_file(&filler).unwrap();
    d.wait_until(Duration::from_secs(20), |d| ready(d) == 200);
    d.wait_files("disk", "prediction", 2.0);
    assert_eq!(rows(&d), 20_100.0);
    assert_eq!(d.metrics().get("riskbound_state_unwritable", &[]), Some(0.0));
    assert!(d.log_text().contains("accepts writes again"));
    drop(d);
    drop(mount);
}

#[test]
fn a_read_only_volume_serves_the_committed_state_until_it_accepts_writes() {
    let dir = TempDir::new("erofs");
    let mount = Mount::tmpfs(&dir.path("state"), "16m");
    let port = common::free_port();
    let cfg = config(&dir, port);
    let d = Daemon::start(&cfg, port);
    dir.drop_file("pred-0001.csv", &batch(0, 100));
    d.wait_files("disk", "prediction", 1.0);
    assert!(d.terminate().success());
    // Read-only while nothing holds it open, then a restart onto it with a new file waiting.
    mount.remount("ro");
    dir.drop_file("pred-0002.csv", &batch(100, 300));
    let d = Daemon::spawn(&cfg, port);
    d.wait_until(Duration::from_secs(20), |d| d.metrics().get("riskbound_state_unwritable", &[]) == Some(1.0));
    assert_eq!(ready(&d), 503, "not ready while the state cannot be written");
    let m = d.metrics();
    assert!(m.get("riskbound_state_write_failures_total", &[]).unwrap() >= 1.0);
    assert_eq!(rows(&d), 100.0, "the committed state is served, read-only");
    std::thread::sleep(Duration::from_millis(1500)); // a few retries
    assert_eq!(rows(&d), 100.0, "nothing taken while the state cannot record it");
    let log = d.log_text();
    assert_eq!(log.matches("state volume refuses writes").count(), 1, "one clear line, not one per retry:\n{log}");
    // Writable again: the daemon opens the state for writing by itself and takes the new file.
    mount.remount("rw");
    d.wait_until(Duration::from_secs(20), |d| ready(d) == 200);
    d.wait_files("disk", "prediction", 2.0);
    assert_eq!(rows(&d), 300.0, "every row once");
    assert_eq!(d.metrics().get("riskbound_state_unwritable", &[]), Some(0.0));
    let log = d.log_text();
    assert!(log.contains("accepts writes again"));
    assert_eq!(log.matches("state volume refuses writes").count(), 1);
    drop(d);
    drop(mount);
}
