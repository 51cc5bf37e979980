//! Spherical k-means (Coates & Ng 2012, §3 of "Learning Feature
//! Representations with K-means", from memory) and Lloyd's Euclidean k-means
//! (Lloyd 1982, "Least squares quantization in PCM", IEEE Trans. Inf. Theory
//! 28(2)) with k-means++ seeding (Arthur & Vassilvitskii 2007).
//!
//! Spherical, per iteration, with unit-length centroids d_j and samples x_i:
//! each sample goes to the centroid of largest |d_jᵀ x_i| with code
//! s_i = d_jᵀ x_i; then d_j ← Σ_{i in j} s_i x_i + d_j (the old centroid is the
//! damping that keeps a centroid from swinging or vanishing) and d_j ← d_j / ‖d_j‖.
//! The objective is Σ_i ‖x_i − s_i d_j‖² = Σ_i (‖x_i‖² − s_i²).
//!
//! Lloyd: each sample goes to the nearest centroid; a centroid becomes the
//! mean of its samples; the objective is Σ_i ‖x_i − c_j‖² (scikit-learn's
//! "inertia").
//!
//! Both: a centroid that is left with no sample is re-seeded with the sample
//! worst represented (largest residual) that no other re-seed took, and the
//! loop stops after `iterations` updates or when the objective moves by less
//! than `tolerance` (relative). The objective of the final centroids is
//! computed by one more assignment, so `objective` has one entry more than the
//! updates made. Sums run over fixed chunks added in order: the result is the
//! same for any number of threads.

use ndarray::{Array2, ArrayView2};
use rayon::prelude::*;

use super::linalg::{rows, CHUNK};
use super::rng::Rng;

/// Which k-means.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// Unit-length centroids, assignment by largest |dot product|.
    Spherical,
    /// Euclidean centroids (means), assignment by nearest.
    Lloyd,
}

/// The settings of one clustering.
#[derive(Debug, Clone)]
pub struct Settings {
    /// Spherical or Lloyd.
    pub kind: Kind,
    /// Centroids.
    pub count: usize,
    /// Most updates.
    pub iterations: usize,
    /// Stop when |J_t−1 − J_t| / J_t−1 is below this.
    pub tolerance: f64,
    /// Independent starts; the one with the lowest final objective is kept.
    pub restarts: usize,
    /// Seed of the starts.
    pub seed: u64,
}

/// A clustering's result.
#[derive(Debug, Clone)]
pub struct Clustering {
    /// `count × d` centroids, row-major, in the order they were made.
    pub centroids: Vec<f32>,
    /// Samples assigned to each centroid at the end.
    pub sizes: Vec<usize>,
    /// The objective at each assignment of the kept start (the last one is
    /// the final centroids').
    pub objective: Vec<f64>,
    /// The final objective of every start, in order.
    pub starts: Vec<f64>,
}

/// What one chunk's assignment gives.
struct Part {
    sums: Array2<f64>,
    counts: Vec<usize>,
    objective: f64,
    /// The chunk's worst-represented samples: (residual, row), largest first.
    worst: Vec<(f64, usize)>,
}

/// Assigns every sample (the rows of `x`) to a centroid and sums per centroid.
fn assign(x: ArrayView2<f32>, c: &Array2<f32>, kind: Kind, keep_worst: usize) -> Part {
    let (n, d) = x.dim();
    let k = c.nrows();
    let c_norms: Vec<f32> = c.outer_iter().map(|r| r.dot(&r)).collect();
    let ct = c.t();
    let parts: Vec<Part> = (0..n.div_ceil(CHUNK))
        .into_par_iter()
        .map(|b| {
            let lo = b * CHUNK;
            let hi = (lo + CHUNK).min(n);
            let xs = x.slice(ndarray::s![lo..hi, ..]);
            let p = xs.dot(&ct);
            let p = if p.is_standard_layout() {
                p
            } else {
                p.as_standard_layout().into_owned()
            };
            let mut sums = Array2::<f64>::zeros((k, d));
            let mut counts = vec![0usize; k];
            let mut objective = 0.0f64;
            let mut worst: Vec<(f64, usize)> = Vec::new();
            for (i, (row, prow)) in xs.outer_iter().zip(p.outer_iter()).enumerate() {
                let norm: f64 = row.iter().map(|v| (*v as f64) * (*v as f64)).sum();
                let prow = prow.as_slice().expect("standard layout");
                let (j, residual, weight) = match kind {
                    Kind::Spherical => {
                        let mut best = 0;
                        for (j, v) in prow.iter().enumerate() {
                            if v.abs() > prow[best].abs() {
                                best = j;
                            }
                        }
                        let s = prow[best] as f64;
                        (best, (norm - s * s).max(0.0), s)
                    }
                    Kind::Lloyd => {
                        let mut best = 0;
                        let mut bd = f32::INFINITY;
                        for (j, v) in prow.iter().enumerate() {
                            let dist = c_norms[j] - 2.0 * v;
                            if dist < bd {
                                bd = dist;
                                best = j;
                            }
                        }
                        (best, (norm + bd as f64).max(0.0), 1.0)
                    }
                };
                counts[j] += 1;
                objective += residual;
                let mut acc = sums.row_mut(j);
                acc.iter_mut()
                    .zip(row.iter())
                    .for_each(|(a, v)| *a += weight * *v as f64);
                if keep_worst > 0
                    && (worst.len() < keep_worst || residual > worst[worst.len() - 1].0)
                {
                    let at = worst.partition_point(|w| w.0 >= residual);
                    worst.insert(at, (residual, lo + i));
                    worst.truncate(keep_worst);
                }
            }
            Part {
                sums,
                counts,
                objective,
                worst,
            }
        })
        .collect();
    let mut total = Part {
        sums: Array2::zeros((k, d)),
        counts: vec![0; k],
        objective: 0.0,
        worst: Vec::new(),
    };
    for p in parts {
        total.sums += &p.sums;
        total
            .counts
            .iter_mut()
            .zip(&p.counts)
            .for_each(|(a, b)| *a += b);
        total.objective += p.objective;
        total.worst.extend(p.worst);
    }
    total
        .worst
        .sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
    total.worst.truncate(keep_worst);
    total
}

