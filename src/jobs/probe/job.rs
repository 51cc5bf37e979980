//! The `probe` job: the strongest responses of each kernel across images (see
//! the module above for the rules), written as `probe.csv`, one sheet per
//! kernel (`kernels/NN-name.png`) and `overview.png`.

use std::path::PathBuf;
use std::sync::Mutex;

use rayon::prelude::*;

use crate::engine::Engine;
use crate::error::Error;
use crate::jobs::inputs::expand_inputs;
use crate::jobs::probe::{channel_hits, merge, Hit};
use crate::jobs::tables::write_csv;
use crate::jobs::{for_each_parallel, safe_name, thread_pool, Observer, Stop};
use crate::pipeline::PlanCache;
use crate::stage::{RecipeSpec, Stage};

/// Column names of `probe.csv` (schema `shared/schemas/probe.csv.json`).
pub const PROBE_COLUMNS: [&str; 12] = [
    "channel", "kernel", "rank", "path", "x", "y", "response", "box_x", "box_y", "box_w", "box_h",
    "clipped",
];

/// Everything a probe needs.
#[derive(Debug, Clone)]
pub struct ProbeJob {
    /// Input handling and stages.
    pub spec: RecipeSpec,
    /// Conv strategy.
    pub engine: Engine,
    /// Hits kept per kernel.
    pub top: usize,
    /// Output folder.
    pub out_dir: PathBuf,
    /// Files, folders and patterns as given.
    pub inputs: Vec<PathBuf>,
    /// Threads of the job's pool, and images in flight.
    pub jobs: usize,
    /// Asked to stop: finish the images in flight, write what was found, return.
    pub stop: Stop,
    /// The command line, for the manifest.
    pub command_line: Vec<String>,
}

/// What a probe did.
#[derive(Debug, Clone, PartialEq)]
pub struct ProbeSummary {
    /// Images probed.
    pub probed: usize,
    /// Images that failed.
    pub failed: usize,
    /// Output channels (kernels) probed.
    pub kernels: usize,
}

/// Runs the probe (see the module header).
pub fn run_probe(job: &ProbeJob, obs: &dyn Observer) -> Result<ProbeSummary, Error> {
    job.spec.validate()?;
    if job.top == 0 {
        return Err(Error::usage("--top must be at least 1"));
    }
    let k = job.top;
    let items = expand_inputs(&job.inputs, &job.out_dir)?;
    let pool = thread_pool(job.jobs)?;
    crate::jobs::make_out_dir(&job.out_dir)?;
    let _lock = crate::jobs::OutLock::take(&job.out_dir)?;
    // Per channel: (name, best hits). Channel names come from the first image.
    let best: Mutex<Vec<(String, Vec<Hit>)>> = Mutex::new(Vec::new());
    let plans = PlanCache::default();
    let failures: Mutex<Vec<(usize, Error)>> = Mutex::new(Vec::new());
    let record = crate::jobs::study::StudyRecord::start("tapmap-probe");
    let digests: Mutex<Vec<Option<String>>> = Mutex::new(vec![None; items.len()]);
    obs.begin(items.len());
    for_each_parallel(&items, job.jobs, &job.stop, |i, item| {
        let result = pool.install(|| -> Result<(), Error> {
            let (sha, img) = crate::jobs::inputs::read_with_digest(item, &job.spec.input);
            digests.lock().unwrap_or_else(|p| p.into_inner())[i] = sha;
            let img = img?;
            let plan = plans.get(&job.spec, &img.channel_names, img.data.dim(), job.engine)?;
            let names = plan.channel_names();
            let (_, h, w) = img.data.dim();
            job.spec.input.limits.check_memory(
                held_bytes(&plan, img.data.len(), k, items.len()),
                &format!("to probe its {w}×{h} pixels for the top {k}"),
            )?;
            let maps = plan.run(img.data.view())?;
            let (oc, oh, ow) = maps.dim();
            let data = maps.as_slice().expect("plans return standard layout");
            let path = item.rel_string();
            // Channels in parallel (each also spreads its bands over the pool).
            let hits: Vec<Vec<Hit>> = (0..oc)
                .into_par_iter()
                .map(|ch| {
                    channel_hits(
                        &data[ch * oh * ow..(ch + 1) * oh * ow],
                        ow,
                        k,
                        plan.fields()[ch],
                        &img,
                        &path,
                    )
                })
                .collect();
            plan.give_back(maps);
            let mut b = best.lock().unwrap_or_else(|p| p.into_inner());
            if b.is_empty() {
                *b = names.iter().map(|n| (n.clone(), Vec::new())).collect();
            }
            if b.len() != oc {
                return Err(Error::decode(
                    &item.source,
                    format!("gives {oc} channels but earlier images gave {}", b.len()),
                ));
            }
            for (slot, new) in b.iter_mut().zip(hits) {
                merge(&mut slot.1, new, k);
            }
            Ok(())
        });
        crate::jobs::settle(obs, &failures, i, &item.source, result);
    });
    obs.end();
    let failures = failures.into_inner().unwrap_or_else(|p| p.into_inner());
    let failed = failures.len();
    let best = best.into_inner().unwrap_or_else(|p| p.into_inner());
    let tables = write_results(job, &best, items.len())?;
    let digests = digests.into_inner().unwrap_or_else(|p| p.into_inner());
    let inputs = crate::jobs::study::outcomes(&items, digests, &failures);
    record.write(
        &job.out_dir,
        &job.spec,
        job.engine,
        serde_json::json!({"top": job.top}),
        &job.command_line,
        job.jobs,
        &tables,
        inputs,
    )?;
    Ok(ProbeSummary {
        probed: items.len() - failed,
        failed,
        kernels: best.len(),
    })
}

