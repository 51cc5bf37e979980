//! Edge measures of one map: the samples above a threshold, their connected
//! components, and the largest one's area, bounding box and centroid; and
//! Otsu's threshold (Otsu, IEEE SMC 9(1), 1979).
//!
//! Conventions: a sample is "above" when it is strictly greater than the
//! threshold (as `above_fraction`). Components are 8-connected by default
//! (a pixel touches the eight around it) or 4-connected (edges only). The
//! largest component is the one with most pixels; of equal ones, the one met
//! first in raster order (top row first, left to right). Its bounding box is
//! inclusive, in map pixels, (x0, y0) the top-left, x the column; its centroid
//! is the mean column and row of its pixels, pixel centres at whole numbers.
//!
//! Labelling works on runs (a row's maximal stretches of samples above the
//! threshold) joined by union-find, written here rather than taken from
//! imageproc's `connected_components`: that one keeps a union-find node of two
//! `usize` per pixel and a `u32` label image, 24 bytes a pixel (400 MB for a
//! 4096² map, two maps at once in a run), and took 5.5 to 15 times as long on
//! the same thresholded 4096² maps, with the same counts
//! (`cargo run --release --example label_compare`, 2026-12-03, this 2-core
//! machine: 0.055 s against 0.301 s at the densest level). The measures need
//! only the runs, never a per-pixel label image.

use rayon::prelude::*;

/// Which neighbours join pixels into one component.
/// Written as the number 4 or 8.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(into = "u8", try_from = "u8")]
pub enum Connectivity {
    /// Left, right, up, down.
    Four,
    /// Those and the four diagonals.
    #[default]
    Eight,
}

impl From<Connectivity> for u8 {
    fn from(c: Connectivity) -> u8 {
        match c {
            Connectivity::Four => 4,
            Connectivity::Eight => 8,
        }
    }
}

impl TryFrom<u8> for Connectivity {
    type Error = String;
    fn try_from(n: u8) -> Result<Self, String> {
        n.to_string().parse()
    }
}

impl std::str::FromStr for Connectivity {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "8" => Ok(Connectivity::Eight),
            "4" => Ok(Connectivity::Four),
            _ => Err(format!("connectivity '{s}': give 8 or 4")),
        }
    }
}

impl std::fmt::Display for Connectivity {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Connectivity::Four => "4",
            Connectivity::Eight => "8",
        })
    }
}

/// The threshold of the edge measures: a value, or Otsu's level of each map.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Threshold {
    /// One value for every map.
    Value(f32),
    /// Each map's own Otsu threshold ([`otsu`]).
    Otsu,
}

impl Threshold {
    /// The value, when one was given.
    pub fn value(self) -> Option<f32> {
        match self {
            Threshold::Value(v) => Some(v),
            Threshold::Otsu => None,
        }
    }
}

impl std::str::FromStr for Threshold {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        if s == "otsu" {
            return Ok(Threshold::Otsu);
        }
        match s.parse::<f32>() {
            Ok(v) if v.is_finite() => Ok(Threshold::Value(v)),
            _ => Err(format!("threshold '{s}' is not a finite number (nor otsu)")),
        }
    }
}

impl std::fmt::Display for Threshold {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Threshold::Value(v) => write!(f, "{v}"),
            Threshold::Otsu => f.write_str("otsu"),
        }
    }
}

/// A number, or the text `otsu`, in manifests and journals.
impl serde::Serialize for Threshold {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        match self {
            Threshold::Value(v) => s.serialize_f32(*v),
            Threshold::Otsu => s.serialize_str("otsu"),
        }
    }
}

impl<'de> serde::Deserialize<'de> for Threshold {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        #[derive(serde::Deserialize)]
        #[serde(untagged)]
        enum In {
            Number(f32),
            Word(String),
        }
        match In::deserialize(d)? {
            In::Number(v) => Ok(Threshold::Value(v)),
            In::Word(w) => w.parse().map_err(serde::de::Error::custom),
        }
    }
}

/// The largest component of a map.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Largest {
    /// Pixels in it.
    pub area: u64,
    /// Leftmost column.
    pub x0: u32,
    /// Top row.
    pub y0: u32,
    /// Rightmost column (inclusive).
    pub x1: u32,
    /// Bottom row (inclusive).
    pub y1: u32,
    /// Mean column.
    pub cx: f64,
    /// Mean row.
    pub cy: f64,
}

