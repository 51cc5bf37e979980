//! Learning a bank from patches of the images themselves (`tapmap bank learn`).
//!
//! The steps, after Coates & Ng, "Learning Feature Representations with
//! K-means" (Neural Networks: Tricks of the Trade, 2nd ed., LNCS 7700, 2012,
//! §2–3; the details below from memory of that chapter):
//!
//! 1. **Sample** patches uniformly over all valid positions of all images
//!    ([`sample`]).
//! 2. **Normalise** each patch x (its `channels · rows · cols` samples):
//!    x' = (x − mean(x)) / sqrt(var(x) + ε_c), var the population variance.
//!    The chapter's ε_c is 10 for pixels in 0…255; tapmap reads integer
//!    samples into 0…1, so its default is 10 / 255² ≈ 1.54e-4 ([`CONTRAST_EPS`]).
//!    (The chapter's own code used MATLAB's `var`, which divides by n − 1;
//!    tapmap divides by n, the variance the apply stage can compute.)
//! 3. **Whiten** (optional): z = W (x' − μ), μ the sample mean and
//!    W = U diag(1/sqrt(λ + ε_w)) Uᵀ the ZCA matrix of the sample covariance
//!    ([`linalg::zca`]; default ε_w = 0.1 for normalised patches, [`WHITEN_EPS`]).
//!    Without whitening, z = x' − μ.
//! 4. **Learn** directions v_j in z's space: principal components (largest
//!    variance first, with the variance each explains), spherical k-means
//!    centroids, or Lloyd k-means centroids ([`kmeans`]); clusters are ordered
//!    largest first.
//!
//! The bank computes f_j = v_j · z = (W v_j) · x' − (W v_j) · μ at every
//! position: its taps are W v_j (projected to sum zero, which x' cannot see),
//! its bias −(W v_j) · μ, and it asks the apply stage to normalise each
//! window's contrast with ε_c (see `pipeline::contrast`). Applying the bank
//! thus gives, on every window inside the image, exactly the feature the
//! method defines; an activation (relu, abs) makes the chapter's encodings.

pub mod kmeans;
pub mod linalg;
pub mod rng;
pub mod sample;

use std::fmt;
use std::str::FromStr;

use crate::error::Error;

/// The chapter's ε for patch normalisation, 10 in 0…255 units, in tapmap's
/// 0…1 units: 10 / 255².
pub const CONTRAST_EPS: f64 = 10.0 / (255.0 * 255.0);

/// ε of ZCA whitening for normalised patches (Coates & Ng's code used 0.1;
/// from memory).
pub const WHITEN_EPS: f64 = 0.1;

/// How the directions are learned.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    /// Principal components.
    Pca,
    /// Spherical k-means (Coates & Ng 2012).
    Kmeans,
    /// Lloyd's Euclidean k-means with k-means++ starts.
    Lloyd,
}

impl Method {
    /// The name on the command line and in bank files.
    pub fn name(self) -> &'static str {
        match self {
            Method::Pca => "pca",
            Method::Kmeans => "kmeans",
            Method::Lloyd => "lloyd",
        }
    }
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Method {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "pca" => Ok(Method::Pca),
            "kmeans" => Ok(Method::Kmeans),
            "lloyd" => Ok(Method::Lloyd),
            o => Err(format!(
                "unknown method '{o}'; expected pca, kmeans (spherical) or lloyd (Euclidean k-means)"
            )),
        }
    }
}

/// Whitening before learning.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Whiten {
    /// ZCA.
    Zca,
    /// None: only the sample mean is taken off.
    None,
}

impl FromStr for Whiten {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "zca" => Ok(Whiten::Zca),
            "none" => Ok(Whiten::None),
            o => Err(format!("unknown whitening '{o}'; expected zca or none")),
        }
    }
}

impl Whiten {
    /// The name on the command line and in bank files.
    pub fn name(self) -> &'static str {
        match self {
            Whiten::Zca => "zca",
            Whiten::None => "none",
        }
    }

    /// The default of each method: ZCA for k-means, none for PCA.
    pub fn default_for(m: Method) -> Whiten {
        match m {
            Method::Pca => Whiten::None,
            Method::Kmeans | Method::Lloyd => Whiten::Zca,
        }
    }
}

