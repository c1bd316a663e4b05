//! The daemon's own footprint, read from /proc as the Prometheus client conventions define the
//! `process_*` metrics, and the container's memory limit from the cgroup. A sidecar shares its
//! pod's limits, so these are what operators alert on.

use std::path::Path;

/// One reading of the process's resources.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct ProcessStats {
    /// User plus system CPU time, seconds.
    pub cpu_seconds: f64,
    pub resident_bytes: f64,
    pub virtual_bytes: f64,
    pub open_fds: f64,
    /// The soft limit on open files.
    pub max_fds: f64,
    /// Start of the process, seconds since the Unix epoch.
    pub start_time_seconds: f64,
}

/// Reads this process's figures; None where /proc is not available (not Linux).
pub fn read() -> Option<ProcessStats> {
    let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
    let boot = std::fs::read_to_string("/proc/stat").ok()?;
    let limits = std::fs::read_to_string("/proc/self/limits").ok()?;
    // SAFETY: sysconf only reads a system constant.
    let (tick, page) = unsafe { (libc::sysconf(libc::_SC_CLK_TCK), libc::sysconf(libc::_SC_PAGESIZE)) };
    let open_fds = std::fs::read_dir("/proc/self/fd").ok()?.count().saturating_sub(1); // the listing's own fd
    parse(&stat, &boot, &limits, tick as f64, page as f64, open_fds as f64)
}

/// The figures from the texts of /proc/self/stat, /proc/stat and /proc/self/limits (proc(5)).
pub fn parse(
    stat: &str,
    boot: &str,
    limits: &str,
    ticks_per_second: f64,
    page_bytes: f64,
    open_fds: f64,
) -> Option<ProcessStats> {
    // The command name (field 2) is in parentheses and may itself hold spaces or ')'.
    let after = &stat[stat.rfind(')')? + 1..];
    let f: Vec<&str> = after.split_whitespace().collect();
    // `after` starts at field 3 (state): field k is f[k - 3].
    let field = |k: usize| -> Option<f64> { f.get(k - 3)?.parse().ok() };
    let (utime, stime, start_ticks) = (field(14)?, field(15)?, field(22)?);
    let (vsize, rss_pages) = (field(23)?, field(24)?);
    let btime: f64 = boot.lines().find_map(|l| l.strip_prefix("btime "))?.trim().parse().ok()?;
    let max_fds = limits
        .lines()
        .find(|l| l.starts_with("Max open files"))
        .and_then(|l| l["Max open files".len()..].split_whitespace().next())
        .map(|v| if v == "unlimited" { f64::INFINITY } else { v.parse().unwrap_or(f64::NAN) })?;
    Some(ProcessStats {
        cpu_seconds: (utime + stime) / ticks_per_second,
        resident_bytes: rss_pages * page_bytes,
        virtual_bytes: vsize,
        open_fds,
        max_fds,
        start_time_seconds: btime + start_ticks / ticks_per_second,
    })
}

/// The memory limit of the cgroup this process runs in: cgroup v2 `memory.max`, else v1
/// `memory.limit_in_bytes`; None when unlimited or not found.
pub fn cgroup_memory_limit() -> Option<u64> {
    cgroup_limit_under(Path::new("/sys/fs/cgroup"))
}

/// As [`cgroup_memory_limit`], under a given cgroup mount (for tests).
pub fn cgroup_limit_under(root: &Path) -> Option<u64> {
    let read = |p: &str| std::fs::read_to_string(root.join(p)).ok();
    if let Some(v2) = read("memory.max") {
        return v2.trim().parse().ok(); // "max" means unlimited
    }
    let v1: u64 = read("memory/memory.limit_in_bytes")?.trim().parse().ok()?;
    // v1 writes "no limit" as a huge page-rounded number near i64::MAX.
    (v1 < 1 << 62).then_some(v1)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A /proc/self/stat line in the layout of proc(5); the command holds a space and a ')'.
    const STAT: &str = "4242 (risk bound) S 1 4242 4242 0 -1 4194560 1500 0 0 0 250 50 0 0 20 0 3 0 \
        123400 987654321 2048 18446744073709551615 1 1 0 0 0 0 0 0 0 0 0 0 17 1 0 0 0 0 0";

    #[test]
    fn fields_are_taken_from_their_proc5_positions() {
        let boot = "cpu  1 2 3\nbtime 1764000000\nprocesses 9\n";
        let limits = "Limit Soft Limit Hard Limit Units\nMax cpu time unlimited unlimited seconds\n\
                      Max open files            1024                 524288               files\n";
        let p = parse(STAT, boot, limits, 100.0, 4096.0, 7.0).unwrap();
        // utime 250 + stime 50 ticks at 100 Hz; rss 2048 pages of 4 KiB; starttime 123400 ticks.
        assert_eq!(p.cpu_seconds, 3.0);
        assert_eq!(p.resident_bytes, 2048.0 * 4096.0);
        assert_eq!(p.virtual_bytes, 987_654_321.0);
        assert_eq!(p.max_fds, 1024.0);
        assert_eq!(p.open_fds, 7.0);
        assert_eq!(p.start_time_seconds, 1_764_000_000.0 + 1234.0);
        let odd = STAT.replace("(risk bound)", "(a) b)");
        assert_eq!(parse(&odd, boot, limits, 100.0, 4096.0, 7.0), Some(p));
    }

    #[test]
    fn this_process_reads_sensibly() {
        let p = read().expect("Linux /proc");
        let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs_f64();
        assert!(p.start_time_seconds <= now + 1.0 && p.start_time_seconds > now - 86_400.0 * 30.0, "{p:?}");
        assert!(p.resident_bytes > 1e5 && p.virtual_bytes >= p.resident_bytes, "{p:?}");
        assert!(p.open_fds >= 3.0 && p.open_fds <= p.max_fds, "{p:?}");
    }

    #[test]
    fn cgroup_limits_v1_v2_and_unlimited() {
        let d = std::env::temp_dir().join(format!("rb-cgroup-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(d.join("memory")).unwrap();
        assert_eq!(cgroup_limit_under(&d), None);
        std::fs::write(d.join("memory/memory.limit_in_bytes"), "9223372036854771712\n").unwrap();
        assert_eq!(cgroup_limit_under(&d), None, "v1 unlimited");
        std::fs::write(d.join("memory/memory.limit_in_bytes"), "268435456\n").unwrap();
        assert_eq!(cgroup_limit_under(&d), Some(256 << 20));
        std::fs::write(d.join("memory.max"), "max\n").unwrap();
        assert_eq!(cgroup_limit_under(&d), None, "v2 unlimited wins over v1");
        std::fs::write(d.join("memory.max"), "134217728\n").unwrap();
        assert_eq!(cgroup_limit_under(&d), Some(128 << 20));
        std::fs::remove_dir_all(&d).unwrap();
    }
}
