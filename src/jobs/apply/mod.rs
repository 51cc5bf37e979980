//! The `apply` job: a recipe over many images.
//!
//! `jobs` worker threads take images from a shared counter, one at a time each,
//! so at most `jobs` images are in memory whatever the number of inputs. Each
//! worker reads an input once, decodes it, runs the plan for its shape (made
//! once per shape and reused, [`crate::pipeline::Plan`]) and writes its
//! outputs; the engine inside spreads each image's rows over the job's own
//! thread pool, so one large image also uses every core. Results are gathered
//! by input index, so tables come out in input order (sorted by relative path,
//! then channel) whatever order the threads finish in.
//!
//! **Journal and resume.** Each input's finished result (its table rows and
//! manifest entry) is appended to `journal.jsonl` ([`journal`]) as soon as its
//! files are in place, tagged with a digest of everything that decides the
//! outputs ([`ApplyJob::digest`]). `--resume` reuses a journal entry when the
//! tag matches, the input's SHA-256 is unchanged and every file it lists is
//! there with its recorded size; everything else is done again. At the end the
//! journal is rewritten to hold exactly this run's results, in table order.
//!
//! **Stopping.** When a stop is requested ([`ApplyJob::stop`], set by the
//! command line on SIGINT or SIGTERM), workers finish the images in flight,
//! take no new ones, and the tables and manifest are written for what is done.

mod earlier;
pub mod journal;
pub(crate) mod outputs;
pub(crate) mod session;

use std::path::PathBuf;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use crate::digest::sha256_hex;
use crate::engine::Engine;
use crate::error::Error;
use crate::jobs::inputs::{expand_inputs, list_digest, InputItem};
use crate::jobs::manifest::{recipe_record, views_record, FollowRecord, JobRecord, ListRecord};
use crate::jobs::shard::Shard;
use crate::jobs::tables::Finished;
use crate::jobs::{for_each_parallel, thread_pool, Observer, Save, Stop, ViewOptions};
use crate::regions::{Connectivity, Threshold};
use crate::stage::RecipeSpec;

pub use journal::{read_journal, JOURNAL};
use outputs::process;
use session::{Ending, Session};

/// Everything an `apply` run needs, checked before any image is read.
#[derive(Debug, Clone)]
pub struct ApplyJob {
    /// Input handling and stages.
    pub spec: RecipeSpec,
    /// Conv strategy.
    pub engine: Engine,
    /// Output folder.
    pub out_dir: PathBuf,
    /// Files, folders and patterns as given.
    pub inputs: Vec<PathBuf>,
    /// What to write.
    pub save: Save,
    /// How to draw views.
    pub view: ViewOptions,
    /// Threshold of the `above_fraction` statistic and the edge measures
    /// (components and the largest one) in `stats.csv`.
    pub threshold: Option<Threshold>,
    /// Which neighbours join pixels into one component.
    pub connectivity: Connectivity,
    /// Rows and columns at each side of a map left out of the components.
    pub inset: usize,
    /// Threads of the job's pool, and images in flight at once.
    pub jobs: usize,
    /// The command line, for the manifest.
    pub command_line: Vec<String>,
    /// Run only this part of the inputs, into its own subfolder of `out_dir`.
    pub shard: Option<Shard>,
    /// Reuse results of an earlier run of the same job (see the module header).
    pub resume: bool,
    /// Asked to stop: finish what is in flight, write the tables, return.
    pub stop: Stop,
}

/// What a finished run did.
#[derive(Debug, Clone, PartialEq)]
pub struct Summary {
    /// Inputs processed without error.
    pub processed: usize,
    /// Inputs that failed.
    pub failed: usize,
    /// Files written (maps, views, sheets, TIFFs, tables, manifest).
    pub files: usize,
    /// Wall time in seconds.
    pub seconds: f64,
    /// Inputs whose results were taken over from an earlier run (`--resume`).
    pub resumed: usize,
    /// Inputs not started because a stop was requested.
    pub not_run: usize,
    /// The signal that stopped the run, if one did.
    pub stopped_by: Option<i32>,
    /// Why the tables or manifest could not be written at the end, if they
    /// could not (every image's files and journal entry are in place; a run
    /// with `--resume` writes them).
    pub tables_error: Option<String>,
    /// Things the run did otherwise than its options may suggest, each once.
    pub warnings: Vec<String>,
    /// With `--follow`: what arrived and how fast it was done.
    pub follow: Option<FollowRecord>,
    /// The folder the run wrote into.
    pub dir: PathBuf,
}