/// A patch's shape: input channels, rows, columns.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PatchShape {
    /// Input channels (1 for luma, 3 for rgb).
    pub channels: usize,
    /// Rows.
    pub rows: usize,
    /// Columns.
    pub cols: usize,
}

impl PatchShape {
    /// Samples per patch.
    pub fn dim(&self) -> usize {
        self.channels * self.rows * self.cols
    }
}

/// Normalises one patch in place: x' = (x − mean) / sqrt(var + eps), var the
/// population variance over all its samples.
pub fn normalise_patch(p: &mut [f32], eps: f64) {
    let n = p.len() as f64;
    let mean = p.iter().map(|v| *v as f64).sum::<f64>() / n;
    let var = p.iter().map(|v| (*v as f64 - mean).powi(2)).sum::<f64>() / n;
    let s = 1.0 / (var + eps).sqrt();
    p.iter_mut()
        .for_each(|v| *v = ((*v as f64 - mean) * s) as f32);
}

/// The settings of one learning (everything after sampling).
#[derive(Debug, Clone)]
pub struct LearnSettings {
    /// PCA, spherical or Lloyd k-means.
    pub method: Method,
    /// Kernels to learn.
    pub count: usize,
    /// Whitening.
    pub whiten: Whiten,
    /// ε of ZCA.
    pub whiten_eps: f64,
    /// Most k-means updates.
    pub iterations: usize,
    /// k-means stops when the objective moves by less than this (relative).
    pub tolerance: f64,
    /// k-means starts.
    pub restarts: usize,
    /// Seed (k-means starts; the sample has its own use of it).
    pub seed: u64,
}

/// What was learned, in the space of normalised patches.
#[derive(Debug, Clone)]
pub struct Learned {
    /// The sample mean μ of the normalised patches.
    pub mean: Vec<f64>,
    /// The ZCA matrix (`d × d`, row-major), when whitening.
    pub whitening: Option<Vec<f64>>,
    /// Each kernel's taps W v_j (`d` samples, channel-major, rows top to
    /// bottom), zero-sum, best first.
    pub taps: Vec<Vec<f64>>,
    /// Each kernel's bias −taps · μ.
    pub biases: Vec<f64>,
    /// The learned directions v_j themselves (before W), best first.
    pub directions: Vec<Vec<f64>>,
    /// How each kernel ranks.
    pub detail: Detail,
}

/// PCA's variances or k-means' clusters.
#[derive(Debug, Clone)]
pub enum Detail {
    /// Variance along each kept component, and the total of all components.
    Pca {
        /// Eigenvalues of the kept components.
        variance: Vec<f64>,
        /// Sum of all eigenvalues (the sample's total variance).
        total: f64,
    },
    /// Samples per kept cluster, and the objective per assignment.
    Clusters {
        /// Samples per cluster, largest first.
        sizes: Vec<usize>,
        /// Objective at each assignment of the kept start.
        objective: Vec<f64>,
        /// Final objective of every start.
        starts: Vec<f64>,
        /// Updates made.
        updates: usize,
    },
}