/// The components of the samples above a threshold.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Regions {
    /// The threshold used.
    pub threshold: f64,
    /// Samples above it.
    pub above: u64,
    /// Connected components.
    pub components: u64,
    /// The largest, when there is one.
    pub largest: Option<Largest>,
}

/// One run: row, first and one-past-last column.
#[derive(Debug, Clone, Copy)]
struct Run {
    row: u32,
    start: u32,
    end: u32,
}

/// Runs of `above` per row over columns [c0, c1) of rows [r0, r1), rows in
/// order (parallel over bands of rows). Each row becomes a bit mask first,
/// 64 samples a word, and runs are read off the mask's 0→1 and 1→0
/// transitions with bit operations: the work follows the number of runs, and
/// a noisy map (an orientation's, half of it above) costs no mispredicted
/// branch per sample.
fn runs_of<T: Copy + Sync, F: Fn(T) -> bool + Sync>(
    values: &[T],
    w: usize,
    (r0, r1): (usize, usize),
    (c0, c1): (usize, usize),
    above: F,
) -> Vec<Run> {
    let rows = r1.saturating_sub(r0);
    let band = (1usize << 16).div_ceil(w.max(1)).max(1);
    let parts: Vec<Vec<Run>> = (0..rows.div_ceil(band))
        .into_par_iter()
        .map(|b| {
            let mut out = Vec::new();
            let mut words: Vec<u64> = Vec::new();
            for r in r0 + b * band..(r0 + (b + 1) * band).min(r1) {
                let row = &values[r * w + c0..r * w + c1.max(c0)];
                words.clear();
                words.extend(row.chunks(64).map(|chunk| mask_word(chunk, &above)));
                // Bit i of `before` is the sample before position i; the
                // transitions alternate: a run's start, its end, the next start…
                let mut carry = 0u64;
                let mut open: Option<usize> = None;
                for (k, &m) in words.iter().enumerate() {
                    let mut t = m ^ ((m << 1) | carry);
                    while t != 0 {
                        let p = k * 64 + t.trailing_zeros() as usize;
                        t &= t - 1;
                        match open.take() {
                            None => open = Some(p),
                            Some(s) => out.push(Run {
                                row: r as u32,
                                start: (c0 + s) as u32,
                                end: (c0 + p) as u32,
                            }),
                        }
                    }
                    carry = m >> 63;
                }
                // A run open at the end of the row ends there.
                if let Some(s) = open {
                    out.push(Run {
                        row: r as u32,
                        start: (c0 + s) as u32,
                        end: (c0 + row.len()) as u32,
                    });
                }
            }
            out
        })
        .collect();
    parts.concat()
}

/// Bit i of the word is `above(chunk[i])` (a chunk of at most 64). The
/// comparisons go to bytes (a loop that vectorises), and each 8 bytes of 0/1
/// are packed into 8 bits by one multiplication: with bytes b₀…b₇, the top
/// byte of x·0x0102040810204080 is Σ bᵢ·2ⁱ (no carries cross, as each
/// partial sum is at most 1). Checked against the plain rule in the tests.
#[inline]
fn mask_word<T: Copy, F: Fn(T) -> bool>(chunk: &[T], above: &F) -> u64 {
    let mut bytes = [0u8; 64];
    for (b, v) in bytes.iter_mut().zip(chunk) {
        *b = u8::from(above(*v));
    }
    let mut m = 0u64;
    for (k, eight) in bytes.chunks_exact(8).enumerate() {
        let x = u64::from_le_bytes(eight.try_into().expect("eight bytes"));
        m |= (x.wrapping_mul(0x0102_0408_1020_4080) >> 56) << (8 * k);
    }
    m
}

fn find(parent: &mut [u32], mut i: u32) -> u32 {
    while parent[i as usize] != i {
        let p = parent[i as usize];
        parent[i as usize] = parent[p as usize];
        i = p;
    }
    i
}

