//! The `borders` job: the border study over many images, with its tables,
//! views and plots (see the module above for what is measured).
//!
//! Writes under `out`: `borders.csv` (error by distance from the edge),
//! `bands.csv` (measured and predicted band per edge), `summary.csv` (per image
//! and mode), `views/P/NN-channel/MODE.png`, `plots/P.png` and `plot.png`
//! (all images).

use std::path::PathBuf;
use std::sync::Mutex;

use crate::border::PadMode;
use crate::engine::Engine;
use crate::error::Error;
use crate::jobs::borders::output as bo;
use crate::jobs::borders::study;
use crate::jobs::inputs::{expand_inputs, InputItem};
use crate::jobs::tables::{number, optional_number, write_csv};
use crate::jobs::{for_each_parallel, thread_pool, Observer, Stop};
use crate::stage::RecipeSpec;

/// Column names of `borders.csv` (schema `shared/schemas/borders.csv.json`).
pub const BORDERS_COLUMNS: [&str; 9] = [
    "path", "study", "channel", "name", "mode", "distance", "mean_abs", "max_abs", "pixels",
];
/// Column names of `bands.csv` (schema `shared/schemas/bands.csv.json`).
pub const BANDS_COLUMNS: [&str; 6] = ["path", "channel", "name", "edge", "band", "predicted"];
/// Column names of `summary.csv` (schema `shared/schemas/summary.csv.json`).
pub const SUMMARY_COLUMNS: [&str; 8] = [
    "path",
    "mode",
    "band",
    "mean_dev",
    "max_dev",
    "crop_mean",
    "crop_max",
    "best",
];

/// Everything a border study needs.
#[derive(Debug, Clone)]
pub struct BordersJob {
    /// Input handling and stages.
    pub spec: RecipeSpec,
    /// Conv strategy.
    pub engine: Engine,
    /// Pad modes to compare (at least two, distinct).
    pub modes: Vec<PadMode>,
    /// Two results agree when they differ by at most this.
    pub tolerance: f32,
    /// With `Some(n)`: the crop study with a window `n` pixels in from every side.
    pub crop: Option<usize>,
    /// Output folder.
    pub out_dir: PathBuf,
    /// Files, folders and patterns as given.
    pub inputs: Vec<PathBuf>,
    /// Threads of the job's pool.
    pub jobs: usize,
    /// Asked to stop: finish the image in hand, write the tables, return.
    pub stop: Stop,
    /// The command line, for the manifest.
    pub command_line: Vec<String>,
}

/// What a study did.
#[derive(Debug, Clone, PartialEq)]
pub struct BordersSummary {
    /// Images studied.
    pub studied: usize,
    /// Images that failed.
    pub failed: usize,
}

/// Runs the study; each image's table goes to `obs.report`.
pub fn run_borders(job: &BordersJob, obs: &dyn Observer) -> Result<BordersSummary, Error> {
    job.spec.validate()?;
    if job.modes.len() < 2 {
        return Err(Error::usage("give at least two pad modes to compare"));
    }
    if !job.tolerance.is_finite() || job.tolerance < 0.0 {
        return Err(Error::usage("--tolerance must be a number ≥ 0"));
    }
    let items = expand_inputs(&job.inputs, &job.out_dir)?;
    let pool = thread_pool(job.jobs)?;
    crate::jobs::make_out_dir(&job.out_dir)?;
    let _lock = crate::jobs::OutLock::take(&job.out_dir)?;
    let out = &job.out_dir;
    obs.begin(items.len());
    // Images in flight at once, each its rows, curves and table; gathered by
    // index, so the tables come out in input order whatever finishes first.
    let results: Mutex<Vec<Option<Result<ImageResult, Error>>>> =
        Mutex::new((0..items.len()).map(|_| None).collect());
    let record = crate::jobs::study::StudyRecord::start("tapmap-borders");
    let digests: Mutex<Vec<Option<String>>> = Mutex::new(vec![None; items.len()]);
    for_each_parallel(&items, job.jobs, &job.stop, |i, item| {
        let mut sha = None;
        let r = pool.install(|| one_image(job, item, &mut sha));
        digests.lock().unwrap_or_else(|p| p.into_inner())[i] = sha;
        match &r {
            Ok(done) => obs.report(&done.text),
            Err(e) => obs.input_failed(e),
        }
        results.lock().unwrap_or_else(|p| p.into_inner())[i] = Some(r);
        obs.advance();
    });
    obs.end();
    let (mut rows, mut bands, mut summary_rows) = (Vec::new(), Vec::new(), Vec::new());
    let mut all_curves: Vec<(PadMode, Vec<f64>, usize)> = Vec::new();
    let (mut ok, mut failed) = (0, 0);
    let mut failures = Vec::new();
    for (i, r) in results
        .into_inner()
        .unwrap_or_else(|p| p.into_inner())
        .into_iter()
        .enumerate()
    {
        let done = match r {
            Some(Ok(done)) => done,
            Some(Err(e)) => {
                failed += 1;
                failures.push((i, e));
                continue;
            }
            None => continue,
        };
        ok += 1;
        rows.extend(done.rows);
        bands.extend(done.bands);
        summary_rows.extend(done.summary);
        for (m, pts) in done.curves {
            match all_curves.iter_mut().find(|(mm, _, _)| *mm == m) {
                Some((_, acc, n)) => {
                    if acc.len() < pts.len() {
                        acc.resize(pts.len(), 0.0);
                    }
                    for (a, p) in acc.iter_mut().zip(&pts) {
                        *a += p;
                    }
                    *n += 1;
                }
                None => all_curves.push((m, pts, 1)),
            }
        }
    }
    write_csv(&out.join("borders.csv"), &BORDERS_COLUMNS, rows)?;
    write_csv(&out.join("bands.csv"), &BANDS_COLUMNS, bands)?;
    write_csv(&out.join("summary.csv"), &SUMMARY_COLUMNS, summary_rows)?;
    if !all_curves.is_empty() {
        let curves: Vec<(PadMode, Vec<f64>)> = all_curves
            .into_iter()
            .map(|(m, acc, n)| (m, acc.into_iter().map(|v| v / n as f64).collect()))
            .collect();
        let what = if job.crop.is_some() {
            "all images: error against the real surroundings"
        } else {
            "all images: deviation from the median of all modes"
        };
        bo::write_plot(
            &out.join("plot.png"),
            what,
            "mean |error| (response units)",
            &curves,
        )?;
    }
    let digests = digests.into_inner().unwrap_or_else(|p| p.into_inner());
    let inputs = crate::jobs::study::outcomes(&items, digests, &failures);
    let tables: Vec<String> = ["borders.csv", "bands.csv", "summary.csv", "plot.png"]
        .map(String::from)
        .to_vec();
    record.write(
        out,
        &job.spec,
        job.engine,
        serde_json::json!({
            "modes": job.modes.iter().map(|m| m.name()).collect::<Vec<_>>(),
            "tolerance": job.tolerance,
            "crop": job.crop,
        }),
        &job.command_line,
        job.jobs,
        &tables,
        inputs,
    )?;
    Ok(BordersSummary {
        studied: ok,
        failed,
    })
}

