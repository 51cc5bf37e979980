//! `manifest.json` of a probe or a border study: enough to repeat it (tool
//! version, command line, the resolved recipe with every bank whole, the
//! job's options) and to know what it looked at (every input with its SHA-256
//! and outcome) and wrote (the tables, with their sizes). Its `format` is
//! `tapmap-probe` or `tapmap-borders`; schema
//! `shared/schemas/study-manifest.schema.json`. A folder holding one is a
//! tapmap run folder: never read as input.

use std::path::Path;
use std::time::{Instant, SystemTime};

use serde::{Deserialize, Serialize};

use crate::error::Error;
use crate::image_io::atomic::write_atomic;
use crate::jobs::inputs::InputItem;
use crate::jobs::manifest::{recipe_record, FileRecord, RecipeRecord};
use crate::stage::RecipeSpec;

/// The layout of a study's manifest this tapmap writes.
pub const STUDY_MANIFEST_VERSION: u32 = 1;

/// A probe's or a border study's manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StudyManifest {
    /// `tapmap-probe` or `tapmap-borders`.
    pub format: String,
    /// [`STUDY_MANIFEST_VERSION`].
    pub manifest_version: u32,
    /// Always `tapmap`.
    pub tool: String,
    /// Version of the tapmap that wrote it.
    pub version: String,
    /// Conv strategy.
    pub engine: String,
    /// Input handling and stages, banks included whole.
    pub recipe: RecipeRecord,
    /// The job's own options (probe: top; borders: modes, tolerance, crop).
    pub options: serde_json::Value,
    /// The command line as given.
    pub command_line: Vec<String>,
    /// Start and end, RFC 3339 UTC.
    pub started: String,
    /// End.
    pub finished: String,
    /// Wall time in seconds.
    pub seconds: f64,
    /// Threads.
    pub threads: usize,
    /// The tables written, with their sizes.
    pub files: Vec<FileRecord>,
    /// Every input, in input order.
    pub inputs: Vec<StudyInput>,
}

/// One input of a study.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StudyInput {
    /// Relative path (`/`, odd bytes `\xNN`).
    pub path: String,
    /// SHA-256 of its bytes, when they could be read.
    pub sha256: Option<String>,
    /// `ok` or `failed`.
    pub status: String,
    /// Why it failed.
    pub error: Option<String>,
}

/// What a study records as it runs, then writes.
pub struct StudyRecord {
    format: &'static str,
    started: SystemTime,
    clock: Instant,
}

impl StudyRecord {
    /// Starts the clock of a study of `format` (`tapmap-probe`, `tapmap-borders`).
    pub fn start(format: &'static str) -> StudyRecord {
        StudyRecord {
            format,
            started: SystemTime::now(),
            clock: Instant::now(),
        }
    }

    /// Writes `dir/manifest.json` for the study: `tables` are the files it
    /// wrote (relative to `dir`), `inputs` each input's outcome in order.
    #[allow(clippy::too_many_arguments)]
    pub fn write(
        &self,
        dir: &Path,
        spec: &RecipeSpec,
        engine: crate::engine::Engine,
        options: serde_json::Value,
        command_line: &[String],
        threads: usize,
        tables: &[String],
        inputs: Vec<StudyInput>,
    ) -> Result<(), Error> {
        let mut files = Vec::new();
        for t in tables {
            let p = dir.join(t);
            if p.is_file() {
                let bytes = std::fs::metadata(&p).map_err(|e| Error::io(&p, e))?.len();
                files.push(FileRecord {
                    path: t.clone(),
                    bytes,
                    modified: None,
                });
            }
        }
        let m = StudyManifest {
            format: self.format.to_string(),
            manifest_version: STUDY_MANIFEST_VERSION,
            tool: "tapmap".into(),
            version: env!("CARGO_PKG_VERSION").into(),
            engine: engine.name().into(),
            recipe: recipe_record(spec),
            options,
            command_line: command_line.to_vec(),
            started: humantime::format_rfc3339_seconds(self.started).to_string(),
            finished: humantime::format_rfc3339_seconds(SystemTime::now()).to_string(),
            seconds: self.clock.elapsed().as_secs_f64(),
            threads,
            files,
            inputs,
        };
        let text = serde_json::to_string_pretty(&m).expect("typed records serialise") + "\n";
        let path = dir.join("manifest.json");
        write_atomic(&path, |w| std::io::Write::write_all(w, text.as_bytes()))
    }
}

/// Each input's outcome, in order: its digest when read, failed with its
/// message when it is in `failures`.
pub fn outcomes(
    items: &[InputItem],
    digests: Vec<Option<String>>,
    failures: &[(usize, Error)],
) -> Vec<StudyInput> {
    items
        .iter()
        .zip(digests)
        .enumerate()
        .map(|(i, (item, sha256))| {
            let error = failures
                .iter()
                .find(|(k, _)| *k == i)
                .map(|(_, e)| e.problem());
            StudyInput {
                path: item.rel_string(),
                sha256,
                status: if error.is_some() { "failed" } else { "ok" }.into(),
                error,
            }
        })
        .collect()
}
