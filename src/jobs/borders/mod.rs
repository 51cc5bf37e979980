//! The border study: how much the pad mode changes a recipe's maps, and how far in.
//!
//! **Modes study.** The recipe runs once per pad mode (every conv stage takes that
//! mode), on the ring of outputs along the edges where modes can differ (the
//! predicted band plus a margin; [`ring`]): off it they all agree. At each output pixel the median over modes is the reference; a mode's
//! deviation is |Y_mode − median|. A mode's band is 1 + the largest distance from
//! the nearest edge at which its deviation exceeds the tolerance; the channel's
//! band is the largest over modes, reported for each edge (each pixel counts for
//! its nearest edge, ties in the order top, bottom, left, right).
//!
//! **Prediction.** Through all stages an output pixel y reads input rows
//! [y·J − P, y·J − P + R − 1], where R is the receptive field, J the jump (product
//! of strides) and P the padding before, in input pixels, summed over stages as
//! P = Σ p_l·J_(l−1) (Dumoulin & Visin 2016, receptive-field arithmetic). Outputs
//! whose rows leave [0, H) may depend on the pad mode: ceil(P/J) at the top and
//! H_out − floor((H − R + P)/J) − 1 at the bottom. The measured band can never be
//! wider than this; it is narrower where the image happens to agree with a
//! mode's padding, or the kernel's outer taps are zero.
//!
//! **Crop study** (`crop = N`). The window N pixels in from every side runs with
//! each mode; the full image's result over the same window, which saw the real
//! surroundings, is the truth. The error by distance from the window's edge
//! tells which mode best stands in for pixels the camera did not capture.

mod job;
pub mod output;
mod ring;

pub use ring::Ring;
use ring::{ring_outputs, Reach};

pub use job::{
    run_borders, BordersJob, BordersSummary, BANDS_COLUMNS, BORDERS_COLUMNS, SUMMARY_COLUMNS,
};

use ndarray::{s, ArrayView3};

use crate::border::PadMode;
use crate::engine::Engine;
use crate::error::Error;
use crate::geometry::ReceptiveField;
use crate::pipeline::Plan;
use crate::stage::{Recipe, Stage};

/// The recipe with every conv stage's pad mode set to `mode`.
pub fn with_mode(recipe: &Recipe, mode: PadMode) -> Recipe {
    let mut r = recipe.clone();
    for s in &mut r.stages {
        if let Stage::Conv(c) = s {
            c.options.pad = mode;
        }
    }
    r
}

/// Error (or deviation) statistics at one distance from the edge.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct DistanceStat {
    /// Σ |error| over the pixels at this distance.
    pub sum: f64,
    /// Largest |error|.
    pub max: f64,
    /// Pixels at this distance.
    pub count: usize,
}

impl DistanceStat {
    /// Mean |error|.
    pub fn mean(&self) -> f64 {
        if self.count == 0 {
            0.0
        } else {
            self.sum / self.count as f64
        }
    }
}

/// Distance of (y, x) from the nearest edge of an h × w map, and which edge
/// (0 top, 1 bottom, 2 left, 3 right; ties in that order).
pub fn edge_distance(y: usize, x: usize, h: usize, w: usize) -> (usize, usize) {
    let d = [y, h - 1 - y, x, w - 1 - x];
    let mut best = 0;
    for e in 1..4 {
        if d[e] < d[best] {
            best = e;
        }
    }
    (d[best], best)
}

/// Per-distance statistics of |a − b| over channel `k` of two rings of one
/// layout, for distances below the ring's width (every pixel at such a
/// distance is on the ring).
pub fn by_distance(a: &Ring, b: &Ring, k: usize) -> Vec<DistanceStat> {
    let (_, h, w) = a.shape();
    let mut v = vec![DistanceStat::default(); h.min(w).div_ceil(2).min(a.width())];
    for (y, x) in a.positions() {
        let (d, _) = edge_distance(y, x, h, w);
        if let Some(s) = v.get_mut(d) {
            let e = (a.get(k, y, x) as f64 - b.get(k, y, x) as f64).abs();
            s.sum += e;
            s.max = s.max.max(e);
            s.count += 1;
        }
    }
    v
}

