//! One `apply` run's hold on its folder, shared by the batch and the follower:
//! set-up (folder, lock, leftovers, the earlier run's records and journal)
//! before the first image, and the end (journal rewritten in table order,
//! tables, manifest, clean-up) after the last.

use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::time::{Instant, SystemTime};

use crate::digest::sha256_hex;
use crate::error::Error;
use crate::jobs::inputs::InputItem;
use crate::jobs::manifest::{
    write_manifest, FileRecord, FollowRecord, Interrupted, ListRecord, Manifest, SummaryRecord,
    MANIFEST_FORMAT, MANIFEST_VERSION,
};
use crate::jobs::tables::{write_tables, Finished};
use crate::jobs::{make_out_dir, OutLock};
use crate::pipeline::PlanCache;
use crate::render::colormap;
use crate::stage::RecipeSpec;

use super::journal::{read_journal, Journal};
use super::outputs::ImageContext;
use super::{earlier, ApplyJob, Summary, JOURNAL};

/// A run holding its folder (see the module header).
pub(crate) struct Session<'j> {
    pub job: &'j ApplyJob,
    pub dir: PathBuf,
    _lock: OutLock,
    recorded: BTreeSet<String>,
    /// Results of an earlier run of the same job, by input path (resume).
    pub earlier: HashMap<String, Finished>,
    pub journal: Journal,
    table: Vec<[u8; 3]>,
    cyclic_table: Vec<[u8; 3]>,
    plans: PlanCache,
    warnings: Mutex<BTreeSet<String>>,
    started: SystemTime,
    clock: Instant,
    resume: bool,
}

/// How a run ended, beside its results.
pub(crate) struct Ending {
    pub listed: Option<ListRecord>,
    pub resumed: usize,
    pub not_run: usize,
    /// The signal that stopped it, when that was not its normal end.
    pub signal: Option<i32>,
    pub follow: Option<FollowRecord>,
}

impl<'j> Session<'j> {
    /// Takes the run folder: checks the job, makes the folder, checks that it
    /// can be written, takes its lock, removes what a killed run left half
    /// written and (unless `resume`) everything an earlier run recorded;
    /// with `resume` reads the earlier journal entries of the same job.
    pub fn open(job: &'j ApplyJob, resume: bool) -> Result<Session<'j>, Error> {
        let started = SystemTime::now();
        let clock = Instant::now();
        job.check()?;
        let dir = job.run_dir();
        make_out_dir(&dir)?;
        tempfile::Builder::new()
            .prefix(".tapmap-probe")
            .tempfile_in(&dir)
            .map(drop)
            .map_err(|e| Error::io(&dir, e))?;
        let lock = OutLock::take(&dir)?;
        earlier::remove_leftovers(&dir);
        let recorded = earlier::recorded_files(&dir);
        if !resume {
            earlier::remove_recorded(&dir, &recorded);
        }
        let key = job.digest();
        let earlier: HashMap<String, Finished> = if resume {
            read_journal(&dir.join(JOURNAL), Some(&key))?
                .into_iter()
                .map(|f| (f.path().to_string(), f))
                .collect()
        } else {
            HashMap::new()
        };
        let journal = Journal::open(&dir, &key, resume)?;
        Ok(Session {
            job,
            dir,
            _lock: lock,
            recorded,
            earlier,
            journal,
            table: colormap::table(),
            cyclic_table: colormap::cyclic_table(),
            plans: PlanCache::default(),
            warnings: Mutex::new(BTreeSet::new()),
            started,
            clock,
            resume,
        })
    }

    /// What every input of the run shares.
    pub fn context(&self) -> ImageContext<'_> {
        let job = self.job;
        ImageContext {
            spec: &job.spec,
            engine: job.engine,
            save: job.save,
            view: job.view,
            threshold: job.threshold,
            connectivity: job.connectivity,
            inset: job.inset,
            dir: &self.dir,
            table: &self.table,
            cyclic_table: &self.cyclic_table,
            plans: &self.plans,
            warnings: &self.warnings,
        }
    }