/// Bytes one image holds at its busiest while probed: its planes, the plan's
/// busiest stage, the best samples each channel's bands keep (channels in
/// parallel), and the hits kept over the run (at most `k` per channel, and
/// no more than the separated places `images` images of this size can give),
/// each with its patch.
fn held_bytes(plan: &crate::pipeline::Plan, planes: usize, k: usize, images: usize) -> u64 {
    let (oc, oh, ow) = plan.output_shape();
    let per_map = (oh as u64).saturating_mul(ow as u64);
    let (mut most_hits, mut patch, mut window) = (0u64, 0u64, 1u64);
    for f in plan.fields() {
        let (sy, sx) = crate::jobs::probe::separation(*f);
        let places = (oh.div_ceil(sy) as u64).saturating_mul(ow.div_ceil(sx) as u64);
        most_hits = most_hits.max(places);
        // The field and its margin of half its size (at least 2) on each side,
        // enlarged to about a sheet cell.
        let side = |r: usize| (r + 2 * (r / 2).max(2)) as u64;
        let cell = u64::from(crate::render::sheet::CELL);
        let s = side(f.0.size.max(f.1.size));
        patch = patch.max((s * (cell / s).max(1)).pow(2) * 3);
        window = window.max(((2 * sy - 1) as u64).saturating_mul((2 * sx - 1) as u64));
    }
    let kept = (k as u64).min(most_hits.saturating_mul(images as u64));
    let hits = (oc as u64).saturating_mul(kept).saturating_mul(patch + 160);
    let candidates = (k as u64)
        .saturating_mul(window)
        .min(per_map)
        .saturating_mul(16)
        .saturating_mul(oc.min(rayon::current_num_threads()) as u64);
    (planes as u64)
        .saturating_mul(4)
        .saturating_add(plan.peak_bytes())
        .saturating_add(candidates)
        .saturating_add(hits)
}

/// Hits drawn on one kernel sheet; more go on further pages.
pub const SHEET_HITS: usize = 64;
/// Hits per kernel row in the overview (all are in the kernel sheets and
/// probe.csv).
pub const OVERVIEW_HITS: usize = 12;
/// Kernel rows per overview page.
pub const OVERVIEW_ROWS: usize = 32;

/// A page's file name: `stem.png` for the first, `stem-pN.png` after.
fn page_name(stem: &str, page: usize) -> String {
    if page == 0 {
        format!("{stem}.png")
    } else {
        format!("{stem}-p{}.png", page + 1)
    }
}

