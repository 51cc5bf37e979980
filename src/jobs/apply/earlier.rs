//! What an earlier run left in a run folder, and the one rule for it.
//!
//! **The rule.** A run into a folder that holds an earlier tapmap run (its
//! `manifest.json` or `journal.jsonl`) first removes every file that earlier
//! run recorded there: the tables and manifest its manifest lists, and every
//! output its manifest or journal lists for an input. With `--resume` the
//! results that can be taken over stay, and at the end every file that the
//! earlier records list and this run's results no longer do is removed (the
//! outputs of an input that was deleted, a sheet the new `--save` does not
//! ask for). Nothing else is ever removed: files tapmap did not record, other
//! runs' shard folders, and anything outside the run folder stay as they are.
//! Folders left empty by a removal are removed.
//!
//! Temporary files (`.tapmap-*.part`) that a killed run left behind are
//! removed too; they are never a finished output.

use std::collections::BTreeSet;
use std::path::{Component, Path, PathBuf};

use crate::jobs::inputs::path_from_text;
use crate::jobs::manifest::read_manifest;
use crate::jobs::shard::Shard;
use crate::jobs::LOCK_FILE;

use super::JOURNAL;

/// Every file an earlier run in `dir` recorded, as recorded (relative, `/`
/// separated): from its manifest (when it is tapmap's and readable) and from
/// every line of its journal, whatever job wrote it.
pub(super) fn recorded_files(dir: &Path) -> BTreeSet<String> {
    let mut files = BTreeSet::new();
    if let Ok(m) = read_manifest(&dir.join("manifest.json")) {
        files.insert("manifest.json".to_string());
        files.extend(m.files.into_iter().map(|f| f.path));
        for i in m.inputs {
            files.extend(i.outputs.into_iter().map(|f| f.path));
        }
    }
    if let Ok(text) = std::fs::read_to_string(dir.join(JOURNAL)) {
        // Loosely, line by line: a line whose check fails is not taken over,
        // but the files it names were still written by tapmap.
        for line in text.lines().skip(1) {
            let Ok(v) = serde_json::from_str::<serde_json::Value>(line) else {
                continue;
            };
            if let Some(outs) = v.pointer("/done/entry/outputs").and_then(|o| o.as_array()) {
                files.extend(
                    outs.iter()
                        .filter_map(|o| o.get("path").and_then(|p| p.as_str()))
                        .map(str::to_string),
                );
            }
        }
    }
    files
}

/// The file in `dir` that a record names, if the record names one that a run
/// into `dir` can have written: plain names only (no root, `..` or `.`), not
/// inside a shard folder (that is another run's), not the lock.
fn recorded_path(dir: &Path, text: &str) -> Option<PathBuf> {
    let rel = path_from_text(text)?;
    let mut parts = rel.components();
    let first = parts.next()?;
    if !rel.components().all(|c| matches!(c, Component::Normal(_))) {
        return None;
    }
    let first = first.as_os_str().to_string_lossy();
    if Shard::from_folder(&first).is_some() || first == LOCK_FILE {
        return None;
    }
    Some(dir.join(rel))
}

/// Removes the recorded files `files` from `dir` (see the module header) and
/// the folders that become empty; returns how many files were removed.
pub(super) fn remove_recorded<'a>(
    dir: &Path,
    files: impl IntoIterator<Item = &'a String>,
) -> usize {
    let mut removed = 0;
    let mut parents = BTreeSet::new();
    for text in files {
        let Some(path) = recorded_path(dir, text) else {
            continue;
        };
        let is_file = std::fs::symlink_metadata(&path).is_ok_and(|m| !m.is_dir());
        if is_file && std::fs::remove_file(&path).is_ok() {
            removed += 1;
            let mut p = path.parent();
            while let Some(d) = p {
                if d == dir || !d.starts_with(dir) {
                    break;
                }
                parents.insert(d.to_path_buf());
                p = d.parent();
            }
        }
    }
    // Deepest first; a folder that still holds anything stays.
    for d in parents.iter().rev() {
        let _ = std::fs::remove_dir(d);
    }
    removed
}

/// Removes temporary files (`.tapmap-*.part`) a killed run left in `dir`,
/// without entering other runs' shard folders.
pub(super) fn remove_leftovers(dir: &Path) {
    let walker = walkdir::WalkDir::new(dir).into_iter().filter_entry(|e| {
        e.depth() == 0
            || !(e.file_type().is_dir()
                && Shard::from_folder(&e.file_name().to_string_lossy()).is_some())
    });
    for e in walker.flatten() {
        let name = e.file_name().to_string_lossy();
        if e.file_type().is_file() && name.starts_with(".tapmap-") && name.ends_with(".part") {
            let _ = std::fs::remove_file(e.path());
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn records_that_leave_the_folder_or_enter_a_shard_name_nothing() {
        let d = Path::new("/run");
        assert_eq!(
            recorded_path(d, "maps/a.npy"),
            Some(PathBuf::from("/run/maps/a.npy"))
        );
        assert_eq!(recorded_path(d, "../a.npy"), None);
        assert_eq!(recorded_path(d, "/etc/passwd"), None);
        assert_eq!(recorded_path(d, "maps/../../x"), None);
        assert_eq!(recorded_path(d, "shard-1-of-2/maps/a.npy"), None);
        assert_eq!(recorded_path(d, LOCK_FILE), None);
        assert_eq!(recorded_path(d, "bad\\q"), None);
    }
}