/// Joins runs of neighbouring rows that touch; gives each run's component
/// root, roots being the component's first run in raster order.
///
/// Bands of rows are joined in parallel, each in its own part of the parent
/// array (its runs' links stay inside it), then the rows where bands meet are
/// joined, and every run's root is read off without changing the array.
fn join(runs: &[Run], conn: Connectivity) -> Vec<u32> {
    let mut parent: Vec<u32> = (0..runs.len() as u32).collect();
    let reach = u32::from(conn == Connectivity::Eight);
    // Band starts: run indices where a row begins, about evenly spaced.
    let parts = rayon::current_num_threads().max(1) * 4;
    let mut starts = vec![0usize];
    for k in 1..parts {
        let mut i = runs.len() * k / parts;
        while i > 0 && i < runs.len() && runs[i].row == runs[i - 1].row {
            i += 1;
        }
        if i < runs.len() && i > *starts.last().expect("one start") {
            starts.push(i);
        }
    }
    starts.push(runs.len());
    {
        let mut pieces: Vec<(usize, &mut [u32])> = Vec::new();
        let mut rest: &mut [u32] = &mut parent;
        for w in starts.windows(2) {
            let (piece, tail) = rest.split_at_mut(w[1] - w[0]);
            pieces.push((w[0], piece));
            rest = tail;
        }
        pieces.into_par_iter().for_each(|(first, piece)| {
            join_rows(
                &runs[first..first + piece.len()],
                piece,
                first as u32,
                reach,
            );
        });
    }
    // Where bands meet: the first row of a band against the last of the one before.
    for w in starts.windows(3) {
        let (prev, at, end) = (w[0], w[1], w[2]);
        if runs[at].row != runs[at - 1].row + 1 {
            continue;
        }
        let above_row = runs[at - 1].row;
        let mut a0 = at;
        while a0 > prev && runs[a0 - 1].row == above_row {
            a0 -= 1;
        }
        let mut j = a0;
        for i in at..end {
            if runs[i].row != runs[at].row {
                break;
            }
            let run = runs[i];
            while j < at && runs[j].end + reach <= run.start {
                j += 1;
            }
            let mut k = j;
            while k < at && runs[k].start < run.end + reach {
                let (ra, rb) = (find(&mut parent, k as u32), find(&mut parent, i as u32));
                if ra != rb {
                    parent[ra.max(rb) as usize] = ra.min(rb);
                }
                k += 1;
            }
        }
    }
    let parent = &parent;
    (0..runs.len() as u32)
        .into_par_iter()
        .map(|mut i| {
            while parent[i as usize] != i {
                i = parent[i as usize];
            }
            i
        })
        .collect()
}

/// Joins the runs of one band (`runs`, whose first has index `first`) in
/// its part of the parent array.
fn join_rows(runs: &[Run], parent: &mut [u32], first: u32, reach: u32) {
    // Local indices inside; stored values are global.
    let local = |g: u32| g - first;
    let find_local = |parent: &mut [u32], i: usize| -> usize {
        let mut i = i;
        while local(parent[i]) as usize != i {
            let p = local(parent[i]) as usize;
            parent[i] = parent[p];
            i = p;
        }
        i
    };
    // The row above's runs are [j, above_end); `j` only moves past runs that
    // end before the current run can reach, which no later run of the row
    // reaches either.
    let (mut j, mut above_end, mut row_start) = (0usize, 0usize, 0usize);
    for i in 0..runs.len() {
        let run = runs[i];
        if i == 0 || run.row != runs[i - 1].row {
            if i > 0 && runs[i - 1].row + 1 == run.row {
                j = row_start;
                above_end = i;
            } else {
                j = i;
                above_end = i;
            }
            row_start = i;
        }
        while j < above_end && runs[j].end + reach <= run.start {
            j += 1;
        }
        let mut k = j;
        let mut mine = i;
        while k < above_end && runs[k].start < run.end + reach {
            let ra = find_local(parent, k);
            if mine == i && local(parent[i]) as usize == i {
                // The first run above it that touches: take its root.
                parent[i] = ra as u32 + first;
                mine = ra;
            } else {
                let rb = find_local(parent, mine);
                if ra != rb {
                    // The earlier run stays root, so roots are first in raster order.
                    parent[ra.max(rb)] = ra.min(rb) as u32 + first;
                }
                mine = ra.min(rb);
            }
            k += 1;
        }
    }
}

