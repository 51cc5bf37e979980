//! One input of an `apply` run: read once, decoded, run through the plan for
//! its shape, and its outputs written (maps, TIFFs, views, sheet) with its
//! statistics. A failed input leaves no outputs: what was written for it is
//! removed.

use std::path::{Path, PathBuf};

use ndarray::Array3;

use crate::engine::Engine;
use crate::error::Error;
use crate::image_io::LoadedImage;
use crate::jobs::inputs::InputItem;
use crate::jobs::manifest::{FileRecord, InputRecord, ViewRecord};
use crate::jobs::tables::{Finished, ImageRow, StatsRow};
use crate::jobs::{safe_name, Save, ViewOptions};
use crate::limits::bytes_text;
use crate::pipeline::{Plan, PlanCache};
use crate::regions::{regions, Connectivity, OtsuBins, Regions, Threshold};
use crate::render::{sheet, view, write_rgb, write_view};
use crate::stage::RecipeSpec;
use crate::stats::map_stats;

/// What every input of one run shares.
pub(crate) struct ImageContext<'a> {
    pub spec: &'a RecipeSpec,
    pub engine: Engine,
    pub save: Save,
    pub view: ViewOptions,
    pub threshold: Option<Threshold>,
    pub connectivity: Connectivity,
    pub inset: usize,
    /// The run's folder.
    pub dir: &'a Path,
    /// The diverging and cyclic colour tables.
    pub table: &'a [[u8; 3]],
    pub cyclic_table: &'a [[u8; 3]],
    pub plans: &'a PlanCache,
    /// Warnings for the whole run, each said once.
    pub warnings: &'a std::sync::Mutex<std::collections::BTreeSet<String>>,
}

/// Processes one input; never fails as a whole: a failure is recorded in the
/// result, which says why.
pub(crate) fn process(cx: &ImageContext, item: &InputItem) -> Finished {
    let mut row = ImageRow {
        path: item.rel_string(),
        sha256: None,
        meta: None,
        error: None,
        maps_written: 0,
    };
    let mut entry = InputRecord {
        path: row.path.clone(),
        sha256: None,
        status: "ok".into(),
        error: None,
        outputs: Vec::new(),
        views: Vec::new(),
    };
    let mut stats = Vec::new();
    let mut written: Vec<PathBuf> = Vec::new();
    let result = (|| -> Result<(), Error> {
        let (sha, img) = crate::jobs::inputs::read_with_digest(item, &cx.spec.input);
        row.sha256 = sha;
        let img = img?;
        row.meta = Some(img.meta.clone());
        let plan = cx
            .plans
            .get(cx.spec, &img.channel_names, img.data.dim(), cx.engine)?;
        let (_, h, w) = img.data.dim();
        let need = held_bytes(cx, &plan, img.data.len());
        if need > cx.spec.input.limits.max_memory {
            return Err(Error::Limit {
                path: Some(item.source.clone()),
                message: format!(
                    "needs about {} to run the recipe on its {w}×{h} pixels, over --max-memory ({})",
                    bytes_text(need),
                    bytes_text(cx.spec.input.limits.max_memory)
                ),
            });
        }
        let maps = plan.run(img.data.view())?;
        if let Some(k) = first_overflowed(&maps) {
            let name = plan.channel_names()[k].clone();
            plan.give_back(maps);
            return Err(Error::decode(
                &item.source,
                format!(
                    "map {k} ({name}) holds values that are not finite: the sums overflowed \
                     float32 (largest finite ±3.4e38); scale the bank's taps or the input \
                     down; nothing was written for this image"
                ),
            ));
        }
        let out = write_outputs(
            cx,
            item,
            &img,
            &plan,
            &maps,
            &mut stats,
            &mut entry,
            &mut written,
        );
        // The maps' memory serves the plan's next image.
        plan.give_back(maps);
        out
    })();
    match result {
        Ok(()) => {
            row.maps_written = usize::from(cx.save.maps);
        }
        Err(e) => {
            // Outputs of a failed image are removed, so no image is half there.
            for p in &written {
                let _ = std::fs::remove_file(p);
            }
            let problem = match e.path() {
                Some(p) if p == item.source => e.problem(),
                _ => e.to_string(),
            };
            entry.outputs.clear();
            entry.views.clear();
            entry.status = "failed".into();
            entry.error = Some(problem.clone());
            stats.clear();
            row.error = Some(problem);
        }
    }
    entry.sha256 = row.sha256.clone();
    Finished {
        image: row,
        stats,
        entry,
    }
}