impl ApplyJob {
    /// A job with the default outputs, views and options, one thread per core.
    pub fn new(spec: RecipeSpec, out_dir: impl Into<PathBuf>, inputs: Vec<PathBuf>) -> Self {
        ApplyJob {
            spec,
            engine: Engine::Auto,
            out_dir: out_dir.into(),
            inputs,
            save: Save::default(),
            view: ViewOptions::default(),
            threshold: None,
            connectivity: Connectivity::Eight,
            inset: 0,
            jobs: std::thread::available_parallelism().map_or(1, |n| n.get()),
            command_line: Vec::new(),
            shard: None,
            resume: false,
            stop: Stop::new(),
        }
    }

    /// Checks what can be checked before any input is listed: the recipe,
    /// and option values (a threshold must be a finite number).
    pub fn check(&self) -> Result<(), Error> {
        self.spec.validate()?;
        if self
            .threshold
            .and_then(Threshold::value)
            .is_some_and(|t| !t.is_finite())
        {
            return Err(Error::usage("the threshold must be a finite number"));
        }
        Ok(())
    }

    /// The folder this run writes into: `out_dir`, or its shard subfolder.
    pub fn run_dir(&self) -> PathBuf {
        match self.shard {
            Some(s) => self.out_dir.join(s.folder()),
            None => self.out_dir.clone(),
        }
    }

    /// What decides the outputs, as the manifest records it.
    pub fn record(&self) -> JobRecord {
        JobRecord {
            engine: self.engine.name().into(),
            recipe: recipe_record(&self.spec),
            save: self.save.to_string(),
            threshold: self.threshold,
            connectivity: self.connectivity,
            inset: self.inset,
            views: views_record(self.view.range, self.view.png),
        }
    }

    /// Digest of everything that decides an input's outputs: tool version, the
    /// job record (recipe with bank texts and digests, outputs, threshold, view
    /// rules, engine) and the view depth. Journal entries with another digest
    /// are never reused.
    pub fn digest(&self) -> String {
        let key = serde_json::json!({
            "version": env!("CARGO_PKG_VERSION"),
            "job": self.record(),
            "view_depth16": self.view.depth16,
        });
        sha256_hex(key.to_string().as_bytes())
    }
}

/// Runs the job. Set-up problems are `Err` before any image is read; a bad
/// image is recorded, reported to `obs` and skipped.
pub fn run_apply(job: &ApplyJob, obs: &dyn Observer) -> Result<Summary, Error> {
    job.check()?;
    let mut items = expand_inputs(&job.inputs, &job.out_dir)?;
    let listed = list_record(&items);
    if let Some(s) = job.shard {
        items.retain(|i| s.holds(&i.rel_string()));
    }
    run_listed(job, items, listed, obs)
}

pub(crate) fn list_record(items: &[InputItem]) -> ListRecord {
    ListRecord {
        count: items.len(),
        sha256: list_digest(items),
    }
}

/// Runs the job over inputs already listed (and sharded): what [`run_apply`] does
/// after listing. The manifest's `listed` record is made from `items`.
pub fn run_items(
    job: &ApplyJob,
    items: Vec<InputItem>,
    obs: &dyn Observer,
) -> Result<Summary, Error> {
    let listed = list_record(&items);
    run_listed(job, items, listed, obs)
}

fn run_listed(
    job: &ApplyJob,
    items: Vec<InputItem>,
    listed: ListRecord,
    obs: &dyn Observer,
) -> Result<Summary, Error> {
    let pool = thread_pool(job.jobs)?;
    let run = Session::open(job, job.resume)?;
    let cx = run.context();
    obs.begin(items.len());
    let results: Mutex<Vec<Option<Finished>>> = Mutex::new(vec![None; items.len()]);
    let resumed = AtomicUsize::new(0);
    let journal_error: Mutex<Option<Error>> = Mutex::new(None);
    for_each_parallel(&items, job.jobs, &job.stop, |i, item| {
        let done = match run.reusable(item) {
            Some(prev) => {
                resumed.fetch_add(1, Ordering::Relaxed);
                prev.clone()
            }
            None => {
                let done = pool.install(|| process(&cx, item));
                if let Some(problem) = &done.image.error {
                    obs.input_failed(&Error::decode(&item.source, problem.clone()));
                }
                if let Err(e) = run.journal.append(&done) {
                    journal_error
                        .lock()
                        .unwrap_or_else(|p| p.into_inner())
                        .get_or_insert(e);
                }
                done
            }
        };
        results.lock().unwrap_or_else(|p| p.into_inner())[i] = Some(done);
        obs.advance();
    });
    obs.end();
    if let Some(e) = journal_error
        .into_inner()
        .unwrap_or_else(|p| p.into_inner())
    {
        return Err(e);
    }
    let all = results.into_inner().unwrap_or_else(|p| p.into_inner());
    let not_run = all.iter().filter(|r| r.is_none()).count();
    let done: Vec<Finished> = all.into_iter().flatten().collect();
    let ending = Ending {
        listed: Some(listed),
        resumed: resumed.into_inner(),
        not_run,
        signal: job.stop.requested(),
        follow: None,
    };
    Ok(run.finish(done, ending))
}
