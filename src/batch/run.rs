//! Running a recipe over many images.
//!
//! `jobs` worker threads take images from a shared counter, one at a time each, so
//! at most `jobs` images are in memory whatever the number of inputs. Each worker
//! decodes, runs the recipe and writes outputs; the conv engine inside spreads
//! each image's rows over the rayon pool, so one large image also uses every core.
//! Results are gathered by input index, so tables come out in input order
//! (sorted by relative path, then channel) whatever order the threads finish in.
//!
//! **Journal and resume.** Each input's finished result (its table rows and
//! manifest entry) is appended to `journal.jsonl` as soon as its files are in
//! place, tagged with a digest of everything that decides the outputs (tool
//! version, recipe with bank digests, outputs asked for, view and statistics
//! options, engine). `--resume` reuses a journal entry when the tag matches, the
//! input's SHA-256 is unchanged and every file it lists is there with its
//! recorded size; everything else is done again. At the end the journal is
//! rewritten to hold exactly this run's results, in table order.
//!
//! **Stopping.** When a stop is requested ([`stop_requested`], set by the command
//! line on SIGINT or SIGTERM), workers finish the images in flight, take no new
//! ones, and the tables and manifest are written for what is done.

use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, OnceLock};
use std::time::{Instant, SystemTime};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use ndarray::Array3;
use sha2::{Digest, Sha256};

use crate::batch::inputs::{expand_inputs, InputItem};
use crate::batch::shard::Shard;
use crate::batch::tables::{
    job_header, recipe_json, write_tables, Finished, ImageRecord, OutputFile, RunFacts, StatsRow,
    ViewRecord,
};
use crate::batch::{Save, ViewOptions};
use crate::engine::Engine;
use crate::error::Error;
use crate::io::read::{read_image, ColorMode, LoadedImage};
use crate::render::{colormap, sheet, view, write_png, write_view};
use crate::stage::recipefile::RecipeSpec;
use crate::stage::Stage;
use crate::stats::map_stats;

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
    /// Threshold for the `above_fraction` statistic.
    pub threshold: Option<f32>,
    /// Images in flight at once.
    pub jobs: usize,
    /// The command line, for the manifest.
    pub command_line: Vec<String>,
    /// Show a progress bar (it hides itself when stderr is not a terminal).
    pub progress: bool,
    /// Run only this part of the inputs, into its own subfolder of `out_dir`.
    pub shard: Option<Shard>,
    /// Reuse results of an earlier run of the same job (see the module header).
    pub resume: bool,
}

impl ApplyJob {
    /// The folder this run writes into: `out_dir`, or its shard subfolder.
    pub fn run_dir(&self) -> PathBuf {
        match self.shard {
            Some(s) => self.out_dir.join(s.folder()),
            None => self.out_dir.clone(),
        }
    }

    /// Digest of everything that decides an input's outputs; journal entries
    /// with another digest are never reused.
    pub fn digest(&self) -> String {
        let key = serde_json::json!({
            "version": env!("CARGO_PKG_VERSION"),
            "recipe": recipe_json(&self.spec),
            "save": self.save.to_string(),
            "view_range": self.view.range.map(|(a, b)| [a, b]),
            "view_depth16": self.view.depth16,
            "threshold": self.threshold,
            "engine": self.engine.name(),
        });
        hex(&Sha256::digest(key.to_string().as_bytes()))
    }
}

/// The journal of finished inputs, in the run's folder.
pub const JOURNAL: &str = "journal.jsonl";

/// One journal line.
#[derive(serde::Serialize, serde::Deserialize)]
struct JournalLine {
    job: String,
    done: Finished,
}

/// Reads the journal entries tagged `job`, by path (the last entry of a path
/// wins). Lines that do not parse, such as one cut short by a crash, are skipped.
pub fn read_journal(path: &Path, job: Option<&str>) -> Vec<Finished> {
    let Ok(text) = std::fs::read_to_string(path) else {
        return Vec::new();
    };
    let mut by_path: std::collections::BTreeMap<String, Finished> = Default::default();
    for line in text.lines() {
        if let Ok(l) = serde_json::from_str::<JournalLine>(line) {
            if job.map_or(true, |j| j == l.job) {
                by_path.insert(l.done.path.clone(), l.done);
            }
        }
    }
    by_path.into_values().collect()
}

