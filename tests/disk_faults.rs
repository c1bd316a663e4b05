//! The state volume full (ENOSPC) or read-only: the daemon counts it in
//! `riskbound_state_write_failures_total`, raises `riskbound_state_unwritable`, logs one clear
//! line, keeps serving its committed state, and resumes by itself once it can write again, with
//! no loss. It stays ready throughout: readiness is per pod, and a sidecar that turned not ready
//! would take the model it watches out of its Service for a disk the model does not use. The volumes are mounted for the
//! test (CI runs as root): a small tmpfs, and an ext4 image on a loop device.
//!
//! Read-only comes two ways. A volume read-only when the daemon starts (a restart onto a
//! volume an operator or the kernel made read-only), remounted writable later: a tmpfs. And a
//! volume turning read-only under the running daemon: Linux refuses a plain read-only remount
//! while the database is open for writing (EBUSY), but ext4 mounted `errors=remount-ro` turns
//! itself read-only on a filesystem error whoever holds it open, which is what a failing disk
//! does to a running daemon; the test raises that error through ext4's `trigger_fs_error`.
//! Such a volume cannot be made writable again in place: the operator mounts it again, over
//! the old mount, and the daemon must let go of its old connection.

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

/// An ext4 image on a loop device, mounted `errors=remount-ro`; mounted again (over the old
/// mount, from a fresh loop device) by [`Ext4::repair`].
struct Ext4 {
    image: std::path::PathBuf,
    at: std::path::PathBuf,
    loops: Vec<String>,
}

