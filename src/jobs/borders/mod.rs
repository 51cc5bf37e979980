//! The border study: how much the pad mode changes a recipe's maps, and how far in.
//!
//! **Modes study.** The recipe runs once per pad mode (every conv stage takes that
//! mode). At each output pixel the median over modes is the reference; a mode's
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

pub use job::{run_borders, BordersJob, BordersSummary};

use ndarray::{s, Array3, ArrayView3};

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

/// Per-distance statistics of |a − b| over an h × w plane.
pub fn by_distance(a: &[f32], b: &[f32], h: usize, w: usize) -> Vec<DistanceStat> {
    let mut v = vec![DistanceStat::default(); h.min(w).div_ceil(2)];
    for y in 0..h {
        for x in 0..w {
            let (d, _) = edge_distance(y, x, h, w);
            let e = (a[y * w + x] as f64 - b[y * w + x] as f64).abs();
            let s = &mut v[d];
            s.sum += e;
            s.max = s.max.max(e);
            s.count += 1;
        }
    }
    v
}

/// Band per edge (top, bottom, left, right): 1 + the largest distance from that
/// edge at which |a − b| > tol. Each edge is measured away from the corners: the
/// top band looks only at columns outside the left and right bands that `expect`
/// predicts (and so on), so one edge's padding is not counted for another. Where
/// the predicted side bands leave no such columns, each pixel counts for its
/// nearest edge instead.
pub fn band(a: &[f32], b: &[f32], h: usize, w: usize, tol: f32, expect: [usize; 4]) -> [usize; 4] {
    let [pt, pb, pl, pr] = expect;
    let cols_free = pl + pr < w;
    let rows_free = pt + pb < h;
    let mut out = [0usize; 4];
    for y in 0..h {
        for x in 0..w {
            let diff = (a[y * w + x] - b[y * w + x]).abs();
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
    }
    out
}

/// Per-pixel median over modes (mean of the middle two for an even count).
pub fn median_over(maps: &[Array3<f32>]) -> Array3<f32> {
    let mut med = maps[0].clone();
    let mut vals = vec![0.0f32; maps.len()];
    let views: Vec<&[f32]> = maps
        .iter()
        .map(|m| m.as_slice().expect("standard layout"))
        .collect();
    for (i, out) in med
        .as_slice_mut()
        .expect("standard layout")
        .iter_mut()
        .enumerate()
    {
        for (v, m) in vals.iter_mut().zip(&views) {
            *v = m[i];
        }
        vals.sort_by(f32::total_cmp);
        let n = vals.len();
        *out = if n % 2 == 1 {
            vals[n / 2]
        } else {
            0.5 * (vals[n / 2 - 1] + vals[n / 2])
        };
    }
    med
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
    /// Maps per mode (full image), in the order of `modes`.
    pub maps: Vec<Array3<f32>>,
    /// The per-pixel median over modes.
    pub median: Array3<f32>,
    /// With a crop study: whether the truth was free of the full image's own
    /// border effects (the crop is at least the predicted band).
    pub crop_truth_clean: Option<bool>,
}

/// Runs both studies on one input (`c × h × w`).
pub fn study(
    recipe: &Recipe,
    input: ArrayView3<f32>,
    names: &[String],
    modes: &[PadMode],
    tol: f32,
    crop: Option<usize>,
    engine: Engine,
) -> Result<ImageStudy, Error> {
    if modes.is_empty() {
        return Err(Error::Shape("no pad modes to compare".into()));
    }
    let (_, h, w) = input.dim();
    let plans: Vec<Plan> = modes
        .iter()
        .map(|m| Plan::new(&with_mode(recipe, *m), input.dim(), engine))
        .collect::<Result<_, _>>()?;
    let maps: Vec<Array3<f32>> = plans
        .iter()
        .map(|p| p.run(input))
        .collect::<Result<_, _>>()?;
    let median = median_over(&maps);
    let (oc, oh, ow) = median.dim();
    let predicted: Vec<[usize; 4]> = plans[0]
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
    let [pt, pb, pl, pr] = widest;
    let plane = |a: &Array3<f32>, k: usize| -> Vec<f32> {
        a.index_axis(ndarray::Axis(0), k).iter().copied().collect()
    };
    let crop_runs = match crop {
        Some(n) => {
            let (runs, (dy, dx, gh, gw)) = crop_study(recipe, input, &median, modes, n, engine)?;
            // The truth saw only real pixels if the window's outputs lie inside the
            // full image's mode-independent region.
            let clean = dy >= pt && dy + gh + pb <= oh && dx >= pl && dx + gw + pr <= ow;
            Some((runs, clean))
        }
        None => None,
    };
    let mut channels = Vec::with_capacity(oc);
    for (k, expect) in predicted.iter().copied().enumerate().take(oc) {
        let med = plane(&median, k);
        let mut band_all = [0usize; 4];
        let mut per_mode = Vec::with_capacity(modes.len());
        for (m, map) in modes.iter().zip(&maps) {
            let y = plane(map, k);
            let b = band(&y, &med, oh, ow, tol, expect);
            for e in 0..4 {
                band_all[e] = band_all[e].max(b[e]);
            }
            per_mode.push((
                *m,
                b.into_iter().max().unwrap_or(0),
                by_distance(&y, &med, oh, ow),
            ));
        }
        let crop_k = crop_runs
            .as_ref()
            .map(|(runs, _)| {
                runs.iter()
                    .map(|(m, got, truth)| {
                        let (_, ch, cw) = got.dim();
                        (*m, by_distance(&plane(got, k), &plane(truth, k), ch, cw))
                    })
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

/// For each mode: (mode, window result, truth over the window); and where the
/// window's outputs sit in the full output (dy, dx, height, width).
#[allow(clippy::type_complexity)]
fn crop_study(
    recipe: &Recipe,
    input: ArrayView3<f32>,
    median: &Array3<f32>,
    modes: &[PadMode],
    n: usize,
    engine: Engine,
) -> Result<
    (
        Vec<(PadMode, Array3<f32>, Array3<f32>)>,
        (usize, usize, usize, usize),
    ),
    Error,
> {
    let (c, h, w) = input.dim();
    if 2 * n >= h || 2 * n >= w {
        return Err(Error::Shape(format!(
            "--crop {n} leaves no window in a {w}×{h} image"
        )));
    }
    let window = input.slice(s![.., n..h - n, n..w - n]);
    let (fr, fc) = Plan::new(recipe, (c, h, w), engine)?.field();
    let window_plans: Vec<Plan> = modes
        .iter()
        .map(|m| Plan::new(&with_mode(recipe, *m), window.dim(), engine))
        .collect::<Result<_, _>>()?;
    let (wr, wc) = window_plans[0].field();
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
    let (_, fh, fw) = median.dim();
    let mut out = Vec::with_capacity(modes.len());
    let mut placed = (dy, dx, 0, 0);
    for (m, plan) in modes.iter().zip(&window_plans) {
        let got = plan.run(window)?;
        let (_, gh, gw) = got.dim();
        if dy + gh > fh || dx + gw > fw {
            return Err(Error::Shape(format!(
                "--crop {n}: the window's outputs do not fit inside the full image's"
            )));
        }
        // The truth: the full image's result (median over modes; far enough inside
        // they all agree) over the same outputs.
        let truth = median.slice(s![.., dy..dy + gh, dx..dx + gw]).to_owned();
        placed = (dy, dx, gh, gw);
        out.push((*m, got.as_standard_layout().into_owned(), truth));
    }
    Ok((out, placed))
}