/// Bytes an image holds at its busiest, beside what decoding it took (checked
/// by the reader): its f32 planes all along, plus the larger of the recipe's
/// busiest stage (input, padded copy, output) and the outputs' time: the maps,
/// and for every map at once (they are drawn in parallel) its view levels and
/// PNG, and its TIFF encoded in memory.
fn held_bytes(cx: &ImageContext, plan: &Plan, planes: usize) -> u64 {
    let (c, oh, ow) = plan.output_shape();
    let per_map = (oh as u64).saturating_mul(ow as u64);
    let maps = per_map.saturating_mul(c as u64).saturating_mul(4);
    let mut writing = maps;
    if cx.save.views || cx.save.sheets {
        let level = if cx.view.depth16 { 2 } else { 1 };
        writing = writing.saturating_add(per_map.saturating_mul(c as u64 * 2 * level));
    }
    if cx.save.sheets {
        writing = writing.saturating_add(per_map.saturating_mul(c as u64 * 3));
    }
    if cx.save.tiff {
        writing = writing.saturating_add(maps);
    }
    if cx.threshold.is_some() {
        // The runs of samples above the threshold: at most one per two
        // samples, 12 bytes each, and their component roots.
        writing = writing.saturating_add(per_map.saturating_mul(c as u64 * 8));
    }
    (planes as u64)
        .saturating_mul(4)
        .saturating_add(plan.peak_bytes().max(writing))
}

/// The first map holding a sample that is not finite (an overflow: inputs and
/// taps are finite), if any. Tests exponent bits so the loop vectorises.
fn first_overflowed(maps: &Array3<f32>) -> Option<usize> {
    use rayon::prelude::*;
    let (c, h, w) = maps.dim();
    let data = maps.as_slice().expect("plans return standard layout");
    let bad = |x: &[f32]| {
        x.chunks(4096).any(|c| {
            c.iter().fold(0u32, |a, v| {
                a | u32::from(v.to_bits() & 0x7f80_0000 == 0x7f80_0000)
            }) != 0
        })
    };
    (0..c)
        .into_par_iter()
        .find_first(|&k| bad(&data[k * h * w..(k + 1) * h * w]))
}

/// What one map of an image gave: the files written for it (each only once
/// whole), its statistics, its view's mapping and its sheet cell.
#[derive(Default)]
struct MapOut<'a> {
    tiff: Option<PathBuf>,
    view: Option<(PathBuf, crate::render::view::ViewMapping)>,
    key: Option<PathBuf>,
    stats: Option<crate::stats::MapStats>,
    regions: Option<Regions>,
    cell: Option<sheet::Cell<'a>>,
    error: Option<Error>,
}

