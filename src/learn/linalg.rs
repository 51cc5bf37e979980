//! Mean, covariance and symmetric eigenvectors of a patch sample.
//!
//! Sums run over fixed chunks of rows, each chunk's sum made on whichever
//! thread, then added in chunk order: the result is the same for any number
//! of threads. Sums are f64 (the patches are f32).

use nalgebra::DMatrix;
use ndarray::{Array2, ArrayView2};
use rayon::prelude::*;

/// Rows per chunk of the sums.
pub const CHUNK: usize = 4096;

/// Per-column mean of an `n × d` row-major sample.
pub fn mean(data: &[f32], d: usize) -> Vec<f64> {
    let n = data.len() / d.max(1);
    let parts: Vec<Vec<f64>> = data
        .par_chunks(CHUNK * d)
        .map(|rows| {
            let mut s = vec![0.0f64; d];
            for r in rows.chunks_exact(d) {
                s.iter_mut().zip(r).for_each(|(a, v)| *a += *v as f64);
            }
            s
        })
        .collect();
    let mut m = vec![0.0f64; d];
    for p in parts {
        m.iter_mut().zip(p).for_each(|(a, v)| *a += v);
    }
    m.iter_mut().for_each(|v| *v /= n.max(1) as f64);
    m
}

/// Sample covariance (divided by n − 1, as `numpy.cov`) of an `n × d`
/// sample about `mean`: a `d × d` row-major matrix.
pub fn covariance(data: &[f32], d: usize, mean: &[f64]) -> Vec<f64> {
    let n = data.len() / d.max(1);
    let parts: Vec<Array2<f64>> = data
        .par_chunks(CHUNK * d)
        .map(|rows| {
            let r = rows.len() / d;
            let centred = Array2::from_shape_fn((r, d), |(i, j)| rows[i * d + j] as f64 - mean[j]);
            centred.t().dot(&centred)
        })
        .collect();
    let mut c = Array2::<f64>::zeros((d, d));
    for p in parts {
        c += &p;
    }
    let div = (n.max(2) - 1) as f64;
    c.iter().map(|v| v / div).collect()
}

/// Eigenvalues (largest first) and unit eigenvectors of a symmetric `d × d`
/// row-major matrix, each vector's largest-magnitude entry made positive (so
/// the signs are fixed), by nalgebra's symmetric QR iteration.
pub fn eigen(m: &[f64], d: usize) -> (Vec<f64>, Vec<Vec<f64>>) {
    let a = DMatrix::from_row_slice(d, d, m);
    let e = a.symmetric_eigen();
    let mut order: Vec<usize> = (0..d).collect();
    order.sort_by(|&i, &j| {
        e.eigenvalues[j]
            .total_cmp(&e.eigenvalues[i])
            .then(i.cmp(&j))
    });
    let values = order.iter().map(|&i| e.eigenvalues[i]).collect();
    let vectors = order
        .iter()
        .map(|&i| {
            let mut v: Vec<f64> = e.eigenvectors.column(i).iter().copied().collect();
            let big = v
                .iter()
                .copied()
                .fold(0.0f64, |b, x| if x.abs() > b.abs() { x } else { b });
            if big < 0.0 {
                v.iter_mut().for_each(|x| *x = -*x);
            }
            v
        })
        .collect();
    (values, vectors)
}

/// The ZCA whitening matrix of a covariance: W = U diag(1/sqrt(λ + ε)) Uᵀ
/// (Bell & Sejnowski 1997, "The 'independent components' of natural scenes
/// are edge filters", Vision Research 37(23); Coates & Ng 2012 §2; from
/// memory). Eigenvalues below zero (rounding) count as zero. Symmetric, `d × d` row-major.
pub fn zca(cov: &[f64], d: usize, eps: f64) -> Vec<f64> {
    let (values, vectors) = eigen(cov, d);
    let mut w = vec![0.0f64; d * d];
    for (l, u) in values.iter().zip(&vectors) {
        let s = 1.0 / (l.max(0.0) + eps).sqrt();
        for i in 0..d {
            for j in 0..d {
                w[i * d + j] += s * u[i] * u[j];
            }
        }
    }
    w
}

/// Rows of `data` (`n × d`) minus `mean`, times the symmetric `d × d` matrix
/// `w` (or only centred when `w` is `None`), as f32.
pub fn transform(data: &[f32], d: usize, mean: &[f64], w: Option<&[f64]>) -> Vec<f32> {
    let wf: Option<Array2<f32>> =
        w.map(|w| Array2::from_shape_fn((d, d), |(i, j)| w[i * d + j] as f32));
    let mut out = vec![0.0f32; data.len()];
    out.par_chunks_mut(CHUNK * d)
        .zip(data.par_chunks(CHUNK * d))
        .for_each(|(dst, rows)| {
            let r = rows.len() / d;
            let centred =
                Array2::from_shape_fn((r, d), |(i, j)| (rows[i * d + j] as f64 - mean[j]) as f32);
            match &wf {
                Some(w) => {
                    let z = centred.dot(w);
                    dst.copy_from_slice(z.as_slice().expect("standard layout"));
                }
                None => dst.copy_from_slice(centred.as_slice().expect("standard layout")),
            }
        });
    out
}

/// A view of `n × d` row-major samples.
pub fn rows(data: &[f32], d: usize) -> ArrayView2<'_, f32> {
    ArrayView2::from_shape((data.len() / d.max(1), d), data).expect("n × d")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eigen_of_a_diagonal_matrix_is_its_diagonal_sorted() {
        let (v, u) = eigen(&[1.0, 0.0, 0.0, 0.0, 3.0, 0.0, 0.0, 0.0, 2.0], 3);
        assert_eq!(v, vec![3.0, 2.0, 1.0]);
        assert_eq!(u[0], vec![0.0, 1.0, 0.0]);
    }

    #[test]
    fn covariance_divides_by_n_minus_one() {
        // Two samples of one variable, 0 and 2: mean 1, variance (1 + 1) / (2 − 1) = 2
        // (numpy.cov's default, ddof = 1).
        let m = mean(&[0.0, 2.0], 1);
        assert_eq!(m, vec![1.0]);
        assert_eq!(covariance(&[0.0, 2.0], 1, &m), vec![2.0]);
    }
}
