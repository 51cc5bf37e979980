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

pub use job::{run_probe, ProbeJob, ProbeSummary, PROBE_COLUMNS};

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
    /// The input values drawn black and white in the patch.
    pub shown: (f32, f32),
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

/// A sample of a map by its response, larger first, then by position.
#[derive(Clone, Copy, PartialEq)]
struct Candidate {
    v: f32,
    i: usize,
}

impl Eq for Candidate {}

impl Ord for Candidate {
    /// Greater is better: a larger response, or the same one earlier in the map.
    fn cmp(&self, o: &Self) -> Ordering {
        self.v.total_cmp(&o.v).then(o.i.cmp(&self.i))
    }
}

impl PartialOrd for Candidate {
    fn partial_cmp(&self, o: &Self) -> Option<Ordering> {
        Some(self.cmp(o))
    }
}

/// The best `t` finite samples of `map` (offset by `base` in the whole map),
/// best first: a bounded heap, so memory is `t` whatever the map's size.
fn best_of(map: &[f32], base: usize, t: usize) -> Vec<Candidate> {
    use std::cmp::Reverse;
    use std::collections::BinaryHeap;
    let mut heap: BinaryHeap<Reverse<Candidate>> = BinaryHeap::with_capacity(t.min(map.len()) + 1);
    for (j, &v) in map.iter().enumerate() {
        if !v.is_finite() {
            continue;
        }
        if heap.len() == t {
            // Most samples fall below the worst kept one: one compare.
            let worst = heap.peek().expect("full").0;
            if v < worst.v {
                continue;
            }
        }
        let c = Candidate { v, i: base + j };
        if heap.len() < t {
            heap.push(Reverse(c));
        } else if let Some(mut worst) = heap.peek_mut() {
            // Replace the worst kept sample in place: one sift, not a pop and a push.
            if c > worst.0 {
                *worst = Reverse(c);
            }
        }
    }
    let mut out: Vec<Candidate> = heap.into_iter().map(|r| r.0).collect();
    out.sort_unstable_by(|a, b| b.cmp(a));
    out
}

/// Up to `k` separated hits of one channel (row-major, `w` wide) of one image's
/// maps.
///
/// Taking samples from the largest down, each kept hit rules out the samples
/// closer than the separation (sy, sx) to it: at most W − 1 of them, for a
/// window of W = (2·sy − 1)(2·sx − 1) samples. So the first k hits are found
/// among the best k·W samples, and only those are ever held: each band of
/// rows keeps its best k·W in a bounded heap, in parallel, and the bands'
/// lists are merged. The result is the same as going through the whole map in
/// order.
pub fn channel_hits(
    map: &[f32],
    w: usize,
    k: usize,
    field: (ReceptiveField, ReceptiveField),
    img: &LoadedImage,
    path: &str,
) -> Vec<Hit> {
    use rayon::prelude::*;
    let (sy, sx) = separation(field);
    let window = (2 * sy - 1).saturating_mul(2 * sx - 1);
    let t = k.saturating_mul(window).clamp(1, map.len().max(1));
    let band = (w * 64).max(t);
    let mut best: Vec<Candidate> = map
        .par_chunks(band.max(1))
        .enumerate()
        .flat_map_iter(|(b, rows)| best_of(rows, b * band, t))
        .collect();
    best.sort_unstable_by(|a, b| b.cmp(a));
    best.truncate(t);
    // Never more hits than samples, whatever `k` asks for.
    let k = k.min(map.len());
    let mut grid: std::collections::HashMap<(usize, usize), Vec<(usize, usize)>> =
        std::collections::HashMap::new();
    let (_, ih, iw) = img.data.dim();
    let shown = crate::render::display_range(img);
    let mut out = Vec::with_capacity(k);
    for Candidate { v, i } in best {
        if out.len() == k {
            break;
        }
        let (y, x) = (i / w, i % w);
        // Kept hits by grid cell of the separation's size: one closer than
        // (sy, sx) lies in this cell or a neighbouring one.
        let (cy, cx) = (y / sy, x / sx);
        let near = (cy.saturating_sub(1)..=cy + 1).any(|gy| {
            (cx.saturating_sub(1)..=cx + 1).any(|gx| {
                grid.get(&(gy, gx))
                    .is_some_and(|list: &Vec<(usize, usize)>| {
                        list.iter()
                            .any(|(ky, kx)| y.abs_diff(*ky) < sy && x.abs_diff(*kx) < sx)
                    })
            })
        });
        if near {
            continue;
        }
        grid.entry((cy, cx)).or_default().push((y, x));
        let region = region_of(field, y, x);
        let clipped = region.0 < 0
            || region.1 < 0
            || region.0 + region.2 as isize > ih as isize
            || region.1 + region.3 as isize > iw as isize;
        out.push(Hit {
            response: v,
            path: path.to_string(),
            y,
            x,
            region,
            clipped,
            patch: patch_in_context(img, region),
            shown,
        });
    }
    out
}