/// Scales a row to unit length; false when it is (nearly) zero.
fn unit(r: &mut [f32]) -> bool {
    let n = r
        .iter()
        .map(|v| (*v as f64) * (*v as f64))
        .sum::<f64>()
        .sqrt();
    if n < 1e-12 {
        return false;
    }
    r.iter_mut().for_each(|v| *v = (*v as f64 / n) as f32);
    true
}

/// Starting centroids: spherical, `count` distinct samples chosen by the
/// seed, scaled to unit length (skipping flat ones); Lloyd, k-means++.
fn start(x: ArrayView2<f32>, s: &Settings, rng: &mut Rng) -> Option<Array2<f32>> {
    let (n, d) = x.dim();
    let k = s.count;
    let mut c = Array2::<f32>::zeros((k, d));
    match s.kind {
        Kind::Spherical => {
            // A random order of the rows (Fisher–Yates, lazily), taking the
            // first `k` that are not flat.
            let mut order: Vec<u32> = (0..n as u32).collect();
            let mut made = 0;
            for i in 0..n {
                if made == k {
                    break;
                }
                let j = i + rng.below((n - i) as u64) as usize;
                order.swap(i, j);
                let mut row: Vec<f32> = x.row(order[i] as usize).to_vec();
                if unit(&mut row) {
                    c.row_mut(made).assign(&ndarray::ArrayView1::from(&row[..]));
                    made += 1;
                }
            }
            (made == k).then_some(c)
        }
        Kind::Lloyd => {
            // Greedy k-means++: each next centroid is the best (lowest total
            // squared distance) of 2 + ln k samples, each drawn with
            // probability proportional to its squared distance to the nearest
            // centroid so far (Arthur & Vassilvitskii 2007 §6 suggest the
            // trials; scikit-learn's KMeans documents the same count; from memory).
            let trials = 2 + (k as f64).ln() as usize;
            let first = rng.below(n as u64) as usize;
            c.row_mut(0).assign(&x.row(first));
            let mut near = distances(x, x.row(first), None);
            let norms: Vec<f32> = x.outer_iter().map(|r| r.dot(&r)).collect();
            for m in 1..k {
                let total: f64 = near.iter().sum();
                if total <= 0.0 {
                    return None;
                }
                let picks: Vec<usize> = (0..trials)
                    .map(|_| {
                        let mut target = rng.unit() * total;
                        for (i, v) in near.iter().enumerate() {
                            if target < *v {
                                return i;
                            }
                            target -= v;
                        }
                        n - 1
                    })
                    .collect();
                let mut cands = Array2::<f32>::zeros((trials, d));
                for (t, &i) in picks.iter().enumerate() {
                    cands.row_mut(t).assign(&x.row(i));
                }
                let pots = potentials(x, &norms, &cands, &near);
                let best = (0..trials)
                    .min_by(|&a, &b| pots[a].total_cmp(&pots[b]).then(a.cmp(&b)))
                    .expect("one trial at least");
                c.row_mut(m).assign(&x.row(picks[best]));
                near = distances(x, x.row(picks[best]), Some(&near));
            }
            Some(c)
        }
    }
}

/// Squared distance of every row of `x` (standard layout) to `p`, the
/// smaller of it and `near[i]` when given: contiguous f32 rows, so the
/// inner sum vectorises.
fn distances(x: ArrayView2<f32>, p: ndarray::ArrayView1<f32>, near: Option<&[f64]>) -> Vec<f64> {
    let (n, d) = x.dim();
    let data = x.as_slice().expect("samples are standard layout");
    let p = p.to_vec();
    let mut out = vec![0.0f64; n];
    out.par_chunks_mut(CHUNK).enumerate().for_each(|(b, dst)| {
        for (i, v) in dst.iter_mut().enumerate() {
            let at = b * CHUNK + i;
            let row = &data[at * d..(at + 1) * d];
            let dist = row
                .iter()
                .zip(&p)
                .map(|(a, b)| (a - b) * (a - b))
                .sum::<f32>() as f64;
            *v = near.map_or(dist, |nr| nr[at].min(dist));
        }
    });
    out
}