fn run(cmd: &str, args: &[&str]) -> String {
    let out = Command::new(cmd).args(args).output().unwrap();
    assert!(out.status.success(), "{cmd} {args:?}: {}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8_lossy(&out.stdout).trim().to_string()
}

impl Ext4 {
    fn new(image: std::path::PathBuf, at: &std::path::Path) -> Ext4 {
        std::fs::create_dir_all(at).unwrap();
        run("truncate", &["-s", "32M", image.to_str().unwrap()]);
        run("mkfs.ext4", &["-q", "-F", image.to_str().unwrap()]);
        let mut v = Ext4 { image, at: at.to_path_buf(), loops: Vec::new() };
        v.mount();
        v
    }

    fn mount(&mut self) {
        let dev = run("losetup", &["-f", "--show", self.image.to_str().unwrap()]);
        run("mount", &["-o", "errors=remount-ro", &dev, self.at.to_str().unwrap()]);
        self.loops.push(dev);
    }

    /// What a failing disk does: ext4 records an error and turns the filesystem read-only.
    fn fail(&self) {
        let dev = self.loops.last().unwrap().trim_start_matches("/dev/");
        std::fs::write(format!("/sys/fs/ext4/{dev}/trigger_fs_error"), "1").unwrap();
        let probe = self.at.join("probe");
        let err = std::fs::write(&probe, "x").unwrap_err();
        assert_eq!(err.raw_os_error(), Some(30), "EROFS after the error: {err}");
    }

    /// What the operator does: mount the volume again. The daemon still holds files of the old
    /// mount, so that stays (read-only, hidden) under the new one; e2fsck refuses to check an
    /// image that is still mounted, so the check an operator would run first is left out.
    fn repair(&mut self) {
        self.mount();
    }
}

impl Drop for Ext4 {
    fn drop(&mut self) {
        for dev in self.loops.iter().rev() {
            let _ = Command::new("umount").arg("-l").arg(&self.at).status();
            let _ = Command::new("losetup").args(["-d", dev]).status();
        }
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

fn unwritable(d: &Daemon) -> bool {
    d.metrics().get("riskbound_state_unwritable", &[]) == Some(1.0)
}

fn rows(d: &Daemon) -> f64 {
    d.metrics().get("riskbound_rows_ingested_total", &[("model", "disk"), ("kind", "prediction")]).unwrap()
}

/// The daemon while its volume refuses writes: still ready, the failure counted and logged
/// once, the `committed` rows served.
fn refusing_writes(d: &Daemon, committed: f64) {
    assert_eq!(ready(d), 200, "ready whatever the state volume does: the model's pod stays in its Service");
    let m = d.metrics();
    assert!(m.get("riskbound_state_write_failures_total", &[]).unwrap() >= 1.0);
    assert_eq!(m.get("riskbound_state_unwritable", &[]), Some(1.0));
    assert_eq!(rows(d), committed, "committed state kept and served, nothing half-written");
    let log = d.log_text();
    assert_eq!(log.matches("state volume refuses writes").count(), 1, "one clear line, not one per retry:\n{log}");
}

/// The daemon once the volume accepts writes again: writing by itself, with `files` files and
/// `total` rows taken, each once.
fn writing_again(d: &Daemon, files: f64, total: f64) {
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    while unwritable(d) {
        assert!(std::time::Instant::now() < deadline, "not writing again:\n{}", d.log_text());
        std::thread::sleep(Duration::from_millis(50));
    }
    assert_eq!(ready(d), 200);
    d.wait_files("disk", "prediction", files);
    assert_eq!(rows(d), total, "every row once");
    assert_eq!(d.metrics().get("riskbound_state_unwritable", &[]), Some(0.0));
    let log = d.log_text();
    assert!(log.contains("accepts writes again"));
    assert_eq!(log.matches("state volume refuses writes").count(), 1);
}

#[test]
fn a_full_volume_pauses_ingest_until_space_is_back_and_the_daemon_stays_ready() {
    let dir = TempDir::new("enospc");
    let mount = Mount::tmpfs(&dir.path("state"), "8m");
    let port = common::free_port();
    let d = Daemon::start(&config(&dir, port), port);
    dir.drop_file("pred-0001.csv", &batch(0, 100));
    d.wait_files("disk", "prediction", 1.0);
    // Fill what is left of the volume.
    let filler = dir.path("state/filler");
    let _ = Command::new("dd").args(["if=/dev/zero", &format!("of={}", filler.display()), "bs=64k"]).output();
    dir.drop_file("pred-0002.csv", &batch(100, 20_100));
    d.wait_until(Duration::from_secs(20), unwritable);
    refusing_writes(&d, 100.0);
    // Space is back: the daemon resumes by itself.
    std::fs::remove_file(&filler).unwrap();
    writing_again(&d, 2.0, 20_100.0);
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
    refusing_writes(&d, 100.0);
    std::thread::sleep(Duration::from_millis(1500)); // a few retries
    assert_eq!(rows(&d), 100.0, "nothing taken while the state cannot record it");
    // Writable again: the daemon opens the state for writing by itself and takes the new file.
    mount.remount("rw");
    writing_again(&d, 2.0, 300.0);
    drop(d);
    drop(mount);
}

#[test]
fn a_volume_failing_read_only_under_the_daemon_is_left_for_its_new_mount() {
    let dir = TempDir::new("ext4ro");
    let mut volume = Ext4::new(dir.path("state.img"), &dir.path("state"));
    let port = common::free_port();
    let cfg = config(&dir, port);
    let d = Daemon::start(&cfg, port);
    dir.drop_file("pred-0001.csv", &batch(0, 100));
    d.wait_files("disk", "prediction", 1.0);
    volume.fail();
    dir.drop_file("pred-0002.csv", &batch(100, 300));
    d.wait_until(Duration::from_secs(20), unwritable);
    refusing_writes(&d, 100.0);
    std::thread::sleep(Duration::from_millis(1500)); // a few retries
    assert_eq!(rows(&d), 100.0, "nothing taken while the state cannot record it");
    // Mounted again: the daemon opens the new mount's database by itself.
    volume.repair();
    writing_again(&d, 2.0, 300.0);
    // What it wrote after the repair is on the repaired volume: a restart finds all of it.
    d.kill9();
    let d = Daemon::start(&cfg, port);
    assert_eq!(rows(&d), 300.0, "durable on the repaired volume");
    assert_eq!(
        d.metrics().get("riskbound_files_ingested_total", &[("model", "disk"), ("kind", "prediction")]),
        Some(2.0)
    );
    drop(d);
    drop(volume);
}

/// `state_max_size` caps the database below an emptyDir's sizeLimit (past which the kubelet
/// would evict the whole pod, model and all): a file that would grow the state beyond it is
/// refused as on a full disk, the daemon stays ready and serves what it has, and with a larger
/// cap after a restart the file is taken.
#[test]
fn the_state_size_cap_pauses_ingest_before_the_volume_fills() {
    let dir = TempDir::new("statecap");
    let port = common::free_port();
    let windows = "[ { name: all, last: 1000000 } ]";
    let capped = |size: &str| {
        let top = format!("rescan_interval: 200ms\nstate_max_size: {size}");
        common::simple_config(&dir, port, &top, "disk", "", windows)
    };
    let d = Daemon::start(&capped("16MiB"), port);
    dir.drop_file("pred-0001.csv", &batch(0, 100));
    d.wait_files("disk", "prediction", 1.0);
    dir.drop_file("pred-0002.csv", &batch(100, 200_100));
    d.wait_until(Duration::from_secs(30), unwritable);
    refusing_writes(&d, 100.0);
    let db = std::fs::metadata(dir.path("state/riskbound.sqlite")).unwrap().len();
    assert!(db <= 16 << 20, "the database stays within the cap: {db} bytes");
    assert!(d.terminate().success());
    let d = Daemon::start(&capped("256MiB"), port);
    d.wait_files("disk", "prediction", 2.0);
    assert_eq!(rows(&d), 200_100.0, "every row once");
}