/// `probe.csv`, the per-kernel sheets and the overview.
fn write_results(
    job: &ProbeJob,
    best: &[(String, Vec<Hit>)],
    images: usize,
) -> Result<Vec<String>, Error> {
    let mut written = Vec::new();
    let k = job.top;
    let out = &job.out_dir;
    let mut rows = Vec::new();
    let taps = crate::render::colormap::table();
    let last_bank = job.spec.recipe.stages.iter().rev().find_map(|s| match s {
        Stage::Conv(c) => Some(c.bank.clone()),
        _ => None,
    });
    let kernels_dir = out.join("kernels");
    std::fs::create_dir_all(&kernels_dir).map_err(|e| Error::io(&kernels_dir, e))?;
    let mut overview = Vec::new();
    for (ch, (name, hits)) in best.iter().enumerate() {
        for (r, hit) in hits.iter().enumerate() {
            rows.push(vec![
                ch.to_string(),
                name.clone(),
                (r + 1).to_string(),
                hit.path.clone(),
                hit.x.to_string(),
                hit.y.to_string(),
                crate::jobs::tables::number(hit.response),
                hit.region.1.to_string(),
                hit.region.0.to_string(),
                hit.region.3.to_string(),
                hit.region.2.to_string(),
                hit.clipped.to_string(),
            ]);
        }
        let cells: Vec<(String, image::RgbImage)> = hits
            .iter()
            .enumerate()
            .map(|(r, h)| {
                (
                    format!(
                        "#{} {} at x {}, y {} of {}{}",
                        r + 1,
                        crate::render::sheet::short_number(f64::from(h.response)),
                        h.x,
                        h.y,
                        h.path,
                        if h.clipped { " (field clipped)" } else { "" }
                    ),
                    h.patch.clone(),
                )
            })
            .collect();
        // On the kernel sheets each patch has its key: the input values drawn
        // black and white.
        let keyed: Vec<crate::render::sheet::Cell> = cells
            .iter()
            .zip(hits)
            .map(|((label, patch), h)| crate::render::sheet::Cell {
                label: label.clone(),
                picture: patch.clone(),
                key: Some(crate::render::sheet::Key {
                    table: None,
                    lo: f64::from(h.shown.0),
                    hi: f64::from(h.shown.1),
                    middle: None,
                    unit: "input",
                }),
            })
            .collect();
        let pages = keyed.len().div_ceil(SHEET_HITS);
        for (page, part) in keyed.chunks(SHEET_HITS).enumerate() {
            let first = page * SHEET_HITS + 1;
            let title = if pages > 1 {
                format!(
                    "{name}: hits {first}-{} of the top {} of {images} image(s), page {} of {pages}",
                    first + part.len() - 1,
                    cells.len(),
                    page + 1
                )
            } else {
                format!("{name}: top {} of {images} image(s)", cells.len())
            } + "; the green frame marks each hit's receptive field";
            let s = crate::render::sheet::sheet_of(&title, part, 0);
            let stem = format!("{ch:02}-{}", safe_name(name));
            let path = kernels_dir.join(page_name(&stem, page));
            written.push(format!("kernels/{}", page_name(&stem, page)));
            crate::render::write_rgb(&path, &s)?;
        }
        let kernel = last_bank.as_ref().and_then(|b| {
            let base = name.split('@').next().unwrap_or(name);
            b.kernels.iter().find(|kk| kk.name == base)
        });
        // The taps with their own key (each kernel scaled to its ±max), then
        // the strongest patches with theirs.
        let tap_cell = match kernel {
            Some(kk) => {
                let m = crate::render::taps::extreme(kk);
                crate::render::sheet::Cell {
                    label: format!("row {}: {name}, taps", ch + 1),
                    picture: crate::render::taps::taps_cell(kk, &taps, false),
                    key: Some(crate::render::sheet::Key {
                        table: Some(&taps),
                        lo: -m,
                        hi: m,
                        middle: Some(0.0),
                        unit: "tap",
                    }),
                }
            }
            None => crate::render::sheet::Cell {
                label: format!("row {}: {name}", ch + 1),
                picture: image::RgbImage::new(1, 1),
                key: None,
            },
        };
        overview.push(tap_cell);
        for c in 0..k.min(OVERVIEW_HITS) {
            overview.push(keyed.get(c).cloned().unwrap_or(crate::render::sheet::Cell {
                label: String::new(),
                picture: image::RgbImage::from_pixel(1, 1, image::Rgb([30, 33, 36])),
                key: None,
            }));
        }
    }
    let columns = k.min(OVERVIEW_HITS) + 1;
    let rows_per_page = OVERVIEW_ROWS * columns;
    let pages = overview.len().div_ceil(rows_per_page);
    for (page, part) in overview.chunks(rows_per_page).enumerate() {
        let mut title = format!(
            "probe: each row a kernel, its taps, then its {} strongest patches",
            columns - 1
        );
        if k > OVERVIEW_HITS {
            title += &format!(" (of {k}: all in kernels/ and probe.csv)");
        }
        if pages > 1 {
            title += &format!(", page {} of {pages}", page + 1);
        }
        let s = crate::render::sheet::sheet_of(&title, part, columns);
        written.push(page_name("overview", page));
        crate::render::write_rgb(&out.join(page_name("overview", page)), &s)?;
    }
    write_csv(&out.join("probe.csv"), &PROBE_COLUMNS, rows)?;
    written.push("probe.csv".to_string());
    Ok(written)
}