/// The components of the samples of `values` (`w × h`, row-major) above
/// `threshold`, leaving out the `inset` outermost rows and columns on every
/// side (a fixture's or tile's outline there is not a defect); coordinates
/// stay those of the whole map. `above` counts the samples above the
/// threshold in the whole map.
pub fn regions(
    values: &[f32],
    w: usize,
    h: usize,
    threshold: f32,
    conn: Connectivity,
    inset: usize,
) -> Regions {
    let (r1, c1) = (h.saturating_sub(inset), w.saturating_sub(inset));
    let runs = runs_of(
        values,
        w,
        (inset.min(r1), r1),
        (inset.min(c1), c1),
        |v: f32| v > threshold,
    );
    let roots = join(&runs, conn);
    // Per root: area, bbox, Σx, Σy.
    let mut acc: Vec<(u64, u32, u32, u32, u32, f64, f64)> = Vec::new();
    let mut slot = vec![u32::MAX; runs.len()];
    let mut components = 0u64;
    let mut above = 0u64;
    for (run, &root) in runs.iter().zip(&roots) {
        let k = if slot[root as usize] == u32::MAX {
            slot[root as usize] = acc.len() as u32;
            acc.push((0, u32::MAX, u32::MAX, 0, 0, 0.0, 0.0));
            components += 1;
            acc.len() - 1
        } else {
            slot[root as usize] as usize
        };
        let len = u64::from(run.end - run.start);
        let a = &mut acc[k];
        a.0 += len;
        a.1 = a.1.min(run.start);
        a.2 = a.2.min(run.row);
        a.3 = a.3.max(run.end - 1);
        a.4 = a.4.max(run.row);
        // Σ of columns start..end−1 and the row times the length.
        a.5 += (u64::from(run.start) + u64::from(run.end - 1)) as f64 * len as f64 / 2.0;
        a.6 += f64::from(run.row) * len as f64;
        above += len;
    }
    if inset > 0 {
        above = values
            .par_chunks(1 << 16)
            .map(|c| c.iter().filter(|v| **v > threshold).count() as u64)
            .sum();
    }
    // Components are numbered by their first run, so the first largest is
    // the one met first in raster order.
    let largest = acc
        .iter()
        .enumerate()
        .max_by(|(i, a), (j, b)| a.0.cmp(&b.0).then(j.cmp(i)))
        .map(|(_, a)| Largest {
            area: a.0,
            x0: a.1,
            y0: a.2,
            x1: a.3,
            y1: a.4,
            cx: a.5 / a.0 as f64,
            cy: a.6 / a.0 as f64,
        });
    Regions {
        threshold: threshold as f64,
        above,
        components,
        largest,
    }
}

/// Component labels of the pixels where `mask` is not 0: `labels[i]` is 0 for
/// background, else 1, 2, … numbered in raster order of first pixel.
pub struct Labels {
    /// One label per pixel.
    pub labels: Vec<u32>,
    /// Components.
    pub count: usize,
}

/// Labels the nonzero pixels of `mask` (`w × h`) into connected components.
pub fn label(mask: &[u8], w: usize, h: usize, conn: Connectivity) -> Labels {
    let runs = runs_of(mask, w, (0, h), (0, w), |v: u8| v != 0);
    let roots = join(&runs, conn);
    let mut number = vec![0u32; runs.len()];
    let mut count = 0u32;
    let mut labels = vec![0u32; w * h];
    for (run, &root) in runs.iter().zip(&roots) {
        if number[root as usize] == 0 {
            count += 1;
            number[root as usize] = count;
        }
        let l = number[root as usize];
        let r = run.row as usize * w;
        labels[r + run.start as usize..r + run.end as usize].fill(l);
    }
    Labels {
        labels,
        count: count as usize,
    }
}

/// Otsu's threshold of `values`, whose finite samples lie in `[lo, hi]`: a
/// histogram of 256 equal bins over [lo, hi], the split that maximises the
/// between-class variance w₀w₁(μ₀ − μ₁)², and the centre of the last bin of
/// the lower class, so that `value > threshold` is the upper class. This is
/// scikit-image's `threshold_otsu(image, nbins=256)` (documentation of
/// skimage.filters.threshold_otsu, 0.26; checked in tools/check_combine.py).
/// A map of one value gives that value.
///
/// Written here because imageproc's `otsu_level` takes 8-bit images only, and
/// accumulates level × count in `u32`, which overflows for images of more
/// than 2³²/255 ≈ 16.8 million pixels at high levels.
pub fn otsu(values: &[f32], lo: f64, hi: f64) -> f64 {
    let bins = OtsuBins::new(lo, hi);
    values.par_chunks(1 << 16).for_each(|c| bins.add(c));
    bins.level()
}

/// Bins of the histogram behind [`otsu`], filled a chunk at a time from any
/// thread (so the statistics' own pass over a map can fill it as it goes).
pub struct OtsuBins {
    lo: f64,
    hi: f64,
    norm: f64,
    eps: f32,
    counts: std::sync::Mutex<[u64; OTSU_BINS]>,
}

const OTSU_BINS: usize = 256;

