//! Probe: across many images, the strongest responses of each output channel and
//! the input patches they see.
//!
//! For each image the recipe runs to its final maps (after any activation and
//! pooling). In each channel, responses are taken from the largest down; a
//! response is kept only if its receptive field does not overlap that of any
//! response already kept in that image and channel: it lies at least
//! sep = max(1, ceil(R / J)) output pixels away in x or in y (receptive field R,
//! jump J). So the K patches of one image are distinct places. The best K of all images
//! are kept, ordered by response (larger first), then path, then y, then x, so
//! the result is the same whatever order images finish in. Memory holds K hits
//! per channel (each with its patch), whatever the number of images.
//!
//! A hit's patch is the input region its output reads: rows y·J − P … y·J − P + R − 1
//! (likewise columns), with P the padding before in input pixels (Dumoulin &
//! Visin 2016); parts outside the image are drawn hatched and the hit is marked
//! clipped.

mod job;

pub use job::{run_probe, ProbeJob, ProbeSummary};

use std::cmp::Ordering;

use image::RgbImage;

use crate::geometry::ReceptiveField;
use crate::image_io::LoadedImage;
use crate::render::region_picture;

/// One kept response.
#[derive(Debug, Clone)]
pub struct Hit {
    /// Response value.
    pub response: f32,
    /// Input path (relative, `/`).
    pub path: String,
    /// Output row.
    pub y: usize,
    /// Output column.
    pub x: usize,
    /// Input box: top row, left column (may be negative), height, width.
    pub region: (isize, isize, usize, usize),
    /// Whether the box reaches outside the image.
    pub clipped: bool,
    /// The input patch.
    pub patch: RgbImage,
}

/// The total order of hits: response descending (NaN last), then path, y, x.
pub fn order(a: &Hit, b: &Hit) -> Ordering {
    let key = |h: &Hit| {
        if h.response.is_nan() {
            f32::NEG_INFINITY
        } else {
            h.response
        }
    };
    key(b)
        .total_cmp(&key(a))
        .then_with(|| a.path.cmp(&b.path))
        .then_with(|| a.y.cmp(&b.y))
        .then_with(|| a.x.cmp(&b.x))
}

/// Minimum distance between kept hits of one image, in output pixels.
pub fn separation(f: (ReceptiveField, ReceptiveField)) -> (usize, usize) {
    let s = |a: ReceptiveField| a.size.div_ceil(a.jump).max(1);
    (s(f.0), s(f.1))
}

/// The input region output (y, x) reads.
pub fn region_of(
    f: (ReceptiveField, ReceptiveField),
    y: usize,
    x: usize,
) -> (isize, isize, usize, usize) {
    let (r, c) = f;
    (r.start(y), c.start(x), r.size, c.size)
}

/// Up to `k` separated hits of one channel (row-major, `w` wide) of one image's maps.
pub fn channel_hits(
    map: &[f32],
    w: usize,
    k: usize,
    field: (ReceptiveField, ReceptiveField),
    img: &LoadedImage,
    path: &str,
) -> Vec<Hit> {
    let (sy, sx) = separation(field);
    let mut idx: Vec<usize> = (0..map.len()).filter(|i| map[*i].is_finite()).collect();
    let key = |i: &usize| map[*i];
    // Largest first; ties by position, so the choice is deterministic.
    idx.sort_unstable_by(|a, b| key(b).total_cmp(&key(a)).then(a.cmp(b)));
    let mut kept: Vec<(usize, usize)> = Vec::with_capacity(k);
    let (_, ih, iw) = img.data.dim();
    let mut out = Vec::with_capacity(k);
    for i in idx {
        if out.len() == k {
            break;
        }
        let (y, x) = (i / w, i % w);
        if kept
            .iter()
            .any(|(ky, kx)| y.abs_diff(*ky) < sy && x.abs_diff(*kx) < sx)
        {
            continue;
        }
        kept.push((y, x));
        let region = region_of(field, y, x);
        let clipped = region.0 < 0
            || region.1 < 0
            || region.0 + region.2 as isize > ih as isize
            || region.1 + region.3 as isize > iw as isize;
        out.push(Hit {
            response: map[i],
            path: path.to_string(),
            y,
            x,
            region,
            clipped,
            patch: region_picture(img, region, img.data.dim().0),
        });
    }
    out
}

/// Merges hits into a channel's best `k` (the order of merging does not matter).
pub fn merge(best: &mut Vec<Hit>, new: Vec<Hit>, k: usize) {
    best.extend(new);
    best.sort_by(order);
    best.truncate(k);
}