/// The total of min(near, distance to each candidate) for every candidate
/// row of `cands`, by one matrix product per chunk (‖x‖² − 2 x·c + ‖c‖²).
fn potentials(x: ArrayView2<f32>, norms: &[f32], cands: &Array2<f32>, near: &[f64]) -> Vec<f64> {
    let n = x.nrows();
    let l = cands.nrows();
    let c_norms: Vec<f32> = cands.outer_iter().map(|r| r.dot(&r)).collect();
    let ct = cands.t();
    let parts: Vec<Vec<f64>> = (0..n.div_ceil(CHUNK))
        .into_par_iter()
        .map(|b| {
            let lo = b * CHUNK;
            let hi = (lo + CHUNK).min(n);
            let p = x.slice(ndarray::s![lo..hi, ..]).dot(&ct);
            let mut pot = vec![0.0f64; l];
            for (i, row) in p.outer_iter().enumerate() {
                for (j, v) in row.iter().enumerate() {
                    let dist = (norms[lo + i] - 2.0 * v + c_norms[j]).max(0.0) as f64;
                    pot[j] += near[lo + i].min(dist);
                }
            }
            pot
        })
        .collect();
    let mut total = vec![0.0f64; l];
    for p in parts {
        total.iter_mut().zip(p).for_each(|(a, b)| *a += b);
    }
    total
}

/// Clusters the `n × d` row-major samples `data`; `progress(iteration,
/// objective)` is told each assignment's objective. `None` when the sample has
/// fewer distinct, non-flat rows than centroids.
pub fn cluster(
    data: &[f32],
    d: usize,
    s: &Settings,
    progress: &(dyn Fn(usize, usize, f64) + Sync),
) -> Option<Clustering> {
    let x = rows(data, d);
    let k = s.count;
    let mut best: Option<Clustering> = None;
    let mut starts = Vec::with_capacity(s.restarts.max(1));
    for start_no in 0..s.restarts.max(1) {
        let mut rng = Rng::new(s.seed, 1 + start_no as u64);
        let mut c = start(x, s, &mut rng)?;
        let mut objective: Vec<f64> = Vec::new();
        let mut t = 0;
        let last = loop {
            let part = assign(x, &c, s.kind, k);
            progress(start_no, t, part.objective);
            objective.push(part.objective);
            let moved = objective.len() >= 2 && {
                let (a, b) = (objective[objective.len() - 2], part.objective);
                (a - b).abs() <= s.tolerance * a.abs()
            };
            if t == s.iterations || moved {
                break part;
            }
            let mut reseeds = part.worst.iter().map(|w| w.1);
            for j in 0..k {
                let mut row = c.row_mut(j);
                if part.counts[j] == 0 {
                    if let Some(i) = reseeds.next() {
                        row.assign(&x.row(i));
                    }
                    if s.kind == Kind::Spherical {
                        unit(row.as_slice_mut().expect("standard layout"));
                    }
                    continue;
                }
                let sums = part.sums.row(j);
                match s.kind {
                    Kind::Spherical => {
                        row.iter_mut()
                            .zip(sums.iter())
                            .for_each(|(c, s)| *c = (*s + *c as f64) as f32);
                        if !unit(row.as_slice_mut().expect("standard layout")) {
                            if let Some(i) = reseeds.next() {
                                row.assign(&x.row(i));
                                unit(row.as_slice_mut().expect("standard layout"));
                            }
                        }
                    }
                    Kind::Lloyd => {
                        let n = part.counts[j] as f64;
                        row.iter_mut()
                            .zip(sums.iter())
                            .for_each(|(c, s)| *c = (*s / n) as f32);
                    }
                }
            }
            t += 1;
        };
        let fin = *objective.last().expect("one assignment at least");
        starts.push(fin);
        if best
            .as_ref()
            .map_or(true, |b| fin < *b.objective.last().expect("one"))
        {
            best = Some(Clustering {
                centroids: c.into_raw_vec_and_offset().0,
                sizes: last.counts,
                objective,
                starts: Vec::new(),
            });
        }
    }
    best.map(|mut b| {
        b.starts = starts;
        b
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lloyd_finds_two_well_separated_groups() {
        // Points at 0 and at 10 (one dimension): the centroids are the means.
        let data: Vec<f32> = [0.0f32, 0.1, -0.1, 10.0, 10.2, 9.8].to_vec();
        let s = Settings {
            kind: Kind::Lloyd,
            count: 2,
            iterations: 20,
            tolerance: 0.0,
            restarts: 3,
            seed: 1,
        };
        let c = cluster(&data, 1, &s, &|_, _, _| {}).unwrap();
        let mut cs = c.centroids.clone();
        cs.sort_by(f32::total_cmp);
        assert!(
            (cs[0] - 0.0).abs() < 1e-6 && (cs[1] - 10.0).abs() < 1e-5,
            "{cs:?}"
        );
        // Σ (x − mean)² = 0.02 + 0.08.
        assert!((c.objective.last().unwrap() - 0.1).abs() < 1e-5);
    }
}
