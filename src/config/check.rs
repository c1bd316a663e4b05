//! The checker that walks the raw config collecting located issues, and the small parsers
//! every section shares (durations, byte sizes, names, ranges).

use super::*;

/// Parses a duration such as `30s`, `15m`, `24h`, `7d` or `500ms`.
pub fn parse_duration(s: &str) -> Result<Duration, String> {
    let s = s.trim();
    let split = s
        .find(|c: char| !c.is_ascii_digit() && c != '.')
        .ok_or_else(|| format!("{s:?} has no unit (ms, s, m, h, d)"))?;
    let (num, unit) = s.split_at(split);
    let v: f64 = num.parse().map_err(|_| format!("{s:?} is not a duration"))?;
    let secs = match unit {
        "ms" => v / 1000.0,
        "s" => v,
        "m" => v * 60.0,
        "h" => v * 3600.0,
        "d" => v * 86400.0,
        _ => return Err(format!("{s:?}: unknown unit {unit:?} (ms, s, m, h, d)")),
    };
    if !secs.is_finite() || secs <= 0.0 {
        return Err(format!("{s:?} must be positive"));
    }
    // Past u64::MAX seconds a Duration cannot hold it (found by the config fuzz target).
    Duration::try_from_secs_f64(secs).map_err(|_| format!("{s:?} is too long"))
}

pub(super) fn valid_name(s: &str) -> bool {
    !s.is_empty() && s.bytes().all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'-' || b == b'_')
}

/// Parses a byte size: a plain number, or one with a unit (`KiB`/`Ki`, `MiB`/`Mi`, `GiB`/`Gi`,
/// and the decimal `kB`, `MB`, `GB`), as Kubernetes resource quantities are written.
pub fn parse_bytes(s: &str) -> Result<u64, String> {
    let t = s.trim();
    let split = t.find(|c: char| !c.is_ascii_digit()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let v: u64 = num.parse().map_err(|_| format!("{s:?} is not a size such as 512MiB"))?;
    let mult: u64 = match unit.trim() {
        "" | "B" => 1,
        "KiB" | "Ki" => 1 << 10,
        "MiB" | "Mi" => 1 << 20,
        "GiB" | "Gi" => 1 << 30,
        "kB" | "k" => 1_000,
        "MB" | "M" => 1_000_000,
        "GB" | "G" => 1_000_000_000,
        u => return Err(format!("{s:?}: unknown unit {u:?} (KiB, MiB, GiB, kB, MB, GB)")),
    };
    match v.checked_mul(mult) {
        Some(0) => Err(format!("{s:?} must be positive")),
        Some(b) => Ok(b),
        None => Err(format!("{s:?} is too large")),
    }
}

/// Collects issues while walking the raw config.
pub(super) struct Checker {
    pub(super) base: PathBuf,
    pub(super) issues: Vec<ConfigIssue>,
    /// False where the config is read away from the replica (the fleet view): its input
    /// directories are not there to list.
    pub(super) check_dirs: bool,
}

impl Checker {
    pub(super) fn push<T>(&mut self, at: &Spanned<T>, key: &str, reason: impl fmt::Display) {
        self.issues.push(ConfigIssue {
            line: at.referenced.line(),
            column: at.referenced.column(),
            key: key.to_string(),
            reason: reason.to_string(),
        });
    }

    pub(super) fn path(&self, s: &str) -> PathBuf {
        let p = Path::new(s);
        if p.is_absolute() {
            p.to_path_buf()
        } else {
            self.base.join(p)
        }
    }

    /// An integer setting `key`.`what` in [lo, hi], `default` when absent or out of range (an
    /// issue then).
    pub(super) fn ranged(
        &mut self,
        v: &Option<Spanned<i64>>,
        key: &str,
        what: &str,
        lo: i64,
        hi: i64,
        default: i64,
    ) -> usize {
        match v {
            None => default as usize,
            Some(x) if (lo..=hi).contains(&x.value) => x.value as usize,
            Some(x) => {
                self.push(x, &format!("{key}.{what}"), format!("must lie in [{lo}, {hi}], got {}", x.value));
                default as usize
            }
        }
    }

    /// A list of column names at `key`: none empty, none named twice in `seen` (the names of
    /// the section so far), which it extends.
    pub(super) fn column_list(
        &mut self,
        list: &Option<Vec<Spanned<String>>>,
        key: &str,
        seen: &mut Vec<String>,
    ) -> Vec<String> {
        let mut out = Vec::new();
        for n in list.iter().flatten() {
            if n.value.trim().is_empty() {
                self.push(n, key, "column names must not be empty");
            } else if seen.contains(&n.value) {
                self.push(n, key, format!("duplicate column {:?}", n.value));
            } else {
                seen.push(n.value.clone());
                out.push(n.value.clone());
            }
        }
        out
    }

    /// The format of a reference file: `format` (at `key`.format) if given, else by the file's
    /// extension (an error at `file_at` when it tells nothing).
    pub(super) fn reference_format(
        &mut self,
        format: Option<&Spanned<String>>,
        file_at: &Spanned<String>,
        key: &str,
        file: &Path,
    ) -> Option<crate::ingest::Format> {
        use crate::ingest::Format;
        match format {
            Some(f) => Format::parse(&f.value).or_else(|| {
                self.push(f, &format!("{key}.format"), format!("{:?} is not csv or jsonl", f.value));
                None
            }),
            None => Format::from_path(file).or_else(|| {
                self.push(
                    file_at,
                    &format!("{key}.file"),
                    "cannot tell the format from the extension; add format: csv or jsonl",
                );
                None
            }),
        }
    }

    /// Opens a reference file named at `at`. `None` after an error, or when it cannot be read
    /// away from the replica (the fleet view), where references are not needed.
    pub(super) fn open_reference(&mut self, at: &Spanned<String>, key: &str, file: &Path) -> Option<std::fs::File> {
        // A regular file only: a device or FIFO named here would block the config load.
        let opened = match std::fs::metadata(file).map(|m| m.is_file()) {
            Ok(false) => {
                self.push(at, key, format!("{} is not a regular file", file.display()));
                return None;
            }
            _ => std::fs::File::open(file),
        };
        match opened {
            Ok(f) => Some(f),
            Err(_) if !self.check_dirs => None,
            Err(e) => {
                self.push(at, key, format!("cannot read {}: {e}", file.display()));
                None
            }
        }
    }

    pub(super) fn duration_ms(&mut self, raw: &Spanned<String>, key: &str) -> Option<i64> {
        match parse_duration(&raw.value) {
            Ok(d) => Some(d.as_millis().min(i64::MAX as u128) as i64),
            Err(e) => {
                self.push(raw, key, e);
                None
            }
        }
    }
}
