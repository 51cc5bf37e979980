//! Pooling stages: each output is the maximum or the mean of a window of its
//! map, without padding. The output size follows the same relationship as a conv
//! stage with no padding and dilation 1, o = floor((i − k) / s) + 1
//! (Dumoulin & Visin 2016, relationship 7 applied to pooling, §3). `global`
//! pools each whole map to one value. A NaN in a window gives NaN.

use std::fmt;
use std::str::FromStr;

use ndarray::Array3;

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
        let ctx = |e: Error| Error::Stage(format!("pool {self}: {e}"));
        Ok((
            window_output(Axis::Rows, h, kh, sh).map_err(ctx)?,
            window_output(Axis::Cols, w, kw, sw).map_err(ctx)?,
        ))
    }

    /// Pools every map of a `C × H × W` array.
    pub fn apply(&self, input: &Array3<f32>) -> Result<Array3<f32>, Error> {
        let (c, h, w) = input.dim();
        let (oh, ow) = self.output_size(h, w)?;
        let ((kh, kw), (sh, sw)) = self.window_over(h, w);
        let mut out = Array3::<f32>::zeros((c, oh, ow));
        for ch in 0..c {
            let map = input.index_axis(ndarray::Axis(0), ch);
            for oy in 0..oh {
                for ox in 0..ow {
                    let win = map.slice(ndarray::s![oy * sh..oy * sh + kh, ox * sw..ox * sw + kw]);
                    out[[ch, oy, ox]] = match self.kind {
                        PoolKind::Max => win.iter().fold(f32::NEG_INFINITY, |m, &v| {
                            if v > m || v.is_nan() || m.is_nan() {
                                if m.is_nan() {
                                    m
                                } else {
                                    v
                                }
                            } else {
                                m
                            }
                        }),
                        PoolKind::Mean => {
                            (win.iter().map(|&v| v as f64).sum::<f64>() / (kh * kw) as f64) as f32
                        }
                    };
                }
            }
        }
        Ok(out)
    }
}
