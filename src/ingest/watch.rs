//! Finding batch files: directory listings (at start, on every file event, and on a periodic
//! rescan, because events get lost and network filesystems send none), filtered to final names.
//! Writers are expected to write elsewhere (or under a dot name or a .tmp/.part suffix) and
//! rename into place; such in-progress names are never read.

use std::path::PathBuf;
use std::sync::mpsc::Sender;
use std::time::SystemTime;

use notify::{RecommendedWatcher, RecursiveMode, Watcher};

use super::records::Kind;
use crate::config::ModelConfig;

/// A file that may hold a batch for a model.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Candidate {
    pub model: usize,
    pub kind: Kind,
    pub path: PathBuf,
    pub name: String,
    pub len: u64,
    pub modified: Option<SystemTime>,
}

/// True for names a writer is still working on: dot files and `.tmp`/`.part` suffixes.
pub fn in_progress(name: &str) -> bool {
    name.starts_with('.') || name.ends_with(".tmp") || name.ends_with(".part")
}

/// Lists every candidate file, predictions before labels, each directory's files by name so
/// that a replay of the same files takes them in the same order.
pub fn scan(models: &[ModelConfig]) -> Vec<Candidate> {
    let mut out = Vec::new();
    for kind in [Kind::Prediction, Kind::Label] {
        for (i, m) in models.iter().enumerate() {
            let src = if kind == Kind::Prediction { &m.predictions } else { &m.labels };
            let Ok(entries) = std::fs::read_dir(&src.dir) else { continue };
            let mut found: Vec<Candidate> = entries
                .filter_map(Result::ok)
                .filter_map(|e| {
                    let name = e.file_name().into_string().ok()?;
                    if in_progress(&name) || !src.pattern.matches(&name) {
                        return None;
                    }
                    // The entry's own stat is relative to the open directory (no path walk);
                    // a symlink is followed to what it names.
                    let meta = if e.file_type().ok()?.is_symlink() {
                        std::fs::metadata(e.path()).ok()?
                    } else {
                        e.metadata().ok()?
                    };
                    meta.is_file().then(|| Candidate {
                        model: i,
                        kind,
                        path: e.path(),
                        name,
                        len: meta.len(),
                        modified: meta.modified().ok(),
                    })
                })
                .collect();
            found.sort_by(|a, b| a.name.cmp(&b.name));
            out.extend(found);
        }
    }
    out
}

/// Watches every input directory; each event sends a wake-up (the receiver rescans).
pub fn watch(models: &[ModelConfig], wake: Sender<()>) -> notify::Result<RecommendedWatcher> {
    let mut w = notify::recommended_watcher(move |res: notify::Result<notify::Event>| {
        // Our own reads raise access events; waking on them would rescan in a loop.
        if !matches!(res, Ok(notify::Event { kind: notify::EventKind::Access(_), .. })) {
            let _ = wake.send(());
        }
    })?;
    let mut dirs: Vec<&PathBuf> = models.iter().flat_map(|m| [&m.predictions.dir, &m.labels.dir]).collect();
    dirs.sort();
    dirs.dedup();
    for d in dirs {
        w.watch(d, RecursiveMode::NonRecursive)?;
    }
    Ok(w)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn in_progress_names_are_skipped() {
        for n in [".pred-1.csv", "pred-1.csv.tmp", "pred-1.csv.part", ".x"] {
            assert!(in_progress(n), "{n}");
        }
        for n in ["pred-1.csv", "labels.jsonl", "a.tmp.csv"] {
            assert!(!in_progress(n), "{n}");
        }
    }
}