fn journal_line(job: &str, done: &Finished) -> Result<String, Error> {
    let line = JournalLine {
        job: job.to_string(),
        done: done.clone(),
    };
    serde_json::to_string(&line)
        .map(|s| s + "\n")
        .map_err(|e| Error::Stage(format!("journal: {e}")))
}

/// The signal that asked the run to stop (0: none). Set from a signal handler.
pub fn stop_signal() -> &'static Arc<AtomicUsize> {
    static STOP: OnceLock<Arc<AtomicUsize>> = OnceLock::new();
    STOP.get_or_init(|| Arc::new(AtomicUsize::new(0)))
}

/// Whether a stop was requested.
pub fn stop_requested() -> bool {
    stop_signal().load(Ordering::SeqCst) != 0
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
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
    /// The folder the run wrote into.
    pub dir: PathBuf,
}

/// Checks that the recipe's first conv stage fits the colour mode, before any work.
pub fn check_channels(spec: &RecipeSpec) -> Result<(), Error> {
    let Some(conv) = spec.recipe.stages.iter().find_map(|s| match s {
        Stage::Conv(c) => Some(c),
        _ => None,
    }) else {
        return Ok(());
    };
    let (want, mode) = match spec.input.color {
        ColorMode::Rgb => (3, "rgb gives 3 channels (r, g, b)"),
        ColorMode::Luma => (1, "luma gives 1 channel"),
        ColorMode::Split => (1, "split runs one-plane kernels over each channel"),
    };
    if conv.bank.channels() != want {
        let hint = if conv.bank.channels() == 3 {
            "; use --color rgb"
        } else {
            ""
        };
        return Err(Error::Stage(format!(
            "bank '{}' has kernels with {} plane(s) but colour mode {mode}{hint}",
            conv.bank.name,
            conv.bank.channels()
        )));
    }
    Ok(())
}

/// Calls `f(index, item)` for every item on `jobs` worker threads that take items
/// from a shared counter one at a time, so at most `jobs` items are in flight.
/// Work inside `f` may use the rayon pool (the conv engine does); the workers are
/// not rayon threads, so they never pick up another item while waiting for it.
pub fn for_each_parallel<T: Sync>(items: &[T], jobs: usize, f: impl Fn(usize, &T) + Sync) {
    for_each_parallel_until(items, jobs, || false, f)
}

/// [`for_each_parallel`] that takes no new item once `stop()` is true.
pub fn for_each_parallel_until<T: Sync>(
    items: &[T],
    jobs: usize,
    stop: impl Fn() -> bool + Sync,
    f: impl Fn(usize, &T) + Sync,
) {
    let next = AtomicUsize::new(0);
    let workers = jobs.clamp(1, items.len().max(1));
    std::thread::scope(|scope| {
        for _ in 0..workers {
            scope.spawn(|| loop {
                if stop() {
                    break;
                }
                let i = next.fetch_add(1, Ordering::Relaxed);
                let Some(item) = items.get(i) else { break };
                f(i, item);
            });
        }
    });
}

/// Makes a name safe as one file-name component: letters, digits and `-_.@=+`
/// only, no leading dot and no `..` anywhere.
pub fn safe_name(name: &str) -> String {
    let mut prev = ' ';
    let s: String = name
        .chars()
        .map(|c| {
            let c = if (c.is_ascii_alphanumeric() || "-_.@=+".contains(c))
                && !(c == '.' && prev == '.')
            {
                c
            } else {
                '_'
            };
            prev = c;
            c
        })
        .collect();
    let s = s.trim_start_matches('.').to_string();
    if s.is_empty() {
        "map".into()
    } else {
        s
    }
}

fn sha256_file(path: &Path) -> Result<String, Error> {
    let mut f =
        std::fs::File::open(path).map_err(|e| crate::io::read::explain_open_error(path, e))?;
    let mut h = Sha256::new();
    let mut buf = vec![0u8; 1 << 16];
    loop {
        let n = f.read(&mut buf).map_err(|e| Error::io(path, e))?;
        if n == 0 {
            break;
        }
        h.update(&buf[..n]);
    }
    Ok(hex(&h.finalize()))
}

