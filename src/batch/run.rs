//! Running a recipe over many images.
//!
//! `jobs` worker threads take images from a shared counter, one at a time each, so
//! at most `jobs` images are in memory whatever the number of inputs. Each worker
//! decodes, runs the recipe and writes outputs; the conv engine inside spreads
//! each image's rows over the rayon pool, so one large image also uses every core.
//! Results are gathered by input index, so tables come out in input order
//! (sorted by relative path, then channel) whatever order the threads finish in.

use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::{Instant, SystemTime};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use ndarray::Array3;
use sha2::{Digest, Sha256};

use crate::batch::inputs::{expand_inputs, InputItem};
use crate::batch::tables::{write_tables, ImageRecord, OutputFile, StatsRow, ViewRecord};
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
    let next = AtomicUsize::new(0);
    let workers = jobs.clamp(1, items.len().max(1));
    std::thread::scope(|scope| {
        for _ in 0..workers {
            scope.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                let Some(item) = items.get(i) else { break };
                f(i, item);
            });
        }
    });
}

/// Makes a name safe as one file-name component.
pub fn safe_name(name: &str) -> String {
    let s: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || "-_.@=+".contains(c) {
                c
            } else {
                '_'
            }
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
    let mut f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut h = Sha256::new();
    let mut buf = vec![0u8; 1 << 16];
    loop {
        let n = f.read(&mut buf).map_err(|e| Error::io(path, e))?;
        if n == 0 {
            break;
        }
        h.update(&buf[..n]);
    }
    Ok(h.finalize().iter().map(|b| format!("{b:02x}")).collect())
}

/// Runs the job. Set-up problems are `Err` before any image is read; a bad image
/// is recorded, reported through `on_error` and skipped.
pub fn run_apply(job: &ApplyJob, on_error: &(dyn Fn(&str) + Sync)) -> Result<Summary, Error> {
    let started = SystemTime::now();
    let clock = Instant::now();
    check_channels(&job.spec)?;
    let items = expand_inputs(&job.inputs, &job.out_dir)?;
    std::fs::create_dir_all(&job.out_dir).map_err(|e| Error::io(&job.out_dir, e))?;
    tempfile::Builder::new()
        .prefix(".tapmap-probe")
        .tempfile_in(&job.out_dir)
        .map(drop)
        .map_err(|e| Error::io(&job.out_dir, e))?;

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
    let results: Mutex<Vec<Option<ImageRecord>>> = Mutex::new(vec![None; items.len()]);
    for_each_parallel(&items, job.jobs, |i, item| {
        let record = process(job, item, &table);
        if let Err(msg) = &record.status {
            bar.suspend(|| on_error(&format!("{}: {msg}", item.source.display())));
        }
        results
            .lock()
            .expect("no worker panics while holding the lock")[i] = Some(record);
        bar.inc(1);
    });
    bar.finish_and_clear();
    let records: Vec<ImageRecord> = results
        .into_inner()
        .expect("workers done")
        .into_iter()
        .map(|r| r.expect("every input processed"))
        .collect();
    let failed = records.iter().filter(|r| r.status.is_err()).count();
    let files = write_tables(
        job,
        &records,
        &table,
        started,
        clock.elapsed().as_secs_f64(),
    )?;
    Ok(Summary {
        processed: records.len() - failed,
        failed,
        files: files + records.iter().map(|r| r.outputs.len()).sum::<usize>(),
        seconds: clock.elapsed().as_secs_f64(),
    })
}

fn process(job: &ApplyJob, item: &InputItem, table: &[[u8; 3]]) -> ImageRecord {
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
        let input_nonneg = vec![!img.meta.float; img.data.dim().0];
        let names = recipe.channel_names(img.data.dim().0);
        let nonneg = recipe.non_negative_channels(input_nonneg);
        let maps = recipe
            .run(img.data.clone(), job.engine)
            .map_err(|e| e.to_string())?;
        write_outputs(
            job,
            item,
            &img,
            &maps,
            &names,
            &nonneg,
            table,
            &mut rec,
            &mut written,
        )
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
    let out = &job.out_dir;
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
        let p = out.join("maps").join(&stem).with_extension("npy");
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
            let p = out.join("sheets").join(&stem).with_extension("png");
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