impl OtsuBins {
    /// Empty bins over [lo, hi], the extremes of the map's finite samples.
    pub fn new(lo: f64, hi: f64) -> OtsuBins {
        let span = if hi > lo { hi - lo } else { 1.0 };
        // numpy.histogram's rule: (v − lo)·bins/(hi − lo), bins half open, the last closed.
        let norm = OTSU_BINS as f64 / span;
        // How far an f32 bin position can stray from the f64 one: rounding of
        // lo and of each sample's offset, relative to the range.
        let eps = (1e-4 + OTSU_BINS as f64 * (lo.abs() + hi.abs()) / span * 2.4e-7) as f32;
        OtsuBins {
            lo,
            hi,
            norm,
            eps,
            counts: std::sync::Mutex::new([0; OTSU_BINS]),
        }
    }

    /// Counts the finite samples of `c` (with AVX2 where the CPU has it).
    pub fn add(&self, c: &[f32]) {
        #[cfg(target_arch = "x86_64")]
        if crate::engine::simd::avx2() {
            // SAFETY: the CPU has AVX2 (checked at run time just above).
            unsafe { self.add_avx2(c) };
            return;
        }
        self.add_body(c);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn add_avx2(&self, c: &[f32]) {
        self.add_body(c);
    }

    #[inline(always)]
    fn add_body(&self, c: &[f32]) {
        const BINS: usize = OTSU_BINS;
        let (lo, norm, eps) = (self.lo, self.norm, self.eps);
        let exact = |v: f32| {
            if v.is_finite() {
                ((v as f64 - lo) * norm).clamp(0.0, (BINS - 1) as f64) as u16
            } else {
                BINS as u16
            }
        };
        let (lo32, norm32, top) = (lo as f32, norm as f32, (BINS - 1) as f32);
        let mut h = [[0u32; BINS + 1]; 4];
        // A small block at a time, on the stack: a heap buffer per chunk
        // cost more in fresh pages than the arithmetic.
        let mut bins = [0u16; 1024];
        for vs in c.chunks(1024) {
            let bins = &mut bins[..vs.len()];
            if eps < 0.25 {
                for (bs, vs) in bins.chunks_mut(64).zip(vs.chunks(64)) {
                    // The bin, and whether the fraction past its lower edge is
                    // too near 0 or 1 to trust (NaN and ∞ fail too).
                    let mut doubt = false;
                    for (b, v) in bs.iter_mut().zip(vs) {
                        let x = (*v - lo32) * norm32;
                        let k = x.clamp(0.0, top) as u16;
                        let f = x - f32::from(k);
                        doubt |= !(f > eps && f < 1.0 - eps);
                        *b = k;
                    }
                    if doubt {
                        for (b, v) in bs.iter_mut().zip(vs) {
                            *b = exact(*v);
                        }
                    }
                }
            } else {
                for (b, v) in bins.iter_mut().zip(vs) {
                    *b = exact(*v);
                }
            }
            for q in bins.chunks(4) {
                for (k, b) in q.iter().enumerate() {
                    h[k][*b as usize] += 1;
                }
            }
        }
        let mut counts = self.counts.lock().unwrap_or_else(|e| e.into_inner());
        for (i, t) in counts.iter_mut().enumerate() {
            *t += h.iter().map(|h| u64::from(h[i])).sum::<u64>();
        }
    }

    /// The threshold (see [`otsu`]).
    pub fn level(&self) -> f64 {
        const BINS: usize = OTSU_BINS;
        let (lo, hi) = (self.lo, self.hi);
        if hi <= lo || hi.is_nan() || lo.is_nan() {
            return lo;
        }
        let hist = *self.counts.lock().unwrap_or_else(|e| e.into_inner());
        let width = (hi - lo) / BINS as f64;
        let centre = |i: usize| lo + (i as f64 + 0.5) * width;
        let total: f64 = hist.iter().map(|&c| c as f64).sum();
        let total_sum: f64 = hist
            .iter()
            .enumerate()
            .map(|(i, &c)| c as f64 * centre(i))
            .sum();
        let (mut w0, mut s0) = (0.0f64, 0.0f64);
        let (mut best, mut best_var) = (0usize, -1.0f64);
        for (i, &c) in hist.iter().enumerate().take(BINS - 1) {
            w0 += c as f64;
            s0 += c as f64 * centre(i);
            let w1 = total - w0;
            if w0 == 0.0 || w1 == 0.0 {
                continue;
            }
            let (m0, m1) = (s0 / w0, (total_sum - s0) / w1);
            let var = w0 * w1 * (m0 - m1) * (m0 - m1);
            if var > best_var {
                best_var = var;
                best = i;
            }
        }
        centre(best)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Flood fill, pixel by pixel: the obviously correct labelling.
    fn flood(mask: &[bool], w: usize, h: usize, conn: Connectivity) -> Vec<u64> {
        let mut seen = vec![false; w * h];
        let mut areas = Vec::new();
        for start in 0..w * h {
            if !mask[start] || seen[start] {
                continue;
            }
            let mut stack = vec![start];
            seen[start] = true;
            let mut area = 0;
            while let Some(p) = stack.pop() {
                area += 1;
                let (r, c) = ((p / w) as isize, (p % w) as isize);
                for dr in -1isize..=1 {
                    for dc in -1isize..=1 {
                        if (dr, dc) == (0, 0) || (conn == Connectivity::Four && dr != 0 && dc != 0)
                        {
                            continue;
                        }
                        let (rr, cc) = (r + dr, c + dc);
                        if rr < 0 || cc < 0 || rr >= h as isize || cc >= w as isize {
                            continue;
                        }
                        let q = rr as usize * w + cc as usize;
                        if mask[q] && !seen[q] {
                            seen[q] = true;
                            stack.push(q);
                        }
                    }
                }
            }
            areas.push(area);
        }
        areas
    }

    #[test]
    fn runs_label_as_flood_fill_does() {
        let mut rng = 0x1234_5678_9abc_def0u64;
        for case in 0..200 {
            let (w, h) = (1 + case % 17, 1 + (case / 3) % 13);
            let density = [0.2, 0.45, 0.6, 0.8][case % 4];
            let vals: Vec<f32> = (0..w * h)
                .map(|_| {
                    rng ^= rng << 13;
                    rng ^= rng >> 7;
                    rng ^= rng << 17;
                    (rng % 1000) as f32 / 1000.0
                })
                .collect();
            let t = 1.0 - density as f32;
            for conn in [Connectivity::Four, Connectivity::Eight] {
                let mask: Vec<bool> = vals.iter().map(|v| *v > t).collect();
                let want = flood(&mask, w, h, conn);
                let got = regions(&vals, w, h, t, conn, 0);
                assert_eq!(got.components, want.len() as u64, "case {case} {conn}");
                assert_eq!(
                    got.largest.map_or(0, |l| l.area),
                    want.iter().copied().max().unwrap_or(0),
                    "case {case} {conn}"
                );
                let m: Vec<u8> = mask.iter().map(|&b| u8::from(b)).collect();
                assert_eq!(label(&m, w, h, conn).count, want.len(), "case {case}");
            }
        }
    }

    #[test]
    fn mask_words_pack_in_order() {
        let mut rng = 77u64;
        for len in [1usize, 7, 8, 9, 63, 64] {
            let v: Vec<u8> = (0..len)
                .map(|_| {
                    rng = rng
                        .wrapping_mul(6364136223846793005)
                        .wrapping_add(1442695040888963407);
                    (rng >> 60) as u8
                })
                .collect();
            let want = v
                .iter()
                .enumerate()
                .fold(0u64, |m, (i, x)| m | (u64::from(*x > 7) << i));
            assert_eq!(mask_word(&v, &|x: u8| x > 7), want, "{len}");
        }
    }

    #[test]
    fn box_and_centroid_of_an_l_shape() {
        // Columns 1–3 of row 1, and column 1 of rows 2–3: 5 pixels.
        let (w, h) = (5, 5);
        let mut v = vec![0.0f32; w * h];
        for (r, c) in [(1, 1), (1, 2), (1, 3), (2, 1), (3, 1)] {
            v[r * w + c] = 1.0;
        }
        v[4 * w + 4] = 1.0;
        let g = regions(&v, w, h, 0.5, Connectivity::Eight, 0);
        assert_eq!(regions(&v, w, h, 0.5, Connectivity::Eight, 1).components, 1);
        assert_eq!(g.components, 2);
        let l = g.largest.unwrap();
        assert_eq!((l.area, l.x0, l.y0, l.x1, l.y1), (5, 1, 1, 3, 3));
        assert!((l.cx - 8.0 / 5.0).abs() < 1e-12 && (l.cy - 8.0 / 5.0).abs() < 1e-12);
    }

    #[test]
    fn otsu_splits_two_groups() {
        let mut v = vec![0.1f32; 600];
        v.extend(vec![0.9f32; 400]);
        let t = otsu(&v, 0.1, 0.9);
        assert!(t > 0.1 && t < 0.9, "{t}");
        assert_eq!(otsu(&[0.5, 0.5], 0.5, 0.5), 0.5);
    }
}