/// Runs the job. Set-up problems are `Err` before any image is read; a bad image
/// is recorded, reported through `on_error` and skipped.
pub fn run_apply(job: &ApplyJob, on_error: &(dyn Fn(&str) + Sync)) -> Result<Summary, Error> {
    check_channels(&job.spec)?;
    let mut items = expand_inputs(&job.inputs, &job.out_dir)?;
    if let Some(s) = job.shard {
        items.retain(|i| s.holds(&i.rel_string()));
    }
    run_items(job, items, on_error)
}

/// Removes temporary files (`.tapmap-*.part`) a killed run left in `dir`, without
/// entering other runs' shard folders.
fn remove_leftovers(dir: &Path) {
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

/// Whether an earlier result can stand for `item` (see the module header).
fn still_valid(prev: &Finished, item: &InputItem, dir: &Path) -> bool {
    prev.ok
        && item.problem.is_none()
        && prev.outputs.iter().all(|(p, bytes)| {
            std::fs::metadata(dir.join(p)).is_ok_and(|m| m.is_file() && m.len() == *bytes)
        })
        && prev.sha256.is_some()
        && sha256_file(&item.source).ok() == prev.sha256
}

/// Runs the job over inputs already listed (and sharded): what [`run_apply`] does
/// after listing.
pub fn run_items(
    job: &ApplyJob,
    items: Vec<InputItem>,
    on_error: &(dyn Fn(&str) + Sync),
) -> Result<Summary, Error> {
    let started = SystemTime::now();
    let clock = Instant::now();
    check_channels(&job.spec)?;
    let dir = job.run_dir();
    std::fs::create_dir_all(&dir).map_err(|e| Error::io(&dir, e))?;
    tempfile::Builder::new()
        .prefix(".tapmap-probe")
        .tempfile_in(&dir)
        .map(drop)
        .map_err(|e| Error::io(&dir, e))?;
    remove_leftovers(&dir);
    let key = job.digest();
    let journal_path = dir.join(JOURNAL);
    let earlier: std::collections::HashMap<String, Finished> = if job.resume {
        read_journal(&journal_path, Some(&key))
            .into_iter()
            .map(|f| (f.path.clone(), f))
            .collect()
    } else {
        Default::default()
    };
    let journal = Mutex::new(
        std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .truncate(false)
            .open(&journal_path)
            .map_err(|e| Error::io(&journal_path, e))?,
    );
    if !job.resume {
        journal
            .lock()
            .expect("not yet shared")
            .set_len(0)
            .map_err(|e| Error::io(&journal_path, e))?;
    }

    let bar = if job.progress {
        let b =
            ProgressBar::with_draw_target(Some(items.len() as u64), ProgressDrawTarget::stderr());
        b.set_style(
            ProgressStyle::with_template("{bar:30} {pos}/{len} images  {per_sec}  eta {eta}")
                .expect("valid template"),
        );
        b
    } else {
        ProgressBar::hidden()
    };
    let table = colormap::table();
    let results: Mutex<Vec<Option<Finished>>> = Mutex::new(vec![None; items.len()]);
    let resumed = AtomicUsize::new(0);
    let journal_error: Mutex<Option<Error>> = Mutex::new(None);
    for_each_parallel_until(&items, job.jobs, stop_requested, |i, item| {
        let path = item.rel_string();
        let done = match earlier.get(&path) {
            Some(prev) if still_valid(prev, item, &dir) => {
                resumed.fetch_add(1, Ordering::Relaxed);
                prev.clone()
            }
            _ => {
                let record = process(job, &dir, item, &table);
                if let Err(msg) = &record.status {
                    bar.suspend(|| on_error(&format!("{}: {msg}", item.source.display())));
                }
                let done = record.finish();
                let appended = journal_line(&key, &done).and_then(|line| {
                    let mut f = journal.lock().expect("no panics while holding the journal");
                    // One write per line: a crash leaves at most one cut-short last line.
                    f.write_all(line.as_bytes())
                        .map_err(|e| Error::io(&journal_path, e))
                });
                if let Err(e) = appended {
                    journal_error.lock().expect("no panics").get_or_insert(e);
                }
                done
            }
        };
        results
            .lock()
            .expect("no worker panics while holding the lock")[i] = Some(done);
        bar.inc(1);
    });
    bar.finish_and_clear();
    if let Some(e) = journal_error.into_inner().expect("workers done") {
        return Err(e);
    }
    let all = results.into_inner().expect("workers done");
    let not_run = all.iter().filter(|r| r.is_none()).count();
    let done: Vec<Finished> = all.into_iter().flatten().collect();
    let failed = done.iter().filter(|d| !d.ok).count();
    // The journal now holds exactly this run's results, in table order.
    let mut text = String::new();
    for d in &done {
        text.push_str(&journal_line(&key, d)?);
    }
    crate::io::atomic::write_atomic(&journal_path, |w| w.write_all(text.as_bytes()))?;

    let seconds = clock.elapsed().as_secs_f64();
    let mut header = job_header(job, &table, started, seconds);
    if let Some(s) = job.shard {
        header.insert("shard".into(), serde_json::json!(s.to_string()));
    }
    let facts = RunFacts {
        header,
        stats: job.save.stats,
        manifest: job.save.manifest,
    };
    let mut extra = serde_json::Map::new();
    let resumed = resumed.into_inner();
    if job.resume {
        extra.insert("resumed".into(), serde_json::json!(resumed));
    }
    let signal = stop_signal().load(Ordering::SeqCst);
    if not_run > 0 || signal != 0 {
        extra.insert(
            "interrupted".into(),
            serde_json::json!({"signal": signal, "not_run": not_run}),
        );
    }
    let files = write_tables(&dir, &facts, &done, extra)?;
    Ok(Summary {
        processed: done.len() - failed,
        failed,
        files: files + 1 + done.iter().map(|d| d.outputs.len()).sum::<usize>(),
        seconds: clock.elapsed().as_secs_f64(),
        resumed,
        not_run,
        dir,
    })
}

fn process(job: &ApplyJob, out: &Path, item: &InputItem, table: &[[u8; 3]]) -> ImageRecord {
    let mut rec = ImageRecord::new(item);
    let mut written: Vec<PathBuf> = Vec::new();
    let result = (|| -> Result<(), String> {
        if let Some(p) = &item.problem {
            return Err(p.clone());
        }
        rec.sha256 = Some(sha256_file(&item.source).map_err(|e| strip_path(e, &item.source))?);
        let img =
            read_image(&item.source, &job.spec.input).map_err(|e| strip_path(e, &item.source))?;
        rec.meta = Some(img.meta.clone());
        let recipe = job
            .spec
            .recipe_for(&img.channel_names)
            .map_err(|e| e.to_string())?;
        let (c, h, w) = img.data.dim();
        let need = recipe
            .peak_bytes(c, h, w, job.engine)
            .map_err(|e| e.to_string())?;
        if need > job.spec.input.max_memory {
            return Err(format!(
                "needs about {} to run the recipe on its {w}×{h} pixels, over --max-memory ({})",
                crate::io::read::bytes_text(need),
                crate::io::read::bytes_text(job.spec.input.max_memory)
            ));
        }
        let input_nonneg = vec![!img.meta.float; c];
        let names = recipe.channel_names(img.data.dim().0);
        let nonneg = recipe.non_negative_channels(input_nonneg);
        let maps = recipe
            .run(img.data.clone(), job.engine)
            .map_err(|e| e.to_string())?;
        let written_ok = write_outputs(
            job,
            out,
            item,
            &img,
            &maps,
            &names,
            &nonneg,
            table,
            &mut rec,
            &mut written,
        );
        // The maps' memory serves this worker's next image.
        crate::engine::recycle(maps);
        written_ok
    })();
    if let Err(msg) = result {
        // Outputs of a failed image are removed, so no image is half there.
        for p in &written {
            let _ = std::fs::remove_file(p);
        }
        rec.outputs.clear();
        rec.stats.clear();
        rec.views.clear();
        rec.status = Err(msg);
    }
    rec
}

/// The message of an error about `path`, without repeating the path.
fn strip_path(e: Error, path: &Path) -> String {
    match e {
        Error::Image { message, .. } => message,
        Error::Io { source, .. } => source.to_string(),
        other => other
            .to_string()
            .replace(&format!("{}: ", path.display()), ""),
    }
}

#[allow(clippy::too_many_arguments)]
fn write_outputs(
    job: &ApplyJob,
    out: &Path,
    item: &InputItem,
    img: &LoadedImage,
    maps: &Array3<f32>,
    names: &[String],
    nonneg: &[bool],
    table: &[[u8; 3]],
    rec: &mut ImageRecord,
    written: &mut Vec<PathBuf>,
) -> Result<(), String> {
    let (c, h, w) = maps.dim();
    let stem = item.stem_path();
    let mut record = |path: PathBuf, rec: &mut ImageRecord| -> Result<(), String> {
        let bytes = std::fs::metadata(&path)
            .map_err(|e| format!("{}: {e}", path.display()))?
            .len();
        let rel = path.strip_prefix(out).unwrap_or(&path).to_path_buf();
        written.push(path);
        rec.outputs.push(OutputFile { path: rel, bytes });
        Ok(())
    };
    let ensure_dir = |p: &Path| -> Result<(), String> {
        let d = p.parent().unwrap_or(out);
        std::fs::create_dir_all(d).map_err(|e| format!("cannot make folder {}: {e}", d.display()))
    };
    let standard = maps.as_standard_layout();
    let data = standard.as_slice().expect("standard layout");
    let plane = |k: usize| &data[k * h * w..(k + 1) * h * w];
    let file_of = |k: usize, ext: &str| format!("{k:02}-{}.{ext}", safe_name(&names[k]));

    if job.save.maps {
        let p = item.output_file(&out.join("maps"), "npy");
        ensure_dir(&p)?;
        crate::io::npy::write_npy(&p, maps).map_err(|e| e.to_string())?;
        record(p, rec)?;
    }
    if job.save.tiff {
        for k in 0..c {
            let p = out.join("tiff").join(&stem).join(file_of(k, "tif"));
            ensure_dir(&p)?;
            crate::io::tiff::write_f32_tiff(&p, plane(k), w, h).map_err(|e| e.to_string())?;
            record(p, rec)?;
        }
    }
    let mut scratch = Vec::new();
    if job.save.stats {
        for (k, name) in names.iter().enumerate().take(c) {
            rec.stats.push(StatsRow {
                channel: k,
                name: name.clone(),
                width: w,
                height: h,
                stats: map_stats(plane(k), job.threshold, &mut scratch),
            });
        }
    }
    if job.save.views || job.save.sheets {
        let mut cells = Vec::new();
        if job.save.sheets {
            cells.push(("source".to_string(), crate::render::input_picture(img)));
        }
        for k in 0..c {
            let m = view::mapping(plane(k), !nonneg[k], job.view.range, job.view.depth16);
            let pic = view::render(plane(k), h, w, &m, table);
            if job.save.views {
                let p = out.join("views").join(&stem).join(file_of(k, "png"));
                ensure_dir(&p)?;
                write_view(&p, &pic).map_err(|e| e.to_string())?;
                rec.views.push(ViewRecord {
                    channel: k,
                    name: names[k].clone(),
                    file: p.strip_prefix(out).unwrap_or(&p).to_path_buf(),
                    mapping: m.clone(),
                });
                record(p, rec)?;
            }
            if job.save.sheets {
                cells.push((
                    format!("{} [{}, {}]", names[k], sig3(m.lo), sig3(m.hi)),
                    pic.to_rgb8(),
                ));
            }
        }
        if job.save.sheets {
            let s = sheet::sheet(&item.rel_string(), &cells);
            let p = item.output_file(&out.join("sheets"), "png");
            ensure_dir(&p)?;
            write_png(
                &p,
                s.as_raw(),
                s.width(),
                s.height(),
                image::ExtendedColorType::Rgb8,
            )
            .map_err(|e| e.to_string())?;
            record(p, rec)?;
        }
    }
    Ok(())
}

/// A value with about three significant digits, for sheet labels.
fn sig3(v: f64) -> String {
    let a = v.abs();
    if a == 0.0 || !a.is_finite() {
        format!("{v}")
    } else if (1e-3..1e4).contains(&a) {
        let decimals = (2 - a.log10().floor() as i32).max(0) as usize;
        format!("{v:.decimals$}")
    } else {
        format!("{v:.2e}")
    }
}
