//! What a kernel is: sum, L1 norm, symmetries, numeric rank and, for rank-1
//! kernels, the two 1-D factors (a rank-1 kernel K = u·vᵀ can run as a vertical
//! pass with u and a horizontal pass with v; Szeliski 2010, §3.2.1, "separable
//! filtering").
//!
//! The rank is found by Gaussian elimination with complete pivoting, stopping when
//! the largest remaining entry is below `RANK_TOL` times the largest tap
//! (Golub & Van Loan, Matrix Computations, 4th ed., §3.4.8, rank-revealing use of
//! complete pivoting). Its first step also yields the rank-1 factors exactly:
//! with pivot K[p][q], u = K[·][q] and v = K[p][·] / K[p][q].

use std::fmt;

use crate::kernel::Kernel;

/// Relative tolerance for rank decisions and symmetry tests.
pub const RANK_TOL: f64 = 1e-9;

/// Parity of a kernel under one mirror or rotation.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Parity {
    /// Unchanged by it.
    Even,
    /// Negated by it.
    Odd,
    /// Neither.
    None,
}

impl fmt::Display for Parity {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Parity::Even => "even",
            Parity::Odd => "odd",
            Parity::None => "none",
        })
    }
}

/// Symmetries of one plane.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Symmetry {
    /// Under the left–right mirror.
    pub mirror_x: Parity,
    /// Under the top–bottom mirror.
    pub mirror_y: Parity,
    /// Under 180° rotation. `Even` means `convolve` and `correlate` agree.
    pub rot180: Parity,
    /// Under transposition (square kernels only).
    pub transpose: Parity,
}

/// The analysis of one plane.
#[derive(Debug, Clone, PartialEq)]
pub struct PlaneAnalysis {
    /// Σ taps.
    pub sum: f64,
    /// Σ |taps|.
    pub l1: f64,
    /// Symmetries.
    pub symmetry: Symmetry,
    /// Numeric rank.
    pub rank: usize,
    /// For rank 1: (column factor u, row factor v) with K = u·vᵀ.
    pub factors: Option<(Vec<f64>, Vec<f64>)>,
}

/// Analyses plane `c` of a kernel.
pub fn analyse_plane(k: &Kernel, c: usize) -> PlaneAnalysis {
    let p = &k.planes[c];
    let (r, w) = (k.rows, k.cols);
    let sum = p.iter().sum();
    let l1 = p.iter().map(|v| v.abs()).sum();
    let scale = p.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let tol = RANK_TOL * scale.max(f64::MIN_POSITIVE);
    let parity = |f: &dyn Fn(usize, usize) -> f64| {
        let even = (0..r).all(|y| (0..w).all(|x| (p[y * w + x] - f(y, x)).abs() <= tol));
        let odd = (0..r).all(|y| (0..w).all(|x| (p[y * w + x] + f(y, x)).abs() <= tol));
        match (even, odd) {
            (true, _) => Parity::Even,
            (false, true) => Parity::Odd,
            _ => Parity::None,
        }
    };
    let symmetry = Symmetry {
        mirror_x: parity(&|y, x| p[y * w + (w - 1 - x)]),
        mirror_y: parity(&|y, x| p[(r - 1 - y) * w + x]),
        rot180: parity(&|y, x| p[(r - 1 - y) * w + (w - 1 - x)]),
        transpose: if r == w {
            parity(&|y, x| p[x * w + y])
        } else {
            Parity::None
        },
    };
    let rank = numeric_rank(p, r, w, tol);
    let factors = if rank == 1 {
        rank1_factors(p, r, w)
    } else {
        None
    };
    PlaneAnalysis {
        sum,
        l1,
        symmetry,
        rank,
        factors,
    }
}