/// Band per edge (top, bottom, left, right) of channel `k`: 1 + the largest
/// distance from that edge at which |a − b| > tol. Each edge is measured away
/// from the corners: the top band looks only at columns outside the left and
/// right bands that `expect` predicts (and so on), so one edge's padding is not
/// counted for another. Where the predicted side bands leave no such columns,
/// each pixel counts for its nearest edge instead. Only the ring is looked at:
/// off it, outside every predicted band, all modes agree.
pub fn band(a: &Ring, b: &Ring, k: usize, tol: f32, expect: [usize; 4]) -> [usize; 4] {
    let (_, h, w) = a.shape();
    let [pt, pb, pl, pr] = expect;
    let cols_free = pl + pr < w;
    let rows_free = pt + pb < h;
    let mut out = [0usize; 4];
    for (y, x) in a.positions() {
        let diff = (a.get(k, y, x) - b.get(k, y, x)).abs();
        if !(diff > tol || diff.is_nan()) {
            continue;
        }
        let central_col = x >= pl && x < w - pr;
        let central_row = y >= pt && y < h - pb;
        if cols_free && rows_free {
            if central_col {
                out[0] = out[0].max(if y < h - y { y + 1 } else { 0 });
                out[1] = out[1].max(if h - 1 - y <= y { h - y } else { 0 });
            }
            if central_row {
                out[2] = out[2].max(if x < w - x { x + 1 } else { 0 });
                out[3] = out[3].max(if w - 1 - x <= x { w - x } else { 0 });
            }
            if !central_col && !central_row {
                // A corner pixel: it belongs to the nearer of its two edges.
                let (d, e) = edge_distance(y, x, h, w);
                out[e] = out[e].max(d + 1);
            }
        } else {
            let (d, e) = edge_distance(y, x, h, w);
            out[e] = out[e].max(d + 1);
        }
    }
    out
}

/// Per-pixel median over rings of one layout (mean of the middle two for an
/// even count).
pub fn median_over(rings: &[Ring]) -> Ring {
    let n = rings.len();
    rings[0].map(|k, y, x| {
        let mut vals: Vec<f32> = rings.iter().map(|r| r.get(k, y, x)).collect();
        vals.sort_by(f32::total_cmp);
        if n % 2 == 1 {
            vals[n / 2]
        } else {
            0.5 * (vals[n / 2 - 1] + vals[n / 2])
        }
    })
}

/// Results for one channel of one image.
#[derive(Debug, Clone, PartialEq)]
pub struct ChannelStudy {
    /// Channel name.
    pub name: String,
    /// Measured band per edge (top, bottom, left, right), all modes together.
    pub band: [usize; 4],
    /// Predicted band per edge.
    pub predicted: [usize; 4],
    /// Per mode: its own band (max over edges), and deviation from the median by distance.
    pub modes: Vec<(PadMode, usize, Vec<DistanceStat>)>,
    /// Per mode: error against the full image by distance from the window edge (crop study).
    pub crop: Vec<(PadMode, Vec<DistanceStat>)>,
}

/// Everything measured on one image.
pub struct ImageStudy {
    /// Output (channels, height, width) of the full image.
    pub shape: (usize, usize, usize),
    /// Per channel.
    pub channels: Vec<ChannelStudy>,
    /// Maps per mode on the ring where modes can differ, in the order of `modes`.
    pub maps: Vec<Ring>,
    /// The per-pixel median over modes, on the same ring.
    pub median: Ring,
    /// With a crop study: whether the truth was free of the full image's own
    /// border effects (the crop is at least the predicted band).
    pub crop_truth_clean: Option<bool>,
}

/// Output pixels beyond the predicted band that are still reported (the
/// tables show a few distances past the widest band).
pub const MARGIN: usize = 4;