/// Learns `settings.count` kernels from normalised patches (`n × d`
/// row-major); `progress(start, iteration, objective)` hears every k-means
/// assignment.
pub fn learn(
    data: &[f32],
    shape: PatchShape,
    settings: &LearnSettings,
    progress: &(dyn Fn(usize, usize, f64) + Sync),
) -> Result<Learned, Error> {
    let d = shape.dim();
    let n = data.len() / d.max(1);
    let k = settings.count;
    if k == 0 {
        return Err(Error::usage("--count must be at least 1"));
    }
    if n < 2 {
        return Err(Error::usage(format!(
            "only {n} patch(es) were sampled; learning needs at least 2"
        )));
    }
    let mean = linalg::mean(data, d);
    let cov = linalg::covariance(data, d, &mean);
    let whitening = match settings.whiten {
        Whiten::Zca => Some(linalg::zca(&cov, d, settings.whiten_eps)),
        Whiten::None => None,
    };
    let (directions, detail) = match settings.method {
        Method::Pca => {
            if k > d {
                return Err(Error::usage(format!(
                    "--count {k}: a patch of {d} samples has only {d} principal components"
                )));
            }
            // Covariance of z = W (x' − μ) is W C W (W symmetric).
            let c = match &whitening {
                Some(w) => sandwich(w, &cov, d),
                None => cov.clone(),
            };
            let (values, vectors) = linalg::eigen(&c, d);
            let total = values.iter().map(|v| v.max(0.0)).sum();
            (
                vectors.into_iter().take(k).collect::<Vec<_>>(),
                Detail::Pca {
                    variance: values.into_iter().take(k).collect(),
                    total,
                },
            )
        }
        Method::Kmeans | Method::Lloyd => {
            if k > n {
                return Err(Error::usage(format!(
                    "--count {k} clusters from {n} patches: give more --patches or fewer clusters"
                )));
            }
            let z = linalg::transform(data, d, &mean, whitening.as_deref());
            let s = kmeans::Settings {
                kind: if settings.method == Method::Kmeans {
                    kmeans::Kind::Spherical
                } else {
                    kmeans::Kind::Lloyd
                },
                count: k,
                iterations: settings.iterations,
                tolerance: settings.tolerance,
                restarts: settings.restarts,
                seed: settings.seed,
            };
            let c = kmeans::cluster(&z, d, &s, progress).ok_or_else(|| {
                Error::usage(format!(
                    "the sampled patches have fewer than {k} distinct, non-flat patches; give \
                     more --patches, fewer clusters, or images with more texture"
                ))
            })?;
            let mut order: Vec<usize> = (0..k).collect();
            order.sort_by(|&a, &b| c.sizes[b].cmp(&c.sizes[a]).then(a.cmp(&b)));
            let dirs = order
                .iter()
                .map(|&j| {
                    c.centroids[j * d..(j + 1) * d]
                        .iter()
                        .map(|v| *v as f64)
                        .collect()
                })
                .collect();
            let updates = c.objective.len() - 1;
            (
                dirs,
                Detail::Clusters {
                    sizes: order.iter().map(|&j| c.sizes[j]).collect(),
                    objective: c.objective,
                    starts: c.starts,
                    updates,
                },
            )
        }
    };
    let taps: Vec<Vec<f64>> = directions
        .iter()
        .map(|v| {
            let mut t = match &whitening {
                Some(w) => (0..d)
                    .map(|i| (0..d).map(|j| w[i * d + j] * v[j]).sum())
                    .collect(),
                None => v.clone(),
            };
            let m = t.iter().sum::<f64>() / d as f64;
            t.iter_mut().for_each(|x| *x -= m);
            t
        })
        .collect();
    let biases = taps
        .iter()
        .map(|t| -t.iter().zip(&mean).map(|(a, b)| a * b).sum::<f64>())
        .collect();
    Ok(Learned {
        mean,
        whitening,
        taps,
        biases,
        directions,
        detail,
    })
}

/// A · B · A for symmetric `d × d` row-major A and B.
fn sandwich(a: &[f64], b: &[f64], d: usize) -> Vec<f64> {
    let a = ndarray::ArrayView2::from_shape((d, d), a).expect("d × d");
    let b = ndarray::ArrayView2::from_shape((d, d), b).expect("d × d");
    a.dot(&b).dot(&a).iter().copied().collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_normalised_patch_has_mean_zero_and_variance_below_one() {
        let mut p = [0.1f32, 0.5, 0.9, 0.3];
        normalise_patch(&mut p, CONTRAST_EPS);
        let m: f64 = p.iter().map(|v| *v as f64).sum::<f64>() / 4.0;
        let v: f64 = p.iter().map(|x| (*x as f64 - m).powi(2)).sum::<f64>() / 4.0;
        assert!(m.abs() < 1e-7);
        // var' = var / (var + ε) with var = (0.35² + 0.05² + 0.45² + 0.15²) / 4 = 0.0875.
        assert!((v - 0.0875 / (0.0875 + CONTRAST_EPS)).abs() < 1e-6, "{v}");
    }
}