/// Rank by complete-pivoting elimination with absolute tolerance `tol`.
pub fn numeric_rank(p: &[f64], rows: usize, cols: usize, tol: f64) -> usize {
    let mut a = p.to_vec();
    let mut live_r: Vec<usize> = (0..rows).collect();
    let mut live_c: Vec<usize> = (0..cols).collect();
    let mut rank = 0;
    while !live_r.is_empty() && !live_c.is_empty() {
        let mut best = (0usize, 0usize, 0.0f64);
        for (ri, &y) in live_r.iter().enumerate() {
            for (ci, &x) in live_c.iter().enumerate() {
                let v = a[y * cols + x].abs();
                if v > best.2 {
                    best = (ri, ci, v);
                }
            }
        }
        if best.2 <= tol {
            break;
        }
        let (py, px) = (live_r[best.0], live_c[best.1]);
        let piv = a[py * cols + px];
        for &y in &live_r {
            if y == py {
                continue;
            }
            let f = a[y * cols + px] / piv;
            for &x in &live_c {
                a[y * cols + x] -= f * a[py * cols + x];
            }
        }
        live_r.swap_remove(best.0);
        live_c.swap_remove(best.1);
        rank += 1;
    }
    rank
}

/// Factors u (length rows) and v (length cols) with p = u·vᵀ, taken from the
/// largest tap, then rescaled (u·a, v/a) to read well:
/// 1. integer taps: the smallest non-zero |v| becomes the smallest whole number
///    m ≤ 64 that leaves both factors integral (sobel-x: [1 2 1] ⊗ [−1 0 1],
///    scharr-y: [−1 0 1] ⊗ [3 10 3]);
/// 2. otherwise, when v does not sum to 0, v sums to 1 (a normalised Gaussian
///    gives two normalised 1-D Gaussians);
/// 3. otherwise both factors get the same Euclidean norm.
///
/// The sign makes u's largest entry positive. `None` for an all-zero plane.
pub fn rank1_factors(p: &[f64], rows: usize, cols: usize) -> Option<(Vec<f64>, Vec<f64>)> {
    let (i, piv) = p
        .iter()
        .enumerate()
        .max_by(|a, b| a.1.abs().total_cmp(&b.1.abs()))?;
    if *piv == 0.0 {
        return None;
    }
    let (py, px) = (i / cols, i % cols);
    let u: Vec<f64> = (0..rows).map(|y| p[y * cols + px]).collect();
    let v: Vec<f64> = (0..cols).map(|x| p[py * cols + x] / piv).collect();
    let integral = |x: &[f64]| {
        x.iter()
            .all(|t| (t - t.round()).abs() <= 1e-9 * t.abs().max(1.0))
    };
    let snap = |x: Vec<f64>| -> Vec<f64> { x.into_iter().map(f64::round).collect() };
    let rescale = |a: f64| -> (Vec<f64>, Vec<f64>) {
        (
            u.iter().map(|x| x * a).collect(),
            v.iter().map(|x| x / a).collect(),
        )
    };
    let mut best = None;
    if integral(p) {
        let min_v = v
            .iter()
            .filter(|x| **x != 0.0)
            .fold(f64::INFINITY, |m, x| m.min(x.abs()));
        best = (1..=64)
            .map(|m| rescale(min_v / m as f64))
            .find(|(u2, v2)| integral(u2) && integral(v2))
            .map(|(u2, v2)| (snap(u2), snap(v2)));
    }
    let (mut u, mut v) = best.unwrap_or_else(|| {
        let sum_v: f64 = v.iter().sum();
        let l1_v: f64 = v.iter().map(|x| x.abs()).sum();
        if sum_v.abs() > RANK_TOL * l1_v {
            rescale(sum_v)
        } else {
            let norm = |x: &[f64]| x.iter().map(|t| t * t).sum::<f64>().sqrt();
            rescale((norm(&v) / norm(&u)).sqrt())
        }
    });
    let umax = u
        .iter()
        .copied()
        .max_by(|a, b| a.abs().total_cmp(&b.abs()))
        .unwrap_or(1.0);
    if umax < 0.0 {
        u.iter_mut().for_each(|x| *x = -*x);
        v.iter_mut().for_each(|x| *x = -*x);
    }
    Some((u, v))
}
