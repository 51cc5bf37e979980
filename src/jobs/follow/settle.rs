//! When a file that is being written is complete, so that it can be read.
//!
//! A file is taken
//! - at once when the writer says so: it was closed after writing, or it
//!   arrived by a rename (a writer that writes under a temporary name and
//!   renames when done);
//! - else once its size and modification time have stayed the same for the
//!   settle time, as tapmap's own clock measures it (a network mount's clock
//!   may differ from ours);
//! - at the start (or after a rescan), at once when its modification time is
//!   at least the settle time in the past: it has not been written since.
//!
//! A file that is still changing is never taken; one that vanishes before it
//! settles is forgotten. The pending set holds only names and stamps, never
//! file contents.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

use crate::jobs::inputs::InputItem;

/// A file's size and modification time: what says it changed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Stamp {
    pub len: u64,
    pub modified: Option<SystemTime>,
}

impl Stamp {
    /// The stamp of the regular file at `path` (links followed), or `None`
    /// when there is none.
    pub fn of(path: &Path) -> Option<Stamp> {
        let m = std::fs::metadata(path).ok().filter(|m| m.is_file())?;
        Some(Stamp {
            len: m.len(),
            modified: m.modified().ok(),
        })
    }
}

/// A file complete and ready to be read.
#[derive(Debug, Clone)]
pub(crate) struct Ready {
    pub item: InputItem,
    /// Its stamp when it was found complete.
    pub stamp: Stamp,
    /// When it arrived: the last change tapmap saw of it.
    pub arrived: Instant,
    /// It was there when the run started (not counted in the lags).
    pub initial: bool,
}

#[derive(Debug)]
struct Pending {
    item: InputItem,
    stamp: Option<Stamp>,
    changed: Instant,
    initial: bool,
    complete: bool,
}

/// Files seen but not yet complete (see the module header).
#[derive(Debug)]
pub(crate) struct Settler {
    settle: Duration,
    pending: HashMap<PathBuf, Pending>,
}

impl Settler {
    pub fn new(settle: Duration) -> Self {
        Settler {
            settle,
            pending: HashMap::new(),
        }
    }

    /// Files seen and not yet complete.
    pub fn len(&self) -> usize {
        self.pending.len()
    }

    /// A file found by listing a folder (at the start when `initial`, or
    /// after a rescan or a new folder).
    pub fn listed(&mut self, item: InputItem, now: Instant, initial: bool) {
        let stamp = Stamp::of(&item.source);
        let quiet_since = stamp
            .and_then(|s| s.modified)
            .and_then(|m| SystemTime::now().duration_since(m).ok());
        let complete = item.problem.is_some() || quiet_since.is_some_and(|q| q >= self.settle);
        self.note(item, now, initial, complete);
    }

    /// The file changed (created, written, its metadata changed).
    pub fn changed(&mut self, item: InputItem, now: Instant) {
        let source = item.source.clone();
        self.note(item, now, false, false);
        // Written again after the writer said it was done: wait again.
        if let Some(p) = self.pending.get_mut(&source) {
            p.complete = false;
        }
    }

    /// The writer says the file is complete: closed after writing, or
    /// renamed into place.
    pub fn completed(&mut self, item: InputItem, now: Instant) {
        self.note(item, now, false, true);
    }

    /// The file is gone (removed, or renamed away).
    pub fn removed(&mut self, path: &Path) {
        self.pending.remove(path);
    }

    fn note(&mut self, item: InputItem, now: Instant, initial: bool, complete: bool) {
        let stamp = Stamp::of(&item.source);
        let p = self
            .pending
            .entry(item.source.clone())
            .or_insert_with(|| Pending {
                item,
                stamp,
                changed: now,
                initial,
                complete,
            });
        if p.stamp != stamp {
            p.stamp = stamp;
            p.changed = now;
        }
        p.complete |= complete;
        p.initial &= initial;
    }