    /// The earlier result for `item`, when it can stand (see [`still_valid`]).
    pub fn reusable(&self, item: &InputItem) -> Option<&Finished> {
        self.earlier
            .get(&item.rel_string())
            .filter(|prev| still_valid(prev, item, &self.dir, &self.job.spec))
    }

    /// Ends the run: the journal rewritten to hold exactly `done` (in table
    /// order), the tables and manifest written, and (resume) what the earlier
    /// records list and `done` no longer does removed.
    pub fn finish(self, done: Vec<Finished>, end: Ending) -> Summary {
        let job = self.job;
        let dir = &self.dir;
        let failed = done.iter().filter(|d| !d.ok()).count();
        let summary = SummaryRecord {
            inputs: done.len(),
            processed: done.len() - failed,
            failed,
        };
        // Every image's files and journal entry are in place: a failure from
        // here on (a full disk) loses no result, and `--resume` writes the
        // tables.
        let write = || -> Result<Vec<FileRecord>, Error> {
            self.journal.rewrite(&done)?;
            let mut files = write_tables(dir, &done, job.save.stats)?;
            if job.save.manifest {
                let manifest = Manifest {
                    format: MANIFEST_FORMAT.into(),
                    manifest_version: MANIFEST_VERSION,
                    tool: "tapmap".into(),
                    version: env!("CARGO_PKG_VERSION").into(),
                    job: job.record(),
                    command_line: job.command_line.clone(),
                    started: Some(humantime::format_rfc3339_seconds(self.started).to_string()),
                    finished: Some(
                        humantime::format_rfc3339_seconds(SystemTime::now()).to_string(),
                    ),
                    seconds: Some(self.clock.elapsed().as_secs_f64()),
                    threads: Some(job.jobs),
                    summary,
                    listed: end.listed.clone(),
                    shard: job.shard.map(|s| s.to_string()),
                    resumed: self.resume.then_some(end.resumed),
                    interrupted: (end.not_run > 0 || end.signal.is_some()).then_some(Interrupted {
                        signal: end.signal.unwrap_or(0),
                        not_run: end.not_run,
                    }),
                    shards: None,
                    follow: end.follow.clone(),
                    files: files.clone(),
                    inputs: done.iter().map(|d| d.entry.clone()).collect(),
                };
                let bytes = write_manifest(&dir.join("manifest.json"), &manifest)?;
                files.push(FileRecord {
                    path: "manifest.json".into(),
                    bytes,
                    modified: None,
                });
            }
            Ok(files)
        };
        let (files, tables_error) = match write() {
            Ok(f) => (f, None),
            Err(e) => (Vec::new(), Some(e.to_string())),
        };
        if self.resume && tables_error.is_none() {
            // What the earlier records list and this run's results do not.
            let now: BTreeSet<&String> = files
                .iter()
                .chain(done.iter().flat_map(|d| d.entry.outputs.iter()))
                .map(|f| &f.path)
                .collect();
            earlier::remove_recorded(dir, self.recorded.iter().filter(|f| !now.contains(f)));
        }
        Summary {
            processed: summary.processed,
            failed,
            files: files.len() + 1 + done.iter().map(|d| d.entry.outputs.len()).sum::<usize>(),
            seconds: self.clock.elapsed().as_secs_f64(),
            resumed: end.resumed,
            not_run: end.not_run,
            stopped_by: end.signal,
            tables_error,
            warnings: self
                .warnings
                .into_inner()
                .unwrap_or_else(|p| p.into_inner())
                .into_iter()
                .collect(),
            follow: end.follow,
            dir: self.dir,
        }
    }
}

/// Whether an earlier result can stand for `item` (see the module header of
/// [`super`]): it succeeded, every file it lists is there with its recorded
/// size and modification time, and the input's bytes have the recorded digest.
pub(crate) fn still_valid(
    prev: &Finished,
    item: &InputItem,
    dir: &Path,
    spec: &RecipeSpec,
) -> bool {
    prev.ok()
        && item.problem.is_none()
        && prev
            .entry
            .outputs
            .iter()
            .all(|o| o.still(&dir.join(o.path_buf())))
        && prev.image.sha256.is_some()
        && crate::image_io::read_input(&item.source, &spec.input.limits)
            .ok()
            .map(|b| sha256_hex(&b))
            == prev.image.sha256
}