/// What a study's rings look like for one input size (they do not depend on
/// the pad mode: one plan says them).
struct Layout {
    plan: Plan,
    reach: (Reach, Reach),
    predicted: Vec<[usize; 4]>,
    widest: [usize; 4],
    d: usize,
}

fn layout(recipe: &Recipe, dim: (usize, usize, usize), engine: Engine) -> Result<Layout, Error> {
    let (_, h, w) = dim;
    let plan = Plan::new(recipe, dim, engine)?;
    let (_, oh, ow) = plan.output_shape();
    let reach = (Reach::of(&plan, true), Reach::of(&plan, false));
    let predicted: Vec<[usize; 4]> = plan
        .fields()
        .iter()
        .map(|(fr, fc)| {
            let (t, b) = fr.outside(h, oh);
            let (l, r) = fc.outside(w, ow);
            [t, b, l, r]
        })
        .collect();
    let widest = predicted.iter().fold([0usize; 4], |a, p| {
        [
            a[0].max(p[0]),
            a[1].max(p[1]),
            a[2].max(p[2]),
            a[3].max(p[3]),
        ]
    });
    let d = widest.iter().copied().max().unwrap_or(0) + MARGIN;
    Ok(Layout {
        plan,
        reach,
        predicted,
        widest,
        d,
    })
}

/// Bytes a study of an input of `dim` holds at its busiest, beside the input
/// itself: every mode's ring run at once (the cut image, its busiest stage,
/// the ring), the median ring and, with the crop study, as much again.
pub fn study_bytes(
    recipe: &Recipe,
    dim: (usize, usize, usize),
    modes: usize,
    crop: bool,
    engine: Engine,
) -> Result<u64, Error> {
    let l = layout(recipe, dim, engine)?;
    let shape = l.plan.output_shape();
    let per_mode = ring::ring_bytes(recipe, dim, l.reach, shape, l.d, engine)?;
    let all = per_mode.saturating_mul(modes as u64 + 1);
    Ok(if crop { all.saturating_mul(2) } else { all })
}

/// Runs both studies on one input (`c × h × w`); every mode is computed only
/// on the ring of outputs the predicted band and [`MARGIN`] cover ([`ring`]).
pub fn study(
    recipe: &Recipe,
    input: ArrayView3<f32>,
    names: &[String],
    modes: &[PadMode],
    tol: f32,
    crop: Option<usize>,
    engine: Engine,
) -> Result<ImageStudy, Error> {
    use rayon::prelude::*;
    if modes.is_empty() {
        return Err(Error::Shape("no pad modes to compare".into()));
    }
    let recipes: Vec<Recipe> = modes.iter().map(|m| with_mode(recipe, *m)).collect();
    let Layout {
        plan,
        reach,
        predicted,
        widest,
        d,
    } = layout(recipe, input.dim(), engine)?;
    let (oc, oh, ow) = plan.output_shape();
    let maps: Vec<Ring> = recipes
        .par_iter()
        .map(|r| ring_outputs(r, input, reach, (oc, oh, ow), (0, 0), (oh, ow), d, engine))
        .collect::<Result<_, _>>()?;
    let median = median_over(&maps);
    let [pt, pb, pl, pr] = widest;
    let crop_runs = match crop {
        Some(n) => {
            let (runs, (dy, dx, gh, gw)) = crop_study(&recipes, modes, input, n, d, engine)?;
            // The truth saw only real pixels if the window's outputs lie inside the
            // full image's mode-independent region.
            let clean = dy >= pt && dy + gh + pb <= oh && dx >= pl && dx + gw + pr <= ow;
            Some((runs, clean))
        }
        None => None,
    };
    let mut channels = Vec::with_capacity(oc);
    for (k, expect) in predicted.iter().copied().enumerate().take(oc) {
        let mut band_all = [0usize; 4];
        let mut per_mode = Vec::with_capacity(modes.len());
        for (m, map) in modes.iter().zip(&maps) {
            let b = band(map, &median, k, tol, expect);
            for e in 0..4 {
                band_all[e] = band_all[e].max(b[e]);
            }
            per_mode.push((
                *m,
                b.into_iter().max().unwrap_or(0),
                by_distance(map, &median, k),
            ));
        }
        let crop_k = crop_runs
            .as_ref()
            .map(|(runs, _)| {
                runs.iter()
                    .map(|(m, got, truth)| (*m, by_distance(got, truth, k)))
                    .collect()
            })
            .unwrap_or_default();
        channels.push(ChannelStudy {
            name: names.get(k).cloned().unwrap_or_else(|| format!("ch{k}")),
            band: band_all,
            predicted: expect,
            modes: per_mode,
            crop: crop_k,
        });
    }
    let crop_truth_clean = crop_runs.as_ref().map(|(_, c)| *c);
    Ok(ImageStudy {
        shape: (oc, oh, ow),
        channels,
        maps,
        median,
        crop_truth_clean,
    })
}

