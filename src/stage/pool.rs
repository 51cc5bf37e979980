//! Pooling stages: each output is the maximum or the mean of a window of its
//! map, without padding. The output size follows the same relationship as a conv
//! stage with no padding and dilation 1, o = floor((i − k) / s) + 1
//! (Dumoulin & Visin 2016, relationship 7 applied to pooling, §3). `global`
//! pools each whole map to one value. A NaN in a window gives NaN.

use std::fmt;
use std::str::FromStr;

use ndarray::{Array3, ArrayView3};

use crate::engine::buffers::Buffers;

use crate::error::Error;
use crate::geometry::{window_output, Axis};

/// Max or mean.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PoolKind {
    /// Largest value in the window.
    Max,
    /// Arithmetic mean of the window.
    Mean,
}

impl FromStr for PoolKind {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "max" => Ok(PoolKind::Max),
            "mean" => Ok(PoolKind::Mean),
            other => Err(format!("unknown pooling '{other}'; expected max or mean")),
        }
    }
}

impl fmt::Display for PoolKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            PoolKind::Max => "max",
            PoolKind::Mean => "mean",
        })
    }
}

/// Window of a pool stage.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PoolWindow {
    /// The whole map.
    Global,
    /// A window of (rows, cols) moved by (rows, cols).
    Sized {
        /// Window rows and columns.
        size: (usize, usize),
        /// Stride rows and columns.
        stride: (usize, usize),
    },
}

/// A pool stage.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Pool {
    /// Max or mean.
    pub kind: PoolKind,
    /// Its window.
    pub window: PoolWindow,
}

impl fmt::Display for Pool {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.window {
            PoolWindow::Global => write!(f, "{} global", self.kind),
            PoolWindow::Sized { size, stride } => write!(
                f,
                "{} {}×{} stride {}×{}",
                self.kind, size.1, size.0, stride.1, stride.0
            ),
        }
    }
}

impl Pool {
    /// Window (rows, cols) and stride over an `h × w` map.
    pub fn window_over(&self, h: usize, w: usize) -> ((usize, usize), (usize, usize)) {
        match self.window {
            PoolWindow::Global => ((h, w), (h, w)),
            PoolWindow::Sized { size, stride } => (size, stride),
        }
    }

    /// Output (height, width) over an `h × w` map; errors state the sizes.
    pub fn output_size(&self, h: usize, w: usize) -> Result<(usize, usize), Error> {
        let ((kh, kw), (sh, sw)) = self.window_over(h, w);
        let ctx = |e: Error| e.within(&format!("pool {self}"));
        Ok((
            window_output(Axis::Rows, h, kh, sh).map_err(ctx)?,
            window_output(Axis::Cols, w, kw, sw).map_err(ctx)?,
        ))
    }

    /// Pools every map of a `C × H × W` array. Each output row is built from
    /// whole input rows (running max or f64 sum per output column), maps in
    /// parallel; every output is computed in the same order whatever the threads.
    pub fn apply(&self, input: &Array3<f32>) -> Result<Array3<f32>, Error> {
        self.apply_in(input.view(), &Buffers::new(0))
    }

    /// [`Pool::apply`] with its output taken from `bufs`.
    pub(crate) fn apply_in(
        &self,
        input: ArrayView3<f32>,
        bufs: &Buffers,
    ) -> Result<Array3<f32>, Error> {
        use rayon::prelude::*;
        let (c, h, w) = input.dim();
        let (oh, ow) = self.output_size(h, w)?;
        let standard = input.as_standard_layout();
        let data = standard.as_slice().expect("standard layout");
        // Every output is written below.
        let mut out = bufs.scratch(c * oh * ow);
        out.par_chunks_mut(oh * ow)
            .zip(data.par_chunks(h * w))
            .for_each(|(dst, map)| self.pool_map(map, w, dst, ow));
        Ok(Array3::from_shape_vec((c, oh, ow), out).expect("sized from the output size"))
    }

    /// Pools one map, `w` samples wide, into `dst`: as many output rows of `ow`
    /// samples as `dst` holds, output row y from the map's rows y·s … y·s + k − 1.
    pub(crate) fn pool_map(&self, map: &[f32], w: usize, dst: &mut [f32], ow: usize) {
        let h = map.len() / w.max(1);
        let ((kh, kw), (sh, sw)) = self.window_over(h, w);
        match self.kind {
            PoolKind::Max => max_rows(map, w, (kh, kw), (sh, sw), dst, ow),
            PoolKind::Mean => mean_rows(map, w, (kh, kw), (sh, sw), dst, ow),
        }
    }
}

/// `m` becomes `v` when `v` is larger, or when `v` is NaN and `m` is not: a NaN
/// in a window wins and stays, so the window's result is NaN.
#[inline(always)]
fn take_max(m: &mut f32, v: f32) {
    if v > *m || v.is_nan() && !m.is_nan() {
        *m = v;
    }
}

/// Max pooling of one map, rows first: for each output row, the element-wise
/// max of the window's input rows (contiguous, so it runs as vectors), then the
/// max over each window's columns of that. Max is exact, so the order does not
/// change any finite result.
fn max_rows(
    map: &[f32],
    w: usize,
    (kh, kw): (usize, usize),
    (sh, sw): (usize, usize),
    dst: &mut [f32],
    ow: usize,
) {
    let span = (ow - 1) * sw + kw;
    let mut col = vec![0.0f32; span];
    for (oy, row_out) in dst.chunks_exact_mut(ow).enumerate() {
        let r0 = oy * sh;
        col.copy_from_slice(&map[r0 * w..r0 * w + span]);
        for r in r0 + 1..r0 + kh {
            for (m, &v) in col.iter_mut().zip(&map[r * w..r * w + span]) {
                take_max(m, v);
            }
        }
        if kw == 2 && sw == 2 {
            for (o, pair) in row_out.iter_mut().zip(col.chunks_exact(2)) {
                let mut m = pair[0];
                take_max(&mut m, pair[1]);
                *o = m;
            }
        } else {
            for (ox, o) in row_out.iter_mut().enumerate() {
                let win = &col[ox * sw..ox * sw + kw];
                let mut m = win[0];
                for &v in &win[1..] {
                    take_max(&mut m, v);
                }
                *o = m;
            }
        }
    }
}

/// Mean pooling of one map: each window summed in f64, row by row of the
/// window, then divided by its size.
fn mean_rows(
    map: &[f32],
    w: usize,
    (kh, kw): (usize, usize),
    (sh, sw): (usize, usize),
    dst: &mut [f32],
    ow: usize,
) {
    let n = (kh * kw) as f64;
    let mut acc = vec![0.0f64; ow];
    for (oy, row_out) in dst.chunks_exact_mut(ow).enumerate() {
        acc.fill(0.0);
        for r in oy * sh..oy * sh + kh {
            let line = &map[r * w..(r + 1) * w];
            for (ox, a) in acc.iter_mut().enumerate() {
                *a += line[ox * sw..ox * sw + kw]
                    .iter()
                    .map(|&v| v as f64)
                    .sum::<f64>();
            }
        }
        for (o, a) in row_out.iter_mut().zip(&acc) {
            *o = (a / n) as f32;
        }
    }
}