#[allow(clippy::too_many_arguments)]
fn write_outputs(
    cx: &ImageContext,
    item: &InputItem,
    img: &LoadedImage,
    plan: &Plan,
    maps: &Array3<f32>,
    stats: &mut Vec<StatsRow>,
    entry: &mut InputRecord,
    written: &mut Vec<PathBuf>,
) -> Result<(), Error> {
    use rayon::prelude::*;
    let out = cx.dir;
    let (c, h, w) = maps.dim();
    let names = plan.channel_names();
    let nonneg = plan.non_negative(!img.meta.float);
    let cyclic = plan.cyclic();
    let given = cx.threshold.and_then(Threshold::value);
    let stem = item.stem_path();
    let data = maps.as_slice().expect("plans return standard layout");
    let plane = |k: usize| &data[k * h * w..(k + 1) * h * w];
    let file_of = |k: usize, ext: &str| format!("{k:02}-{}.{ext}", safe_name(&names[k]));
    let draw = cx.save.views || cx.save.sheets || cx.save.keys;
    if draw && cx.view.depth16 {
        let signed: Vec<&str> = (0..c)
            .filter(|&k| !nonneg[k])
            .map(|k| names[k].as_str())
            .collect();
        if !signed.is_empty() {
            cx.warnings
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .insert(format!(
                    "--view-depth 16 gives 16-bit grey views of maps that cannot be negative; \
                     the signed maps ({}) are drawn on the 8-bit diverging colour scale",
                    signed.join(", ")
                ));
        }
    }

    // One map's work: its TIFF, its statistics, its view (PNG encode) and sheet
    // cell. Maps run in parallel; the `.npy` of all maps is written meanwhile.
    let one_map = |k: usize| -> MapOut {
        let mut o = MapOut::default();
        let result = (|| -> Result<(), Error> {
            if cx.save.tiff {
                let p = out.join("tiff").join(&stem).join(file_of(k, "tif"));
                crate::image_io::write_f32_tiff(&p, plane(k), w, h)?;
                o.tiff = Some(p);
            }
            let (signed, range, deep) = (!nonneg[k], cx.view.range, cx.view.depth16);
            let choose = |lo: Option<f64>, hi: Option<f64>| match cyclic[k] {
                Some((a, b)) => view::cyclic_mapping(a, b),
                None => view::mapping_from_extremes(lo, hi, signed, range, deep),
            };
            let table = if cyclic[k].is_some() {
                cx.cyclic_table
            } else {
                cx.table
            };
            let mut otsu_level = None;
            let pic = if cx.save.stats && draw && crate::stats::takes_histograms(h * w) {
                // One look at the map for the view's levels and the statistics'
                // second pass, after the first pass found the extremes.
                let first = crate::stats::FirstPass::of(plane(k), given);
                let (lo, hi) = first.extremes();
                let m = choose(lo, hi);
                // Otsu's histogram fills in the same pass, from the extremes.
                let bins = match (cx.threshold, lo, hi) {
                    (Some(Threshold::Otsu), Some(lo), Some(hi)) => Some(OtsuBins::new(lo, hi)),
                    _ => None,
                };
                let add = |v: &[f32]| {
                    if let Some(b) = &bins {
                        b.add(v);
                    }
                };
                let (mut u8s, mut u16s) = (Vec::new(), Vec::new());
                let stats = if m.levels > 255 {
                    u16s = vec![0u16; h * w];
                    first.finish_with(plane(k), &mut u16s, |v, o| {
                        view::levels_u16(v, o, &m);
                        add(v);
                    })
                } else {
                    u8s = vec![0u8; h * w];
                    first.finish_with(plane(k), &mut u8s, |v, o| {
                        view::levels_u8(v, o, &m);
                        add(v);
                    })
                };
                o.stats = Some(stats);
                otsu_level = bins.map(|b| b.level() as f32);
                Some((view::view_of(&m, w, h, u8s, u16s), m))
            } else {
                if cx.save.stats {
                    o.stats = Some(map_stats(plane(k), given));
                }
                draw.then(|| {
                    // The statistics found the extremes already, when they were asked for.
                    let m = match (&o.stats, cyclic[k]) {
                        (Some(s), _) => choose(s.min, s.max),
                        (None, Some(_)) => choose(None, None),
                        (None, None) => view::mapping(plane(k), signed, range, deep),
                    };
                    (view::render(plane(k), h, w, &m), m)
                })
            };
            // Edge measures, for the table and for the box drawn on pictures,
            // found while the view is encoded and written: neither needs the other.
            let stats_now = o.stats.clone();
            let (g, view_written) = rayon::join(
                || {
                    cx.threshold
                        .filter(|_| cx.save.stats || cx.save.sheets || cx.save.keys)
                        .map(|t| measure(plane(k), (w, h), t, cx, stats_now.as_ref(), otsu_level))
                },
                || match (&pic, cx.save.views) {
                    (Some((pic, m)), true) => {
                        let p = out.join("views").join(&stem).join(file_of(k, "png"));
                        Some(write_view(&p, pic, table, cx.view.png).map(|()| (p, m.clone())))
                    }
                    _ => None,
                },
            );
            if let Some(v) = view_written {
                o.view = Some(v?);
            }
            if let Some(g) = g {
                if let Some(s) = &mut o.stats {
                    // With Otsu the level is known only now.
                    s.above_fraction = Some(g.above as f64 / (h * w).max(1) as f64);
                }
                o.regions = Some(g);
            }
            if let Some((pic, m)) = pic {
                let key = sheet::Key {
                    table: matches!(m.scale, view::Scale::Diverging | view::Scale::Cyclic)
                        .then_some(table),
                    lo: m.lo,
                    hi: m.hi,
                    middle: match m.scale {
                        view::Scale::Diverging => Some(0.0),
                        view::Scale::Cyclic => Some((m.lo + m.hi) / 2.0),
                        view::Scale::Grey => None,
                    },
                    unit: if m.scale == view::Scale::Cyclic {
                        "degrees"
                    } else {
                        "response"
                    },
                };
                let largest = o.regions.as_ref().and_then(|g| g.largest);
                let picture = || {
                    let mut p = pic.cell(table);
                    if let Some(l) = &largest {
                        crate::render::mark_box(&mut p, l, pic.cell_factor());
                    }
                    p
                };
                let boxed = |label: String| match &largest {
                    Some(l) => format!("{label}; largest {} px", l.area),
                    None => label,
                };
                if cx.save.keys {
                    let cell = sheet::Cell {
                        label: boxed(format!("map {k:02}: {}", names[k])),
                        picture: picture(),
                        key: Some(key),
                    };
                    let s = sheet::sheet_of(&item.rel_string(), &[cell], 1);
                    let p = out.join("keys").join(&stem).join(file_of(k, "png"));
                    write_rgb(&p, &s)?;
                    o.key = Some(p);
                }
                if cx.save.sheets {
                    o.cell = Some(sheet::Cell {
                        label: boxed(format!("{k:02} {}", names[k])),
                        picture: picture(),
                        key: Some(key),
                    });
                }
            }
            Ok(())
        })();
        o.error = result.err();
        o
    };
    let npy = item.output_file(&out.join("maps"), "npy");
    let (npy_written, per_map) = rayon::join(
        || {
            cx.save
                .maps
                .then(|| crate::image_io::write_npy(&npy, maps.view()))
        },
        || (0..c).into_par_iter().map(one_map).collect::<Vec<MapOut>>(),
    );
    // Every file that was written is known before any error is returned, so a
    // failed image leaves none behind.
    let mut per_map = per_map;
    for o in &per_map {
        written.extend(o.tiff.iter().cloned());
        written.extend(o.key.iter().cloned());
        written.extend(o.view.iter().map(|v| v.0.clone()));
    }
    let npy_ok = match npy_written {
        Some(Ok(())) => {
            written.push(npy.clone());
            true
        }
        Some(Err(e)) => return Err(e),
        None => false,
    };
    if let Some(e) = per_map.iter_mut().find_map(|o| o.error.take()) {
        return Err(e);
    }
    let record = |path: &Path, entry: &mut InputRecord| -> Result<(), Error> {
        entry.outputs.push(FileRecord::of(
            path,
            slash(path.strip_prefix(out).unwrap_or(path)),
        )?);
        Ok(())
    };
    if npy_ok {
        record(&npy, entry)?;
    }
    for o in &per_map {
        if let Some(p) = &o.tiff {
            record(p, entry)?;
        }
        if let Some(p) = &o.key {
            record(p, entry)?;
        }
    }
    let mut cells = Vec::new();
    if cx.save.sheets {
        cells.push(sheet::Cell {
            label: "source".to_string(),
            picture: crate::render::input_picture(img),
            key: None,
        });
    }
    for (k, o) in per_map.into_iter().enumerate() {
        if let Some(s) = o.stats {
            stats.push(StatsRow {
                path: item.rel_string(),
                channel: k,
                name: names[k].clone(),
                width: w,
                height: h,
                stats: s,
                regions: o.regions,
            });
        }
        if let Some((p, mapping)) = o.view {
            entry.views.push(ViewRecord {
                channel: k,
                name: names[k].clone(),
                file: slash(p.strip_prefix(out).unwrap_or(&p)),
                mapping,
            });
            record(&p, entry)?;
        }
        cells.extend(o.cell);
    }
    if cx.save.sheets {
        let s = sheet::sheet_of(&item.rel_string(), &cells, 0);
        let p = item.output_file(&out.join("sheets"), "png");
        write_rgb(&p, &s)?;
        written.push(p.clone());
        record(&p, entry)?;
    }
    Ok(())
}

/// The edge measures of one map at `t` (Otsu's level `known` when the
/// statistics' pass found it, else found here from the map's extremes).
fn measure(
    values: &[f32],
    (w, h): (usize, usize),
    t: Threshold,
    cx: &ImageContext,
    stats: Option<&crate::stats::MapStats>,
    known: Option<f32>,
) -> Regions {
    let level = match (t, known) {
        (Threshold::Value(v), _) => v,
        (Threshold::Otsu, Some(v)) => v,
        (Threshold::Otsu, None) => {
            let (lo, hi) = match stats {
                Some(s) => (s.min, s.max),
                None => {
                    let s = map_stats(values, None);
                    (s.min, s.max)
                }
            };
            match (lo, hi) {
                (Some(lo), Some(hi)) => crate::regions::otsu(values, lo, hi) as f32,
                _ => 0.0,
            }
        }
    };
    regions(values, w, h, level, cx.connectivity, cx.inset)
}

/// A path with `/` separators, for the manifest, without loss
/// ([`crate::jobs::inputs::path_text`]).
pub(crate) fn slash(p: &Path) -> String {
    crate::jobs::inputs::path_text(p)
}
