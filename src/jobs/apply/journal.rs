//! `journal.jsonl`: the finished inputs of an `apply` run, one JSON object a
//! line, appended as each input's files are in place, so a run that was killed
//! can be taken up where it stopped (`--resume`) and shards can be merged.
//!
//! The first line names the layout, `{"format": "tapmap-journal",
//! "journal_version": 1}`; each further line is `{"job": DIGEST, "check":
//! SHA, "done": …}`, where DIGEST says what decides the outputs (see
//! [`crate::jobs::apply::ApplyJob::digest`]), `done` is the input's
//! [`Finished`] result and SHA the SHA-256 of `done` as serialised (compact
//! JSON, fields in their declared order). A line cut short by a crash, or
//! whose `done` no longer has its check (edited), is skipped when read; a
//! journal of another layout is refused. Schema:
//! `shared/schemas/journal.schema.json`.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use serde::{Deserialize, Serialize};

use crate::error::Error;
use crate::image_io::atomic::write_atomic;
use crate::jobs::manifest::check_format;
use crate::jobs::tables::Finished;

/// The journal's file name in a run's folder.
pub const JOURNAL: &str = "journal.jsonl";
/// The `format` of the journal's first line.
pub const JOURNAL_FORMAT: &str = "tapmap-journal";
/// The journal layout this tapmap writes and reads.
pub const JOURNAL_VERSION: u32 = 1;

#[derive(Serialize)]
struct HeadOut {
    format: &'static str,
    journal_version: u32,
}

#[derive(Serialize, Deserialize)]
struct Line {
    job: String,
    /// SHA-256 of `done` as written: an entry edited by hand no longer
    /// matches it and is never taken over.
    #[serde(default)]
    check: String,
    done: Finished,
}

fn check_of(done: &Finished) -> String {
    crate::digest::sha256_hex(
        serde_json::to_string(done)
            .expect("typed records serialise")
            .as_bytes(),
    )
}

fn head_line() -> String {
    serde_json::to_string(&HeadOut {
        format: JOURNAL_FORMAT,
        journal_version: JOURNAL_VERSION,
    })
    .expect("plain fields")
        + "\n"
}

fn entry_line(job: &str, done: &Finished) -> String {
    serde_json::to_string(&Line {
        job: job.to_string(),
        check: check_of(done),
        done: done.clone(),
    })
    .expect("typed records serialise")
        + "\n"
}

/// Reads the entries of the journal at `path` tagged `job` (all entries when
/// `None`), by input path, the last entry of a path winning. A missing file
/// holds none; a file of another layout is an error.
pub fn read_journal(path: &Path, job: Option<&str>) -> Result<Vec<Finished>, Error> {
    let text = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
        Err(e) => return Err(Error::io(path, e)),
    };
    let mut lines = text.lines();
    match lines.next() {
        None => return Ok(Vec::new()),
        // A head line cut short by a crash just after the file was made.
        Some(first)
            if !text.contains('\n')
                && serde_json::from_str::<serde_json::Value>(first).is_err() =>
        {
            return Ok(Vec::new())
        }
        Some(first) => check_format(first, path, JOURNAL_FORMAT, JOURNAL_VERSION)?,
    }
    let mut by_path: BTreeMap<String, Finished> = BTreeMap::new();
    for line in lines {
        if let Ok(l) = serde_json::from_str::<Line>(line) {
            if job.map_or(true, |j| j == l.job) && l.check == check_of(&l.done) {
                by_path.insert(l.done.path().to_string(), l.done);
            }
        }
    }
    Ok(by_path.into_values().collect())
}

/// An open journal that finished inputs are appended to.
pub struct Journal {
    path: PathBuf,
    job: String,
    file: Mutex<std::fs::File>,
}

impl Journal {
    /// Opens the journal in `dir` for a run of `job`: kept as it is when
    /// `keep` (resume), else started afresh.
    pub fn open(dir: &Path, job: &str, keep: bool) -> Result<Journal, Error> {
        let path = dir.join(JOURNAL);
        let fresh = !keep || std::fs::metadata(&path).map_or(true, |m| m.len() == 0);
        let mut file = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&path)
            .map_err(|e| Error::io(&path, e))?;
        if fresh {
            file.set_len(0).map_err(|e| Error::io(&path, e))?;
            file.write_all(head_line().as_bytes())
                .map_err(|e| Error::io(&path, e))?;
        }
        Ok(Journal {
            path,
            job: job.to_string(),
            file: Mutex::new(file),
        })
    }

    /// Appends one finished input, in one write, so a crash leaves at most one
    /// cut-short last line.
    pub fn append(&self, done: &Finished) -> Result<(), Error> {
        let line = entry_line(&self.job, done);
        let mut f = self.file.lock().unwrap_or_else(|e| e.into_inner());
        f.write_all(line.as_bytes())
            .map_err(|e| Error::io(&self.path, e))
    }

    /// Appends one finished input and waits until it is on the disk
    /// (fdatasync), so that not even a power cut loses a result that was
    /// reported done.
    pub fn append_synced(&self, done: &Finished) -> Result<(), Error> {
        let line = entry_line(&self.job, done);
        let mut f = self.file.lock().unwrap_or_else(|e| e.into_inner());
        f.write_all(line.as_bytes())
            .and_then(|()| f.sync_data())
            .map_err(|e| Error::io(&self.path, e))
    }

    /// Replaces the journal with exactly `done`, in table order (atomically).
    pub fn rewrite(&self, done: &[Finished]) -> Result<(), Error> {
        let mut text = head_line();
        for d in done {
            text.push_str(&entry_line(&self.job, d));
        }
        let _held = self.file.lock().unwrap_or_else(|e| e.into_inner());
        write_atomic(&self.path, |w| w.write_all(text.as_bytes()))
    }
}