/// The input around a hit's receptive field: the field with a margin of half
/// its size (at least 2 samples) on every side, enlarged by the whole factor
/// a sheet cell would use, with a 2-pixel frame drawn just outside the field,
/// so the patch shows what the filter saw and where it sat. Parts outside
/// the image are hatched.
pub fn patch_in_context(
    img: &LoadedImage,
    (y0, x0, h, w): (isize, isize, usize, usize),
) -> RgbImage {
    let m = (h.max(w) / 2).max(2);
    let mi = m as isize;
    let small = region_picture(
        img,
        (y0 - mi, x0 - mi, h + 2 * m, w + 2 * m),
        img.data.dim().0,
    );
    let (sw, sh) = small.dimensions();
    let k = (crate::render::sheet::CELL / sw.max(sh).max(1)).max(1);
    let mut pic =
        image::imageops::resize(&small, sw * k, sh * k, image::imageops::FilterType::Nearest);
    let frame = image::Rgb(FRAME);
    // The field spans [m·k, (m + size)·k) in the enlarged patch.
    let (left, top) = (m as u32 * k, m as u32 * k);
    let (right, bottom) = (left + w as u32 * k, top + h as u32 * k);
    let (pw, ph) = pic.dimensions();
    let mut put = |x: u32, y: u32| {
        if x < pw && y < ph {
            pic.put_pixel(x, y, frame);
        }
    };
    for t in 1..=2 {
        for x in left.saturating_sub(2)..right + 2 {
            put(x, top.saturating_sub(t));
            put(x, bottom + t - 1);
        }
        for y in top.saturating_sub(2)..bottom + 2 {
            put(left.saturating_sub(t), y);
            put(right + t - 1, y);
        }
    }
    pic
}

/// The receptive field's frame in probe patches (a bright yellow-green that
/// neither the grey input nor the hatching uses).
pub const FRAME: [u8; 3] = [196, 255, 64];

/// Merges hits into a channel's best `k` (the order of merging does not matter).
pub fn merge(best: &mut Vec<Hit>, new: Vec<Hit>, k: usize) {
    best.extend(new);
    best.sort_by(order);
    best.truncate(k);
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::image_io::{ImageMeta, LoadedImage};

    /// The rule as stated: every finite sample in order, largest first.
    fn plain(map: &[f32], w: usize, k: usize, sep: (usize, usize)) -> Vec<(usize, usize)> {
        let mut idx: Vec<usize> = (0..map.len()).filter(|&i| map[i].is_finite()).collect();
        idx.sort_by(|a, b| map[*b].total_cmp(&map[*a]).then(a.cmp(b)));
        let mut kept: Vec<(usize, usize)> = Vec::new();
        for i in idx {
            let (y, x) = (i / w, i % w);
            if kept.len() < k
                && !kept
                    .iter()
                    .any(|(a, b)| y.abs_diff(*a) < sep.0 && x.abs_diff(*b) < sep.1)
            {
                kept.push((y, x));
            }
        }
        kept
    }

    #[test]
    fn bounded_candidates_give_the_hits_of_the_whole_map() {
        let (h, w) = (150, 97);
        let img = LoadedImage {
            data: ndarray::Array3::zeros((1, h, w)),
            channel_names: vec!["luma".into()],
            meta: ImageMeta::default(),
        };
        let mut seed = 3u64;
        let mut next = || {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (seed >> 40) as f32 / (1u64 << 24) as f32
        };
        // Smooth hills (neighbours of a peak are high too), plateaus of equal
        // values, a NaN, and plain noise.
        let hills: Vec<f32> = (0..h * w)
            .map(|i| {
                let (y, x) = ((i / w) as f32, (i % w) as f32);
                (y / 7.0).sin() * (x / 5.0).cos() + 0.01 * next()
            })
            .collect();
        let mut plateaus: Vec<f32> = (0..h * w).map(|i| ((i / w / 10) % 3) as f32).collect();
        plateaus[77] = f32::NAN;
        let noise: Vec<f32> = (0..h * w).map(|_| next()).collect();
        for map in [&hills, &plateaus, &noise] {
            for (k, size) in [(1, 1), (5, 3), (12, 9), (40, 2)] {
                let f = ReceptiveField {
                    size,
                    jump: 1,
                    offset: size / 2,
                };
                let got: Vec<(usize, usize)> = channel_hits(map, w, k, (f, f), &img, "m")
                    .iter()
                    .map(|h| (h.y, h.x))
                    .collect();
                assert_eq!(
                    got,
                    plain(map, w, k, separation((f, f))),
                    "k {k}, field {size}"
                );
            }
        }
    }
}