/// What one image of a study gives.
struct ImageResult {
    text: String,
    rows: Vec<Vec<String>>,
    bands: Vec<Vec<String>>,
    summary: Vec<Vec<String>>,
    curves: Vec<(PadMode, Vec<f64>)>,
}

/// Studies one image and writes its views and plot.
fn one_image(
    job: &BordersJob,
    item: &InputItem,
    sha: &mut Option<String>,
) -> Result<ImageResult, Error> {
    let out = &job.out_dir;
    let path = item.rel_string();
    let (digest, img) = crate::jobs::inputs::read_with_digest(item, &job.spec.input);
    *sha = digest;
    let img = img?;
    let recipe = job.spec.recipe_for(&img.channel_names)?;
    let names = recipe.channel_names(img.data.dim().0);
    let (_, h, w) = img.data.dim();
    let need = ((img.data.len() as u64) * 4).saturating_add(
        crate::jobs::borders::study_bytes(
            &recipe,
            img.data.dim(),
            job.modes.len(),
            job.crop.is_some(),
            job.engine,
        )
        .map_err(|e| e.in_file(&item.source))?,
    );
    job.spec
        .input
        .limits
        .check_memory(
            need,
            &format!(
                "to study {} pad modes on its {w}×{h} pixels",
                job.modes.len()
            ),
        )
        .map_err(|e| e.in_file(&item.source))?;
    let st = study(
        &recipe,
        img.data.view(),
        &names,
        &job.modes,
        job.tolerance,
        job.crop,
        job.engine,
    )
    .map_err(|e| e.in_file(&item.source))?;
    let summary = bo::summarise(&st);
    let text = bo::summary_text(&path, &st, &summary);
    let best = bo::best(&summary);
    let summary_rows = summary
        .iter()
        .enumerate()
        .map(|(i, m)| {
            vec![
                path.clone(),
                m.mode.name().to_string(),
                m.band.to_string(),
                number(m.mean_dev),
                number(m.max_dev),
                optional_number(m.crop_mean),
                optional_number(m.crop_max),
                best.contains(&i).to_string(),
            ]
        })
        .collect();
    let (mut rows, mut bands) = (Vec::new(), Vec::new());
    bo::borders_rows(&path, &st, &mut rows);
    bo::band_rows(&path, &st, &mut bands);
    let stem = item.stem_path();
    bo::write_difference_views(&out.join("views").join(&stem), &st, &job.modes)?;
    let curves = bo::curves(&st);
    let plot = item.output_file(&out.join("plots"), "png");
    let what = if job.crop.is_some() {
        "crop study: error against the real surroundings"
    } else {
        "deviation from the median of all modes"
    };
    bo::write_plot(
        &plot,
        &format!("{path}: {what}"),
        "mean |error| (response units)",
        &curves,
    )?;
    let curves = curves
        .into_iter()
        .map(|(m, pts)| {
            let pts = pts
                .iter()
                .map(|p| if p.is_finite() { *p } else { 0.0 })
                .collect();
            (m, pts)
        })
        .collect();
    Ok(ImageResult {
        text,
        rows,
        bands,
        summary: summary_rows,
        curves,
    })
}