/// For each mode: (mode, the window's result, the truth over the window), both
/// on the window's ring `d` wide; and where the window's outputs sit in the
/// full output (dy, dx, height, width). The truth is the median over modes of
/// the full image's outputs there (far enough inside, they all agree).
#[allow(clippy::type_complexity)]
fn crop_study(
    recipes: &[Recipe],
    modes: &[PadMode],
    input: ArrayView3<f32>,
    n: usize,
    d: usize,
    engine: Engine,
) -> Result<(Vec<(PadMode, Ring, Ring)>, (usize, usize, usize, usize)), Error> {
    use rayon::prelude::*;
    let (c, h, w) = input.dim();
    if 2 * n >= h || 2 * n >= w {
        return Err(Error::Shape(format!(
            "--crop {n} leaves no window in a {w}×{h} image"
        )));
    }
    let window = input.slice(s![.., n..h - n, n..w - n]);
    let full = Plan::new(&recipes[0], (c, h, w), engine)?;
    let win = Plan::new(&recipes[0], window.dim(), engine)?;
    let ((fr, fc), (wr, wc)) = (full.field(), win.field());
    // Window output y covers input rows from n + y·J − P_w; full output y' from y'·J − P_f.
    let shift = |f: ReceptiveField, wf: ReceptiveField| -> Result<usize, Error> {
        let num = (n + f.offset) as isize - wf.offset as isize;
        if num < 0 || num as usize % f.jump != 0 {
            return Err(Error::Shape(format!(
                "--crop {n} does not line up the window's outputs with the full image's \
                 (step {} input pixels between outputs); use a multiple of {}",
                f.jump, f.jump
            )));
        }
        Ok(num as usize / f.jump)
    };
    let (dy, dx) = (shift(fr, wr)?, shift(fc, wc)?);
    let (_, fh, fw) = full.output_shape();
    let (wc_, gh, gw) = win.output_shape();
    if dy + gh > fh || dx + gw > fw {
        return Err(Error::Shape(format!(
            "--crop {n}: the window's outputs do not fit inside the full image's"
        )));
    }
    let full_reach = (Reach::of(&full, true), Reach::of(&full, false));
    let win_reach = (Reach::of(&win, true), Reach::of(&win, false));
    let shape = (wc_, gh, gw);
    let (got, truths): (Vec<Ring>, Vec<Ring>) = recipes
        .par_iter()
        .map(|r| -> Result<(Ring, Ring), Error> {
            Ok((
                ring_outputs(r, window, win_reach, shape, (0, 0), (gh, gw), d, engine)?,
                ring_outputs(r, input, full_reach, shape, (dy, dx), (fh, fw), d, engine)?,
            ))
        })
        .collect::<Result<Vec<_>, _>>()?
        .into_iter()
        .unzip();
    let truth = median_over(&truths);
    let out = modes
        .iter()
        .zip(got)
        .map(|(m, g)| (*m, g, truth.clone()))
        .collect();
    Ok((out, (dy, dx, gh, gw)))
}