    /// Takes the files complete at `now` (see the module header), in the
    /// order of their last change.
    pub fn take_ready(&mut self, now: Instant) -> Vec<Ready> {
        let mut ready = Vec::new();
        let settle = self.settle;
        self.pending.retain(|_, p| {
            let stamp = Stamp::of(&p.item.source);
            if stamp.is_none() && p.item.problem.is_none() {
                return false;
            }
            if stamp != p.stamp {
                // Changed since the last look: still being written, unless
                // the writer said it is done.
                p.stamp = stamp;
                p.changed = now;
            }
            let done = p.complete || now.duration_since(p.changed) >= settle;
            if done {
                ready.push(Ready {
                    item: p.item.clone(),
                    stamp: stamp.unwrap_or(Stamp {
                        len: 0,
                        modified: None,
                    }),
                    arrived: p.changed,
                    initial: p.initial,
                });
            }
            !done
        });
        ready.sort_by_key(|r| r.arrived);
        ready
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn item(p: &Path) -> InputItem {
        InputItem {
            source: p.to_path_buf(),
            rel: PathBuf::from(p.file_name().unwrap()),
            problem: None,
        }
    }

    #[test]
    fn a_growing_file_waits_and_a_renamed_one_does_not() {
        let d = tempfile::tempdir().unwrap();
        let settle = Duration::from_secs(2);
        let mut s = Settler::new(settle);
        let t0 = Instant::now();
        let growing = d.path().join("g.png");
        std::fs::write(&growing, b"abc").unwrap();
        s.changed(item(&growing), t0);
        assert!(s.take_ready(t0 + Duration::from_millis(500)).is_empty());
        // It grows: the settle time starts again from this look.
        std::fs::write(&growing, b"abcdef").unwrap();
        assert!(s.take_ready(t0 + Duration::from_millis(1900)).is_empty());
        assert!(s.take_ready(t0 + Duration::from_millis(3800)).is_empty());
        let r = s.take_ready(t0 + Duration::from_millis(3901));
        assert_eq!(r.len(), 1);
        assert_eq!(r[0].stamp.len, 6);
        assert_eq!(r[0].arrived, t0 + Duration::from_millis(1900));

        let renamed = d.path().join("r.png");
        std::fs::write(&renamed, b"x").unwrap();
        s.completed(item(&renamed), t0);
        assert_eq!(s.take_ready(t0).len(), 1);

        // Closed after writing, then opened and written again: it waits.
        let reopened = d.path().join("o.png");
        std::fs::write(&reopened, b"x").unwrap();
        s.completed(item(&reopened), t0);
        s.changed(item(&reopened), t0);
        assert!(s.take_ready(t0).is_empty());
        assert_eq!(s.take_ready(t0 + settle).len(), 1);

        // Vanished before it settled: forgotten.
        let gone = d.path().join("v.png");
        std::fs::write(&gone, b"x").unwrap();
        s.changed(item(&gone), t0);
        std::fs::remove_file(&gone).unwrap();
        assert!(s.take_ready(t0 + settle * 2).is_empty());
        assert_eq!(s.len(), 0);
    }

    #[test]
    fn a_file_listed_long_after_its_last_write_is_taken_at_once() {
        let d = tempfile::tempdir().unwrap();
        let old = d.path().join("old.png");
        std::fs::write(&old, b"x").unwrap();
        let f = std::fs::File::options().write(true).open(&old).unwrap();
        f.set_modified(SystemTime::now() - Duration::from_secs(60))
            .unwrap();
        let fresh = d.path().join("fresh.png");
        std::fs::write(&fresh, b"x").unwrap();
        let mut s = Settler::new(Duration::from_secs(5));
        let t0 = Instant::now();
        s.listed(item(&old), t0, true);
        s.listed(item(&fresh), t0, true);
        let r = s.take_ready(t0);
        assert_eq!(r.len(), 1);
        assert!(r[0].initial);
        assert_eq!(r[0].item.source, old);
        assert_eq!(s.len(), 1);
    }
}
