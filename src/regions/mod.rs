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

mod otsu;
mod runs;

pub use otsu::{otsu, OtsuBins};
use runs::{join, runs_of};

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
    let (acc, mut above) = accumulate(&runs, &roots);
    let components = acc.len() as u64;
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

/// One component's sums: area, bounding box, Σ column, Σ row (the sums are of
/// whole numbers below 2⁵³, so exact in f64 whatever their order).
#[derive(Debug, Clone, Copy)]
struct Acc(u64, u32, u32, u32, u32, f64, f64);

impl Acc {
    const EMPTY: Acc = Acc(0, u32::MAX, u32::MAX, 0, 0, 0.0, 0.0);

    fn add(&mut self, run: &runs::Run) {
        let len = u64::from(run.end - run.start);
        self.0 += len;
        self.1 = self.1.min(run.start);
        self.2 = self.2.min(run.row);
        self.3 = self.3.max(run.end - 1);
        self.4 = self.4.max(run.row);
        // Σ of columns start..end−1 and the row times the length.
        self.5 += (u64::from(run.start) + u64::from(run.end - 1)) as f64 * len as f64 / 2.0;
        self.6 += f64::from(run.row) * len as f64;
    }

    fn merge(&mut self, o: &Acc) {
        self.0 += o.0;
        self.1 = self.1.min(o.1);
        self.2 = self.2.min(o.2);
        self.3 = self.3.max(o.3);
        self.4 = self.4.max(o.4);
        self.5 += o.5;
        self.6 += o.6;
    }
}

/// The sums of every component, in the order of their roots (raster order of
/// first run), and the samples in all runs. Fixed blocks of runs in parallel:
/// a block keeps its own components' sums in a dense table and those of
/// components begun in earlier blocks aside, added to them afterwards.
fn accumulate(runs: &[runs::Run], roots: &[u32]) -> (Vec<Acc>, u64) {
    const BLOCK: usize = 1 << 16;
    type Aside = std::collections::HashMap<u32, Acc>;
    /// A block's own components (root, sums), those begun before it, its samples.
    type Block = (Vec<(u32, Acc)>, Aside, u64);
    let blocks: Vec<Block> = runs
        .par_chunks(BLOCK)
        .zip(roots.par_chunks(BLOCK))
        .enumerate()
        .map(|(b, (rs, ro))| {
            let first = (b * BLOCK) as u32;
            let mut slot = vec![u32::MAX; rs.len()];
            let mut own: Vec<(u32, Acc)> = Vec::new();
            let mut aside = Aside::new();
            let mut last: Option<(u32, Acc)> = None;
            let mut above = 0u64;
            for (run, &root) in rs.iter().zip(ro) {
                above += u64::from(run.end - run.start);
                if root >= first {
                    let k = &mut slot[(root - first) as usize];
                    if *k == u32::MAX {
                        *k = own.len() as u32;
                        own.push((root, Acc::EMPTY));
                    }
                    own[*k as usize].1.add(run);
                } else {
                    // Runs of one earlier component (often one large one)
                    // come together: keep the last one at hand.
                    match &mut last {
                        Some((r, a)) if *r == root => a.add(run),
                        _ => {
                            if let Some((r, a)) = last.take() {
                                aside.entry(r).or_insert(Acc::EMPTY).merge(&a);
                            }
                            let mut a = Acc::EMPTY;
                            a.add(run);
                            last = Some((root, a));
                        }
                    }
                }
            }
            if let Some((r, a)) = last {
                aside.entry(r).or_insert(Acc::EMPTY).merge(&a);
            }
            own.sort_unstable_by_key(|e| e.0);
            (own, aside, above)
        })
        .collect();
    let above = blocks.iter().map(|b| b.2).sum();
    let mut all: Vec<(u32, Acc)> = Vec::new();
    let mut asides = Vec::new();
    for (own, aside, _) in blocks {
        all.extend(own);
        asides.push(aside);
    }
    for aside in asides {
        for (root, a) in aside {
            let k = all
                .binary_search_by_key(&root, |e| e.0)
                .expect("a component's root lies in an earlier block");
            all[k].1.merge(&a);
        }
    }
    (all.into_iter().map(|e| e.1).collect(), above)
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
}
