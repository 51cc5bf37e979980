//! The `probe` job: the strongest responses of each kernel across images (see
//! the module above for the rules), written as `probe.csv`, one sheet per
//! kernel (`kernels/NN-name.png`) and `overview.png`.

use std::path::PathBuf;
use std::sync::Mutex;

use rayon::prelude::*;

use crate::engine::Engine;
use crate::error::Error;
use crate::image_io::read_image;
use crate::jobs::inputs::expand_inputs;
use crate::jobs::probe::{channel_hits, merge, Hit};
use crate::jobs::tables::write_csv;
use crate::jobs::{for_each_parallel, safe_name, thread_pool, Observer, Stop};
use crate::pipeline::PlanCache;
use crate::render::sheet::{sheet, sheet_with_columns};
use crate::stage::{RecipeSpec, Stage};

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
    std::fs::create_dir_all(&job.out_dir).map_err(|e| Error::io(&job.out_dir, e))?;
    // Per channel: (name, best hits). Channel names come from the first image.
    let best: Mutex<Vec<(String, Vec<Hit>)>> = Mutex::new(Vec::new());
    let plans = PlanCache::default();
    let failures: Mutex<Vec<(usize, Error)>> = Mutex::new(Vec::new());
    obs.begin(items.len());
    for_each_parallel(&items, job.jobs, &job.stop, |i, item| {
        let result = pool.install(|| -> Result<(), Error> {
            if let Some(m) = &item.problem {
                return Err(Error::decode(&item.source, m.clone()));
            }
            let img = read_image(&item.source, &job.spec.input)?;
            let plan = plans.get(&job.spec, &img.channel_names, img.data.dim(), job.engine)?;
            let names = plan.channel_names();
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
        if let Err(e) = result {
            let e = e.in_file(&item.source);
            obs.input_failed(&e);
            failures
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .push((i, e));
        }
        obs.advance();
    });
    obs.end();
    let failed = failures
        .into_inner()
        .unwrap_or_else(|p| p.into_inner())
        .len();
    let best = best.into_inner().unwrap_or_else(|p| p.into_inner());
    write_results(job, &best, items.len())?;
    Ok(ProbeSummary {
        probed: items.len() - failed,
        failed,
        kernels: best.len(),
    })
}

/// `probe.csv`, the per-kernel sheets and the overview.
fn write_results(job: &ProbeJob, best: &[(String, Vec<Hit>)], images: usize) -> Result<(), Error> {
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
                        "#{} {:.4}{}",
                        r + 1,
                        h.response,
                        if h.clipped { " clip" } else { "" }
                    ),
                    h.patch.clone(),
                )
            })
            .collect();
        if !cells.is_empty() {
            let s = sheet(
                &format!("{name}: top {} of {images} image(s)", cells.len()),
                &cells,
            );
            let path = kernels_dir.join(format!("{ch:02}-{}.png", safe_name(name)));
            crate::render::write_png(
                &path,
                s.as_raw(),
                s.width(),
                s.height(),
                image::ExtendedColorType::Rgb8,
            )?;
        }
        let kernel = last_bank.as_ref().and_then(|b| {
            let base = name.split('@').next().unwrap_or(name);
            b.kernels.iter().find(|kk| kk.name == base)
        });
        let tap_cell = kernel.map_or_else(
            || image::RgbImage::new(1, 1),
            |kk| crate::render::taps::taps_picture(kk, &taps),
        );
        overview.push((format!("{name} taps"), tap_cell));
        for c in 0..k {
            match cells.get(c) {
                Some(cell) => overview.push(cell.clone()),
                None => overview.push((
                    String::new(),
                    image::RgbImage::from_pixel(1, 1, image::Rgb([30, 33, 36])),
                )),
            }
        }
    }
    if !overview.is_empty() {
        let s = sheet_with_columns(
            "probe: each row a kernel, its taps, then its strongest patches",
            &overview,
            k + 1,
        );
        crate::render::write_png(
            &out.join("overview.png"),
            s.as_raw(),
            s.width(),
            s.height(),
            image::ExtendedColorType::Rgb8,
        )?;
    }
    write_csv(
        &out.join("probe.csv"),
        &[
            "channel", "kernel", "rank", "path", "x", "y", "response", "box_x", "box_y", "box_w",
            "box_h", "clipped",
        ],
        rows,
    )?;
    Ok(())
}
